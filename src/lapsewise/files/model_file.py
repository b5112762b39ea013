"""The model file: JSON written by ``lapsewise fit``, read back by every later command.

This module knows the file's format (its ``format`` and ``version`` keys) and
checks everything in it once, here at the edge: the types of the keys, and
every parameter finite and in the range a fit can produce. A file that fails a
check is refused with one line naming the key; turning the checked data into a
model is :meth:`lapsewise.model.fitted.Model.from_dict`'s job.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from pathlib import Path

from lapsewise.errors import InputError
from lapsewise.files.tables import require_file

MODEL_FORMAT = "lapsewise-model"
MODEL_VERSION = 1

CHURN_RANGE = (1e-4, 1e5)
"""alpha, beta, gamma and delta: the fit searches 1e-3 to 1e4; a file outside this wider range was not written by it."""
SPEND_RANGE = {"p": (1e-5, 1e5), "q": (1e-5, 1e5), "gamma": (1e-9, 1e12)}
"""The order-value model's p, q and gamma (gamma is in currency units)."""
MAX_FILE_BYTES = 10_000_000
CHURN_NAMES = ("alpha", "beta", "gamma", "delta", "rho", "season_1", "season_2", "season_3", "season_4")
SPEND_NAMES = ("p", "q", "gamma")
"""The parameters a model file's covariance tables may name (:mod:`lapsewise.model.uncertainty`)."""


class _Check:
    """Checks of one model file's keys; every refusal names the file and the key."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, key: str, what: str):
        raise InputError(f"{self.source}: {key} {what}; fit the model again with 'lapsewise fit'")

    def table(self, data: dict, key: str) -> dict:
        value = data.get(key)
        if not isinstance(value, dict):
            self.fail(key, "is missing or is not a table of keys")
        return value

    def number(self, data: dict, key: str, low: float, high: float, where: str, optional: bool = False) -> None:
        value = data.get(key)
        if value is None and optional:
            return
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(f"{where}{key}", f"= {_shown(value)} is not a number")
        if not math.isfinite(value) or not low <= value <= high:
            self.fail(f"{where}{key}", f"= {_shown(value)} is outside {low:g} to {high:g}")

    def integer(self, data: dict, key: str, low: int, high: int) -> None:
        value = data.get(key)
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            self.fail(key, f"= {_shown(value)} is not a whole number from {low} to {high}")

    def errors(self, data: dict, where: str) -> None:
        errors = data.get("std_errors", {})
        if not isinstance(errors, dict):
            self.fail(f"{where}std_errors", "is not a table of standard errors")
        for name, error in errors.items():
            if error is not None:
                self.number(errors, name, 0.0, math.inf, f"{where}std_errors.")

    def covariance(self, data: dict, where: str, names: tuple[str, ...]) -> None:
        """The optional ``covariance`` table: ``parameters`` (distinct names of the model's parameters) and a square,
        symmetric ``matrix`` of finite numbers with no negative variance."""
        table = data.get("covariance")
        if table is None:
            return
        key = f"{where}covariance"
        if not isinstance(table, dict):
            self.fail(key, "is not a table with parameters and matrix")
        parameters, matrix = table.get("parameters"), table.get("matrix")
        if not isinstance(parameters, list) or len(set(map(str, parameters))) != len(parameters) or not all(p in names for p in parameters):
            self.fail(f"{key}.parameters", f"= {_shown(parameters)} is not a list of distinct names from {', '.join(names)}")
        size = len(parameters)
        if not isinstance(matrix, list) or len(matrix) != size or not all(isinstance(row, list) and len(row) == size for row in matrix):
            self.fail(f"{key}.matrix", f"is not a {size} x {size} table of numbers")
        for i, row in enumerate(matrix):
            for j, value in enumerate(row):
                self.number({"v": value}, "v", -math.inf, math.inf, f"{key}.matrix[{i}][{j}] ")
        for i in range(size):
            if matrix[i][i] < 0:
                self.fail(f"{key}.matrix[{i}][{i}]", f"= {_shown(matrix[i][i])} is a negative variance")
            for j in range(i):
                if abs(matrix[i][j] - matrix[j][i]) > 1e-9 * max(1.0, abs(matrix[i][j])):
                    self.fail(f"{key}.matrix", f"is not symmetric at [{i}][{j}]")

    def seasons(self, churn: dict) -> None:
        """``churn.seasons``: absent or null (no seasons), or four multipliers in (0, 1], the largest 1."""
        seasons = churn.get("seasons")
        if seasons is None:
            return
        if not isinstance(seasons, list) or len(seasons) != 4:
            self.fail("churn.seasons", f"= {_shown(seasons)} is not a list of four multipliers")
        for index in range(4):
            self.number({"value": seasons[index]}, "value", 1e-6, 1.0, f"churn.seasons[{index}] ")
        if max(seasons) != 1.0:
            self.fail("churn.seasons", f"= {_shown(seasons)} has no multiplier equal to 1 (the largest is 1)")


MAILING_CHECK_SHARES = ("base_rate_accuracy", "rule_accuracy", "explained_share")
MAILING_CHECK_PREDICTORS = ("recency", "frequency", "quarter_of_year")


def _check_mailing_check(check: _Check, figures: dict) -> None:
    """The optional ``mailing_check`` table (model files before it have none): counts, and shares from 0 to 1."""
    for name in ("customer_quarters", "unmailed_quarters"):
        value = figures.get(name)
        if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value <= 10**15:
            check.fail(f"mailing_check.{name}", f"= {_shown(value)} is not a whole number from 0 to 1e15")
    if figures["unmailed_quarters"] > figures["customer_quarters"]:
        check.fail("mailing_check.unmailed_quarters", "is more than mailing_check.customer_quarters")
    for name in MAILING_CHECK_SHARES:
        check.number(figures, name, 0.0, 1.0, "mailing_check.", optional=name == "explained_share")
    shares = figures.get("explained_share_by_predictor", {})
    if not isinstance(shares, dict):
        check.fail("mailing_check.explained_share_by_predictor", "is not a table of shares")
    for name in MAILING_CHECK_PREDICTORS:
        check.number(shares, name, 0.0, 1.0, "mailing_check.explained_share_by_predictor.", optional=True)


def _shown(value) -> str:
    text = json.dumps(value) if not isinstance(value, float) or math.isfinite(value) else str(value)
    return text if len(text) <= 40 else text[:37] + "..."


def read_model_file(path: str | Path) -> tuple[dict, str]:
    """The model file's data, checked, and its name for messages; a damaged or foreign file is an InputError."""
    path = require_file(path, f"write a model with 'lapsewise fit ... --out {path}'", "a model file")
    source = str(path)
    if path.stat().st_size > MAX_FILE_BYTES:
        raise InputError(f"{source}: is {path.stat().st_size:,} bytes, far more than a model file holds; check the path")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{source}: is not a lapsewise model file (not JSON: {exc}); write one with 'lapsewise fit'") from None
    except RecursionError:
        raise InputError(f"{source}: is nested too deeply to be a lapsewise model file; write one with 'lapsewise fit'") from None
    if not isinstance(data, dict) or data.get("format") != MODEL_FORMAT:
        raise InputError(f"{source}: is not a lapsewise model file (no \"format\": \"{MODEL_FORMAT}\"); write one with 'lapsewise fit'")
    check = _Check(source)
    version = data.get("version")
    if version != MODEL_VERSION:
        raise InputError(
            f"{source}: is a lapsewise model file of version {_shown(version)}, and this lapsewise reads version {MODEL_VERSION}; "
            "fit the model again with this lapsewise"
        )
    churn = check.table(data, "churn")
    for name in ("alpha", "beta", "gamma", "delta"):
        check.number(churn, name, *CHURN_RANGE, "churn.")
    check.number(churn, "rho", 0.0, 1.0, "churn.", optional=True)
    check.errors(churn, "churn.")
    check.seasons(churn)
    check.covariance(churn, "churn.", CHURN_NAMES)
    spend = data.get("spend")
    if spend is not None:
        spend = check.table(data, "spend")
        for name, (low, high) in SPEND_RANGE.items():
            check.number(spend, name, low, high, "spend.", optional=name == "q")
        check.errors(spend, "spend.")
        check.covariance(spend, "spend.", SPEND_NAMES)
        check.number(spend, "frequency_value_correlation", -1.0, 1.0, "spend.", optional=True)
        check.number(spend, "log_likelihood", -math.inf, math.inf, "spend.", optional=True)
        check.integer(spend, "customers", 0, 10**12)
    check.integer(data, "end_quarter", 0, 12 * 10_000 // 3)
    check.integer(data, "fiscal_year_start", 1, 12)
    check.integer(data, "customers", 0, 10**12)
    try:
        dt.date.fromisoformat(str(data.get("as_of")))
    except ValueError:
        check.fail("as_of", f"= {_shown(data.get('as_of'))} is not a date (YYYY-MM-DD)")
    if not isinstance(data.get("rho_estimable", True), bool):
        check.fail("rho_estimable", f"= {_shown(data.get('rho_estimable'))} is not true or false")
    if data.get("mailing_check") is not None:
        _check_mailing_check(check, check.table(data, "mailing_check"))
    if not isinstance(data.get("warnings", []), list) or not all(isinstance(w, str) for w in data.get("warnings", [])):
        check.fail("warnings", "is not a list of texts")
    return data, source
