"""The fitted model as a whole: the churn fit, the spend fit, and what they were fitted on.

:func:`fit_model` runs both fits on a panel; :func:`load_model` reads the model
file (JSON with the published parameter names, see :mod:`lapsewise.files.model_file`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

from lapsewise.data.histories import compress, compress_both
from lapsewise.data.panel import Panel
from lapsewise.data.summary import CustomerSummary, summarize
from lapsewise.errors import InputError
from lapsewise.files.model_file import MODEL_FORMAT, MODEL_VERSION, read_model_file
from lapsewise.model.churn import ChurnFit, fit_churn
from lapsewise.model.mailing_check import MailingCheck, check_mailing
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
        Warnings of both fits and of the mailing check.
    mailing_check : MailingCheck or None
        How far the mailing followed recency, frequency and season (:mod:`lapsewise.model.mailing_check`);
        None without a mailings file (and in model files written before the check).
    rho_estimable : bool
        False when the mailings file shows every customer mailed in every quarter: rho is then
        None although there was a mailing history, and deciding needs the policy's unmailed_response.
    """

    churn: ChurnFit
    spend: SpendFit | None
    as_of: str
    end_quarter: int
    fiscal_year_start: int
    customers: int
    warnings: tuple[str, ...] = field(default_factory=tuple)
    mailing_check: MailingCheck | None = None
    rho_estimable: bool = True

    @property
    def mailing_history(self) -> bool:
        """True when fitted with a mailings file (rho None then means it could not be estimated)."""
        return self.churn.mailing_history or not self.rho_estimable

    def to_dict(self) -> dict:
        churn = self.churn.to_dict()
        return {
            "format": MODEL_FORMAT,
            "version": MODEL_VERSION,
            "churn": {k: churn[k] for k in ("alpha", "beta", "gamma", "delta", "rho", "seasons", "std_errors", "covariance")},
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
            "mailing_check": None if self.mailing_check is None else self.mailing_check.to_dict(),
            "rho_estimable": self.rho_estimable,
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
            mailing_check=None if data.get("mailing_check") is None else MailingCheck.from_dict(data["mailing_check"]),
            rho_estimable=bool(data.get("rho_estimable", True)),
        )


RHO_NOT_ESTIMABLE = (
    "rho cannot be estimated: the mailings file shows every customer mailed in every quarter, so nothing shows how a customer "
    "who is not mailed orders; rho is left out of the model, and stop-table, simulate, plan, mail-list and report need "
    "unmailed_response in the policy (or --unmailed-response); a randomised no-mail control cell (lapsewise control-cell) measures it"
)


def mailing_rules_warning(check: MailingCheck) -> str:
    """The warning when the mailing followed the firm's own rules: rho rests on it and may be biased."""
    return (
        "rho rests on mailing that followed the firm's own rules rather than chance (recency, frequency and season explain "
        f"{check.explained_share:.0%} of who was mailed, most of it {check.strongest_predictor}), so it may be biased; "
        "run a randomised no-mail control cell (lapsewise control-cell) to measure it"
    )


CALENDAR_RULES_NOTE = (
    "mailing followed the quarter of the year (not recency or frequency), which the seasonal model accounts for: "
    "rho is estimated within each quarter of the year; a randomised no-mail control cell (lapsewise control-cell) still checks it"
)


def calendar_only(check: MailingCheck) -> bool:
    """True when the mailing's rules are the calendar's alone: recency and frequency each explain under the threshold."""
    from lapsewise.model.mailing_check import EXPLAINED_SHARE_THRESHOLD

    shares = check.explained_share_by_predictor
    return all((shares.get(name) or 0.0) < EXPLAINED_SHARE_THRESHOLD for name in ("recency", "frequency"))


def fit_model(panel: Panel, summary: CustomerSummary | None = None, seasons: bool = True) -> Model:
    """Fit the hidden-churn model on the panel's compressed histories and the gamma-gamma model on its repeat customers.

    With ``seasons`` the churn model has multipliers by quarter of the year
    (:func:`lapsewise.model.seasons.fit_seasons`), tested against the plain fit.
    ``summary`` is the panel's :func:`~lapsewise.data.summary.summarize`, when the caller has it already.
    """
    check = check_mailing(panel.purchased, panel.mailed, panel.n, panel.first_quarter) if panel.mailing_history else None
    # One after the other: both searches set the process's BLAS threads to one while they run (optimum.maximize).
    plain, seasonal = compress_both(panel) if seasons else (compress(panel), None)
    churn = fit_churn(plain, panel.mailing_history)
    rho_estimable = check is None or check.rho_estimable
    if not rho_estimable:
        churn = _without_rho(churn)
    if seasons:  # with every quarter mailed, rho stays out of the seasonal fit too
        churn = fit_seasons(seasonal, panel.mailing_history and rho_estimable, churn)
    spend, spend_warnings = _fit_spend_or_warn(panel, summary)
    warnings = list(churn.warnings) + spend_warnings
    if not rho_estimable:
        warnings.append(RHO_NOT_ESTIMABLE)
    elif check is not None and check.followed_rules:
        if churn.seasons is not None and calendar_only(check):
            warnings.append(CALENDAR_RULES_NOTE)
        else:
            warnings.append(mailing_rules_warning(check))
    return Model(
        churn=churn,
        spend=spend,
        as_of=str(panel.as_of),
        end_quarter=panel.end_quarter,
        fiscal_year_start=panel.fiscal_year_start,
        customers=panel.customers,
        warnings=tuple(warnings),
        mailing_check=check,
        rho_estimable=rho_estimable,
    )


def _without_rho(churn: ChurnFit) -> ChurnFit:
    """The churn fit with rho left out: every quarter was mailed, so the likelihood is flat in rho and its value means nothing.

    alpha to delta are unchanged (with no unmailed quarter rho does not enter the likelihood); rho's standard
    error and warnings go with it.
    """
    return replace(
        churn,
        rho=None,
        std_errors={name: error for name, error in churn.std_errors.items() if name != "rho"},
        covariance=None if churn.covariance is None else churn.covariance.without("rho"),
        warnings=tuple(w for w in churn.warnings if not (w.startswith("rho ") or "rho is not identified" in w)),
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
