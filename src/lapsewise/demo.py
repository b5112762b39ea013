"""The demo scenario: Mail-Order Garden Seeds, an invented seed catalog that mails every quarter.

The generator draws customers from a known hidden-churn process and writes the
orders and mailings files that the business's order system would export. Every
random step takes the seed, so the same seed gives the same files byte for byte.

The process (the truth the model should recover):

- each customer has a purchase probability ``p ~ Beta(alpha, beta)`` and a churn
  probability ``theta ~ Beta(gamma, delta)``;
- quarter 0 is the first order; at the start of each later quarter an alive
  customer dies for good with probability ``theta``;
- an alive customer buys with probability ``p`` when mailed, ``rho * p`` when not;
- the catalog's historical lapse rule: mail every customer until ``lapse_after``
  silent quarters have passed since their last order, then mail only a random
  win-back sample (``winback_share`` of lapsed customers each quarter);
- the value of each order is gamma-gamma: a customer's orders are
  ``Gamma(shape=spend_p, rate=nu)`` with ``nu ~ Gamma(shape=spend_q, rate=spend_gamma)``;
- some purchase quarters are split into two orders, some orders are partly
  returned in the same quarter, and a few export rows are duplicated.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd

SCENARIO_NAME = "Mail-Order Garden Seeds"
# The demo's economics: the same as policies/full-catalog.toml (a test keeps them in step).
DEMO_BUDGET = 3000.0
DEMO_ECONOMICS = {"gross_margin": 0.45, "order_cost": 4.00, "piece_cost": 0.90, "annual_discount_rate": 0.10, "horizon_quarters": 40}


@dataclass(frozen=True)
class Truth:
    """The settings the demo scenario is drawn from."""

    alpha: float = 1.1
    beta: float = 2.4
    gamma: float = 0.7
    delta: float = 4.5
    rho: float = 0.3
    spend_p: float = 6.0
    spend_q: float = 4.0
    spend_gamma: float = 22.5
    lapse_after: int = 4
    winback_share: float = 0.2
    acquisition_quarters: int = 16
    split_share: float = 0.15
    return_share: float = 0.05
    duplicate_share: float = 0.002
    start: str = "2020-01-01"

    def as_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class DemoData:
    orders: pd.DataFrame
    mailings: pd.DataFrame
    as_of: dt.date
    truth: Truth


def _quarter_start(start: dt.date, quarter: int) -> np.datetime64:
    month = start.year * 12 + start.month - 1 + 3 * quarter
    return np.datetime64(dt.date(month // 12, month % 12 + 1, 1), "D")


def simulate_base(
    customers: int,
    quarters: int,
    seed: int,
    truth: Truth = Truth(),
) -> DemoData:
    """Draw the scenario's customers, orders and mailings.

    Customers are acquired evenly over the first ``truth.acquisition_quarters``
    quarters (fewer when the history is shorter). The loop runs over quarters,
    never over customers.
    """
    rng = np.random.default_rng(seed)
    start = dt.date.fromisoformat(truth.start)
    acquisition = max(1, min(truth.acquisition_quarters, quarters - 1))
    first = rng.integers(0, acquisition, size=customers)
    p = rng.beta(truth.alpha, truth.beta, size=customers)
    theta = rng.beta(truth.gamma, truth.delta, size=customers)
    nu = rng.gamma(truth.spend_q, 1.0 / truth.spend_gamma, size=customers)

    alive = np.ones(customers, dtype=bool)
    last = first.copy()
    buy_rows: list[np.ndarray] = [np.stack([np.arange(customers), first], axis=1)]
    mail_rows: list[np.ndarray] = []
    for quarter in range(1, quarters):
        active = first < quarter
        alive &= ~(active & (rng.random(customers) < theta))
        silent_so_far = quarter - 1 - last
        mailed = active & ((silent_so_far < truth.lapse_after) | (rng.random(customers) < truth.winback_share))
        chance = p * np.where(mailed, 1.0, truth.rho)
        bought = active & alive & (rng.random(customers) < chance)
        last = np.where(bought, quarter, last)
        who = np.flatnonzero(bought)
        buy_rows.append(np.stack([who, np.full(len(who), quarter)], axis=1))
        sent = np.flatnonzero(mailed)
        mail_rows.append(np.stack([sent, np.full(len(sent), quarter)], axis=1))

    buys = np.concatenate(buy_rows)
    values = rng.gamma(truth.spend_p, 1.0 / nu[buys[:, 0]])
    orders = _orders_from_purchases(rng, buys, values, start, truth)
    mails = np.concatenate(mail_rows) if mail_rows else np.empty((0, 2), dtype=np.int64)
    mail_dates = np.array([_quarter_start(start, q) for q in range(quarters)])[mails[:, 1]] + rng.integers(0, 20, len(mails))
    ids = np.char.add("G", np.char.zfill(np.arange(1, customers + 1).astype(str), 6))
    mailings = pd.DataFrame({"customer_id": ids[mails[:, 0]], "mail_date": mail_dates.astype("datetime64[D]"), "version": "full"})
    mailings = mailings.sort_values(["mail_date", "customer_id"], kind="stable").reset_index(drop=True)
    orders["customer_id"] = ids[orders.pop("row").to_numpy()]
    orders = orders[["customer_id", "order_date", "amount"]]
    end = _quarter_start(start, quarters) - np.timedelta64(1, "D")
    return DemoData(orders=orders, mailings=mailings, as_of=pd.Timestamp(end).date(), truth=truth)


def _orders_from_purchases(rng: np.random.Generator, buys: np.ndarray, values: np.ndarray, start: dt.date, truth: Truth) -> pd.DataFrame:
    """Turn purchase occasions into order rows: split orders, partial returns, a few duplicated rows."""
    quarter_starts = np.array([_quarter_start(start, q) for q in range(int(buys[:, 1].max()) + 2)])
    day_span = (quarter_starts[1:] - quarter_starts[:-1]).astype(np.int64)
    def dates(quarter: np.ndarray) -> np.ndarray:
        return quarter_starts[quarter] + (rng.random(len(quarter)) * day_span[quarter]).astype(np.int64)

    row, quarter = buys[:, 0], buys[:, 1]
    split = rng.random(len(buys)) < truth.split_share
    share = rng.uniform(0.3, 0.7, size=len(buys))
    main_amount = np.where(split, values * share, values)
    parts = [
        pd.DataFrame({"row": row, "order_date": dates(quarter), "amount": np.round(main_amount, 2)}),
        pd.DataFrame({"row": row[split], "order_date": dates(quarter[split]), "amount": np.round(values[split] * (1 - share[split]), 2)}),
    ]
    returned = rng.random(len(buys)) < truth.return_share
    return_share = rng.uniform(0.1, 0.5, size=len(buys))
    parts.append(
        pd.DataFrame({"row": row[returned], "order_date": dates(quarter[returned]), "amount": -np.round(values[returned] * return_share[returned], 2)})
    )
    orders = pd.concat(parts, ignore_index=True)
    orders = orders.sort_values(["order_date", "row"], kind="stable").reset_index(drop=True)
    duplicate = rng.random(len(orders)) < truth.duplicate_share
    orders = pd.concat([orders, orders[duplicate]]).sort_values(["order_date", "row"], kind="stable").reset_index(drop=True)
    orders["order_date"] = pd.to_datetime(orders["order_date"]).dt.strftime("%Y-%m-%d")
    return orders


# ---------------------------------------------------------------- the demo command


def write_demo_files(folder: Path, data: DemoData, force: bool) -> dict[str, Path]:
    """Write the scenario's orders, mailings and true settings into ``folder`` (atomically)."""
    from lapsewise.errors import InputError
    from lapsewise.output import check_writable, dumps_stable, write_atomic, write_text_atomic

    if folder.exists() and not folder.is_dir():
        raise InputError(f"{folder}: exists and is not a folder; choose another --dir")
    folder.mkdir(parents=True, exist_ok=True)
    paths = {
        "orders": folder / "orders.csv",
        "mailings": folder / "mailings.csv",
        "truth": folder / "truth.json",
        "model": folder / "model.json",
        "mail_list": folder / "mail-list.csv",
    }
    for path in paths.values():
        check_writable(path, force)  # every output of the demo, before anything is written
    write_atomic(paths["orders"], lambda p: data.orders.to_csv(p, index=False), force)
    mailings = data.mailings.assign(mail_date=pd.to_datetime(data.mailings["mail_date"]).dt.strftime("%Y-%m-%d"))
    write_atomic(paths["mailings"], lambda p: mailings.to_csv(p, index=False), force)
    truth = {"scenario": SCENARIO_NAME, "as_of": str(data.as_of), **data.truth.as_dict()}
    write_text_atomic(paths["truth"], dumps_stable(truth), force)
    return paths


def run_demo(console, folder: Path, customers: int, quarters: int, seed: int, force: bool) -> None:
    """Generate the scenario, write its files, and run every step of the tool on them."""
    from lapsewise import render
    from lapsewise.backtest import run_backtest
    from lapsewise.model import fit_model, return_curves
    from lapsewise.output import dumps_stable, write_text_atomic
    from lapsewise.panel import panel_from_files, summarize
    from lapsewise.output import write_atomic, write_csv
    from lapsewise.plan import customer_values, mail_list, make_plan, neutralise_formulas
    from lapsewise.policy import Beliefs, Economics, Policy, Segments, Version, build_stop_table, typical_order_value
    from lapsewise.simulate import simulate_policies

    data = simulate_base(customers, quarters, seed)
    paths = write_demo_files(folder, data, force)
    console.rule(f"[bold]{SCENARIO_NAME}[/bold] (invented demo scenario)")
    console.print(
        f"Wrote {len(data.orders):,} order rows to {paths['orders']} and {len(data.mailings):,} mailing rows to "
        f"{paths['mailings']} ({customers:,} customers over {quarters} quarters, seed {seed})."
    )
    panel = panel_from_files(str(paths["orders"]), str(paths["mailings"]), str(data.as_of))
    console.rule("The customer base")
    render.print_panel_summary(console, panel)

    console.rule("The fitted model")
    summary = summarize(panel)
    model = fit_model(panel, summary)
    write_text_atomic(paths["model"], dumps_stable(model.to_dict()), force)
    render.print_model(console, model, return_curves(model, summary))
    render.print_truth_comparison(console, model, data.truth)
    console.print(f"Model written to {paths['model']}.")

    holdout = max(1, min(4, quarters // 4))  # a short demo history keeps enough calibration quarters
    console.rule(f"Backtest: the last {holdout} quarters held out")
    render.print_backtest(console, run_backtest(panel, holdout))

    console.rule("When to stop mailing: the stop table (policy: full catalog)")
    economics = Economics(**DEMO_ECONOMICS)
    table = build_stop_table(model, economics, band_count=3)
    render.print_stop_table(console, table, model)

    console.rule("The stop rule against rules of thumb: simulation")
    beliefs = Beliefs.from_fit(model.churn, economics.unmailed_response)
    simulation = simulate_policies(beliefs, economics, typical_order_value(model, economics), customers=10_000, quarters=economics.horizon_quarters, seed=seed)
    render.print_simulation(console, simulation, economics)

    console.rule(f"This quarter's plan at a sample budget of {DEMO_BUDGET:,.0f}")
    policy = Policy(economics, (Version("full", economics.piece_cost),), Segments(), "demo")
    values = customer_values(model, panel, policy)
    plan = make_plan(values, policy, DEMO_BUDGET)
    render.print_plan(console, plan, panel, values)
    rows = neutralise_formulas(mail_list(values, plan.assignment))
    write_atomic(paths["mail_list"], lambda p: write_csv(p, rows), force)
    render.print_mail_list(console, rows, plan, paths["mail_list"])
    render.print_caution(console)
