"""The fitted model as a whole: the churn fit, the spend fit, and what they were fitted on.

:func:`fit_model` runs both fits on a panel; :func:`load_model` reads the model
file (JSON with the published parameter names, see :mod:`lapsewise.files.model_file`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from lapsewise.data.histories import compress
from lapsewise.data.panel import Panel
from lapsewise.data.summary import CustomerSummary, summarize
from lapsewise.errors import InputError
from lapsewise.files.model_file import MODEL_FORMAT, MODEL_VERSION, read_model_file
from lapsewise.model.churn import ChurnFit, fit_churn
from lapsewise.model.seasons import fit_seasons
from lapsewise.model.spend import SpendFit, fit_spend


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
            "churn": {k: churn[k] for k in ("alpha", "beta", "gamma", "delta", "rho", "seasons", "std_errors")},
            "season_test": churn["season_test"],
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
            season_test=data.get("season_test"),
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


def fit_model(panel: Panel, summary: CustomerSummary | None = None, seasons: bool = True) -> Model:
    """Fit the hidden-churn model on the panel's compressed histories and the gamma-gamma model on its repeat customers.

    With ``seasons`` the churn model has multipliers by quarter of the year
    (:func:`lapsewise.model.seasons.fit_seasons`), tested against the plain fit.
    ``summary`` is the panel's :func:`~lapsewise.data.summary.summarize`, when the caller has it already.
    """
    # One after the other: both searches set the process's BLAS threads to one while they run (optimum.maximize).
    churn = fit_churn(compress(panel), panel.mailing_history)
    if seasons:
        churn = fit_seasons(compress(panel, seasons=True), panel.mailing_history, churn)
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
    data, source = read_model_file(path)
    try:
        return Model.from_dict(data)
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"{source}: the model file is damaged ({exc!r} missing or wrong); fit the model again") from None
