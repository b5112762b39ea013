"""The fitted model as a whole: the churn fit, the spend fit, what they were fitted on, and the model file.

``fit_model`` runs both fits on a panel; ``score_customers`` turns a model and a
panel into per-customer quantities; the model file is JSON with the published
parameter names.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from lapsewise.churn import ChurnFit, dert, expected_purchases, fit_churn, posterior, return_curve
from lapsewise.errors import InputError
from lapsewise.load import require_file
from lapsewise.panel import DEFAULT_FREQUENCY_BANDS, CustomerSummary, Panel, band_labels, band_of, compress, summarize
from lapsewise.spend import SpendFit, expected_order_value, fit_spend

MODEL_FORMAT = "lapsewise-model"
MODEL_VERSION = 1


@dataclass(frozen=True)
class Model:
    """Everything a later stage needs from a fit.

    Attributes
    ----------
    churn : ChurnFit
    spend : SpendFit or None
        None when no customer has a repeat purchase with positive spend.
    as_of : str
        Last day of the as-of quarter (YYYY-MM-DD).
    end_quarter, fiscal_year_start : int
        The as-of quarter on lapsewise's absolute scale, and the fiscal year's first month.
    customers : int
    warnings : tuple of str
        Warnings of both fits.
    """

    churn: ChurnFit
    spend: SpendFit | None
    as_of: str
    end_quarter: int
    fiscal_year_start: int
    customers: int
    warnings: tuple[str, ...] = field(default_factory=tuple)

    @property
    def mailing_history(self) -> bool:
        return self.churn.mailing_history

    def to_dict(self) -> dict:
        churn = self.churn.to_dict()
        return {
            "format": MODEL_FORMAT,
            "version": MODEL_VERSION,
            "churn": {k: churn[k] for k in ("alpha", "beta", "gamma", "delta", "rho", "std_errors")},
            "spend": None if self.spend is None else self.spend.to_dict(),
            "log_likelihood": churn["log_likelihood"],
            "converged": churn["converged"],
            "histories": churn["histories"],
            "customers": self.customers,
            "as_of": self.as_of,
            "end_quarter": self.end_quarter,
            "fiscal_year_start": self.fiscal_year_start,
            "mailing_history": self.mailing_history,
            "warnings": list(self.warnings),
        }

    @classmethod
    def from_dict(cls, data: dict) -> "Model":
        churn = dict(data["churn"])
        churn.update(
            log_likelihood=data.get("log_likelihood", float("nan")),
            customers=data.get("customers", 0),
            histories=data.get("histories", 0),
            converged=data.get("converged", True),
        )
        return cls(
            churn=ChurnFit.from_dict(churn),
            spend=None if data.get("spend") is None else SpendFit.from_dict(data["spend"]),
            as_of=str(data["as_of"]),
            end_quarter=int(data["end_quarter"]),
            fiscal_year_start=int(data.get("fiscal_year_start", 1)),
            customers=int(data.get("customers", 0)),
            warnings=tuple(data.get("warnings", ())),
        )


def fit_model(panel: Panel, summary: CustomerSummary | None = None) -> Model:
    """Fit the hidden-churn model on the panel's compressed histories and the gamma-gamma model on its repeat customers.

    ``summary`` is the panel's :func:`~lapsewise.panel.summarize`, when the caller has it already.
    """
    # One after the other: both searches set the process's BLAS threads to one while they run (optimum.maximize).
    churn = fit_churn(compress(panel), panel.mailing_history)
    spend, spend_warnings = _fit_spend_or_warn(panel, summary)
    warnings = list(churn.warnings) + spend_warnings
    return Model(
        churn=churn,
        spend=spend,
        as_of=str(panel.as_of),
        end_quarter=panel.end_quarter,
        fiscal_year_start=panel.fiscal_year_start,
        customers=panel.customers,
        warnings=tuple(warnings),
    )


def _fit_spend_or_warn(panel: Panel, summary: CustomerSummary | None) -> tuple[SpendFit | None, list[str]]:
    """The gamma-gamma fit on the panel's repeat customers (None when there are none), and its warnings."""
    summary = summarize(panel) if summary is None else summary
    try:
        spend = fit_spend(summary.x, summary.mean_repeat_value)
    except InputError as exc:
        return None, [f"spend: {exc}"]
    return spend, [f"spend: {w}" for w in spend.warnings]


def load_model(path: str | Path) -> Model:
    """Read a model file written by ``lapsewise fit``; a damaged or foreign file is an InputError."""
    path = require_file(path, f"write a model with 'lapsewise fit ... --out {path}'", "a model file")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{path}: is not a lapsewise model file (not JSON: {exc}); write one with 'lapsewise fit'") from None
    if not isinstance(data, dict) or data.get("format") != MODEL_FORMAT:
        raise InputError(f"{path}: is not a lapsewise model file (no \"format\": \"{MODEL_FORMAT}\"); write one with 'lapsewise fit'")
    try:
        model = Model.from_dict(data)
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{path}: the model file is damaged ({exc!r} missing or wrong); fit the model again") from None
    for name in ("alpha", "beta", "gamma", "delta"):
        value = getattr(model.churn, name)
        if not (math.isfinite(value) and value > 0):
            raise InputError(f"{path}: churn.{name} = {value} is not a positive number; fit the model again")
    if model.churn.rho is not None and not 0 <= model.churn.rho <= 1:
        raise InputError(f"{path}: churn.rho = {model.churn.rho} is outside [0, 1]; fit the model again")
    return model


# ---------------------------------------------------------------- per-customer quantities


def quarterly_rate(annual_rate: float) -> float:
    """The quarterly discount rate equivalent to an annual one: (1 + annual) ** 0.25 - 1."""
    return (1.0 + annual_rate) ** 0.25 - 1.0


def score_customers(model: Model, panel: Panel, horizon: int = 4, annual_discount_rate: float = 0.10) -> pd.DataFrame:
    """Per-customer quantities at the panel's as-of quarter, computed once per distinct history.

    Columns: customer_id, x, t_x, n, silent_quarters, p_alive, p_buy (next quarter
    if mailed), expected_purchases (next ``horizon`` quarters if mailed every
    quarter), dert (discounted expected residual transactions at the quarterly
    equivalent of ``annual_discount_rate``), expected_order_value.
    """
    histories = compress(panel)
    post = posterior(model.churn, histories)
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
            "expected_purchases": expected_purchases(model.churn, post, horizon)[inverse],
            "dert": dert(model.churn, post, quarterly_rate(annual_discount_rate))[inverse],
            "expected_order_value": value,
        }
    )


def return_curves(model: Model, summary: CustomerSummary, max_silent: int = 12, bands: tuple[int, ...] = DEFAULT_FREQUENCY_BANDS) -> pd.DataFrame:
    """P(alive) and P(buy next quarter) after k further mailed silent quarters, for a typical customer of each frequency band.

    The typical customer of a band has the band's median repeat purchases x and
    median last-purchase quarter t_x (``summary`` is the panel's :func:`~lapsewise.panel.summarize`).
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
        p_alive, p_buy = return_curve(model.churn, x, t_x, max_silent)
        for k in range(max_silent + 1):
            rows.append({"band": label, "x": x, "t_x": t_x, "k": k, "p_alive": float(p_alive[k]), "p_buy": float(p_buy[k])})
    return pd.DataFrame(rows)
