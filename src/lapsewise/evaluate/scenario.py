"""The demo scenario's data: Mail-Order Garden Seeds, an invented seed catalog that mails every quarter.

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
  returned in the same quarter, and a few export rows are duplicated;
- each mailed quarter's piece is dated in the quarter's first 20 days, and the
  orders of a mailed quarter on or after the piece's day (the piece prompts them).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from lapsewise.evaluate.simulator import StreamedUniforms, draw_traits, lapse_rule, run_process
from lapsewise.model.fitted import Model
from lapsewise.model.process import Process

SCENARIO_NAME = "Mail-Order Garden Seeds"


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

    @property
    def process(self) -> Process:
        return Process(self.alpha, self.beta, self.gamma, self.delta, self.rho)


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
    traits = draw_traits(truth.process, customers, rng)
    nu = rng.gamma(truth.spend_q, 1.0 / truth.spend_gamma, size=customers)
    rule = lapse_rule(truth.lapse_after, truth.winback_share)
    simulated = run_process(truth.process, traits, quarters, rule, StreamedUniforms(rng, customers), first=first, rng=rng)
    # Purchase occasions: every first purchase, then the repeat purchases quarter by quarter.
    repeat = simulated.purchased.astype(bool)
    repeat[np.arange(customers), first] = False
    repeat_quarter, repeat_row = np.nonzero(repeat.T)
    buys = np.concatenate([np.stack([np.arange(customers), first], axis=1), np.stack([repeat_row, repeat_quarter], axis=1)])
    mail_quarter, mail_row = np.nonzero(simulated.mailed.T)
    mails = np.stack([mail_row, mail_quarter], axis=1)
    # The catalog drops in the first 20 days of its quarter; an order in a mailed quarter comes on or after that day.
    mail_offset = rng.integers(0, 20, len(mails))
    offset_of_cell = np.zeros(simulated.mailed.shape, dtype=np.int64)
    offset_of_cell[mails[:, 0], mails[:, 1]] = mail_offset
    values = rng.gamma(truth.spend_p, 1.0 / nu[buys[:, 0]])
    orders = _orders_from_purchases(rng, buys, values, start, truth, offset_of_cell[buys[:, 0], buys[:, 1]])
    mail_dates = np.array([_quarter_start(start, q) for q in range(quarters)])[mails[:, 1]] + mail_offset
    ids = np.char.add("G", np.char.zfill(np.arange(1, customers + 1).astype(str), 6))
    mailings = pd.DataFrame({"customer_id": ids[mails[:, 0]], "mail_date": mail_dates.astype("datetime64[D]"), "version": "full"})
    mailings = mailings.sort_values(["mail_date", "customer_id"], kind="stable").reset_index(drop=True)
    orders["customer_id"] = ids[orders.pop("row").to_numpy()]
    orders = orders[["customer_id", "order_date", "amount"]]
    end = _quarter_start(start, quarters) - np.timedelta64(1, "D")
    return DemoData(orders=orders, mailings=mailings, as_of=pd.Timestamp(end).date(), truth=truth)


def _orders_from_purchases(
    rng: np.random.Generator, buys: np.ndarray, values: np.ndarray, start: dt.date, truth: Truth, earliest: np.ndarray
) -> pd.DataFrame:
    """Turn purchase occasions into order rows: split orders, partial returns, a few duplicated rows.

    ``earliest`` is each occasion's first possible day in its quarter (the day of the quarter's piece when it was mailed, else 0).
    """
    quarter_starts = np.array([_quarter_start(start, q) for q in range(int(buys[:, 1].max()) + 2)])
    day_span = (quarter_starts[1:] - quarter_starts[:-1]).astype(np.int64)

    def dates(chosen: np.ndarray | slice) -> np.ndarray:
        first_day = earliest[chosen]
        span = day_span[quarter[chosen]] - first_day
        return quarter_starts[quarter[chosen]] + first_day + (rng.random(len(first_day)) * span).astype(np.int64)

    row, quarter = buys[:, 0], buys[:, 1]
    split = rng.random(len(buys)) < truth.split_share
    share = rng.uniform(0.3, 0.7, size=len(buys))
    main_amount = np.where(split, values * share, values)
    parts = [
        pd.DataFrame({"row": row, "order_date": dates(slice(None)), "amount": np.round(main_amount, 2)}),
        pd.DataFrame({"row": row[split], "order_date": dates(split), "amount": np.round(values[split] * (1 - share[split]), 2)}),
    ]
    returned = rng.random(len(buys)) < truth.return_share
    return_share = rng.uniform(0.1, 0.5, size=len(buys))
    parts.append(
        pd.DataFrame({"row": row[returned], "order_date": dates(returned), "amount": -np.round(values[returned] * return_share[returned], 2)})
    )
    orders = pd.concat(parts, ignore_index=True)
    orders = orders.sort_values(["order_date", "row"], kind="stable").reset_index(drop=True)
    duplicate = rng.random(len(orders)) < truth.duplicate_share
    orders = pd.concat([orders, orders[duplicate]]).sort_values(["order_date", "row"], kind="stable").reset_index(drop=True)
    orders["order_date"] = pd.to_datetime(orders["order_date"]).dt.strftime("%Y-%m-%d")
    return orders


def compare_with_truth(model: Model, truth: Truth) -> pd.DataFrame:
    """The fitted parameters beside the true settings: parameter, true, fitted, std_error, within_two_errors."""
    pairs = [(name, getattr(truth, name), getattr(model.churn, name), model.churn.std_errors.get(name)) for name in ("alpha", "beta", "gamma", "delta", "rho")]
    if model.churn.seasons is not None:  # the scenario has no seasons: every true multiplier is 1 (the fixed one is left out)
        pairs += [
            (f"season_{q + 1}", 1.0, value, model.churn.std_errors.get(f"season_{q + 1}"))
            for q, value in enumerate(model.churn.seasons)
            if model.churn.std_errors.get(f"season_{q + 1}") is not None
        ]
    if model.spend is not None:
        pairs += [(f"spend {name}", getattr(truth, f"spend_{name}"), getattr(model.spend, name), model.spend.std_errors.get(name)) for name in ("p", "q", "gamma")]
    rows = [
        {
            "parameter": name,
            "true": true,
            "fitted": fitted,
            "std_error": error,
            "within_two_errors": fitted is not None and error is not None and abs(fitted - true) <= 2 * error,
        }
        for name, true, fitted, error in pairs
    ]
    return pd.DataFrame(rows)
