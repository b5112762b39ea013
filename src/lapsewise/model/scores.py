"""Per-customer quantities of a fitted model, and the lapse curves of typical customers.

Everything is computed once per distinct history and spread back to the customers.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from lapsewise.data.histories import compress
from lapsewise.data.panel import Panel
from lapsewise.data.summary import DEFAULT_FREQUENCY_BANDS, CustomerSummary, band_labels, band_of, summarize
from lapsewise.errors import InputError
from lapsewise.model.fitted import Model
from lapsewise.model.posterior import dert, expected_orders, lapse_curve, posterior
from lapsewise.model.spend import expected_order_value


def quarterly_rate(annual_rate: float) -> float:
    """The quarterly discount rate equivalent to an annual one: (1 + annual) ** 0.25 - 1."""
    return (1.0 + annual_rate) ** 0.25 - 1.0


SCORE_NULLABLE = ("expected_order_value",)
"""Score columns left empty where the figure does not exist (no order-value model, or an undefined expectation)."""


def score_customers(model: Model, panel: Panel, horizon: int = 4, annual_discount_rate: float = 0.10) -> pd.DataFrame:
    """Per-customer quantities at the panel's as-of quarter, computed once per distinct history.

    Columns: customer_id, x, t_x, n, silent_quarters, p_alive, p_buy (next quarter
    if mailed), expected_orders (next ``horizon`` quarters if mailed every
    quarter), dert (discounted expected residual transactions at the quarterly
    equivalent of ``annual_discount_rate``), expected_order_value.
    """
    process = model.churn.process
    if annual_discount_rate == 0 and process.gamma <= 1:
        # sum_h E[(1-theta)^(n+h)] diverges when gamma <= 1 (the churn rates' density does not vanish at 0).
        raise InputError(
            f"--annual-discount-rate 0: DERT is infinite for this model (gamma = {process.gamma:.3g} is at most 1, so the "
            "undiscounted expected orders never converge); give a discount rate above 0"
        )
    check_unmailed_quarters(model, panel)
    histories = compress(panel, seasons=process.seasonal)
    post = posterior(process, histories)
    summary = summarize(panel)
    inverse = histories.inverse
    if model.spend is not None:
        value = expected_order_value(model.spend, summary.x, summary.mean_repeat_value)
    else:
        value = np.full(panel.customers, np.nan)
    return pd.DataFrame(
        {
            "customer_id": panel.customer_ids,
            "x": summary.x,
            "t_x": summary.t_x,
            "n": summary.n,
            "silent_quarters": summary.silent_quarters,
            "p_alive": post.p_alive[inverse],
            "p_buy": post.p_buy[inverse],
            "expected_orders": expected_orders(process, post, horizon)[inverse],
            "dert": dert(process, post, quarterly_rate(annual_discount_rate))[inverse],
            "expected_order_value": value,
        }
    )


def check_unmailed_quarters(model: Model, panel: Panel, what: str = "scoring") -> None:
    """Refuse to read unmailed quarters with a model that has no rho for them.

    A model fitted on a mailings file that mailed every quarter has no rho (``rho_estimable`` False); its
    posterior counts every quarter as mailed, which is wrong for a panel whose customers were held in some.
    """
    if model.rho_estimable or not panel.mailing_history:
        return
    observed = (np.arange(panel.mailed.shape[1])[None, :] >= 1) & (np.arange(panel.mailed.shape[1])[None, :] <= panel.n[:, None])
    unmailed = int((observed & (panel.mailed == 0)).sum())
    if unmailed:
        raise InputError(
            f"{what}: the model could not estimate rho (every quarter it was fitted on was mailed), but these mailings leave "
            f"{unmailed:,} customer-quarters unmailed; fit the model on these orders and mailings, which show how held customers order"
        )


def lapse_curves(model: Model, summary: CustomerSummary, max_silent: int = 12, bands: tuple[int, ...] = DEFAULT_FREQUENCY_BANDS) -> pd.DataFrame:
    """P(alive) and P(buy next quarter) after k further mailed silent quarters, for a typical customer of each frequency band.

    With seasons the curve runs through the calendar from the as-of quarter (:func:`~lapsewise.model.posterior.lapse_curve`).

    The typical customer of a band has the band's median repeat purchases x and
    median last-purchase quarter t_x (``summary`` is the panel's :func:`~lapsewise.data.summary.summarize`).
    Long format: band, x, t_x, k, p_alive, p_buy.
    """
    band = band_of(summary.x, bands)
    labels = band_labels(bands)
    rows = []
    for index, label in enumerate(labels):
        members = band == index
        if not members.any():
            continue
        x = int(np.median(summary.x[members]))
        t_x = max(int(np.median(summary.t_x[members])), x)
        p_alive, p_buy = lapse_curve(model.churn.process, x, t_x, max_silent, model.end_quarter)
        for k in range(max_silent + 1):
            rows.append({"band": label, "x": x, "t_x": t_x, "k": k, "p_alive": float(p_alive[k]), "p_buy": float(p_buy[k])})
    return pd.DataFrame(rows)


def score_totals(scores: pd.DataFrame) -> dict[str, float]:
    """The scores at a glance: customers, mean P(alive) and P(order next quarter), expected orders, mean DERT,
    how many customers are more likely alive than not, and the planned figures when the scores have them."""
    totals = {
        "customers": len(scores),
        "mean_p_alive": float(scores["p_alive"].mean()),
        "mean_p_buy": float(scores["p_buy"].mean()),
        "expected_orders": float(scores["expected_orders"].sum()),
        "mean_dert": float(scores["dert"].mean()),
        "likely_alive": int((scores["p_alive"] >= 0.5).sum()),
    }
    if "expected_orders_planned" in scores:
        totals["expected_orders_planned"] = float(scores["expected_orders_planned"].sum())
        totals["mean_dert_planned"] = float(scores["dert_planned"].mean())
    return totals
