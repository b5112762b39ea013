"""The model file: JSON written by ``lapsewise fit``, read back by every later command.

This module knows the file's format (its ``format`` and ``version`` keys) and
checks the parameters once, here at the edge; turning the checked data into a
model is :meth:`lapsewise.model.fitted.Model.from_dict`'s job.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from lapsewise.errors import InputError
from lapsewise.files.tables import require_file

MODEL_FORMAT = "lapsewise-model"
MODEL_VERSION = 1


def read_model_file(path: str | Path) -> tuple[dict, str]:
    """The model file's data and its name for messages; a damaged or foreign file is an InputError."""
    path = require_file(path, f"write a model with 'lapsewise fit ... --out {path}'", "a model file")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{path}: is not a lapsewise model file (not JSON: {exc}); write one with 'lapsewise fit'") from None
    if not isinstance(data, dict) or data.get("format") != MODEL_FORMAT:
        raise InputError(f"{path}: is not a lapsewise model file (no \"format\": \"{MODEL_FORMAT}\"); write one with 'lapsewise fit'")
    churn = data.get("churn")
    if isinstance(churn, dict):
        for name in ("alpha", "beta", "gamma", "delta"):
            value = churn.get(name)
            if isinstance(value, (int, float)) and not isinstance(value, bool) and not (math.isfinite(value) and value > 0):
                raise InputError(f"{path}: churn.{name} = {value} is not a positive number; fit the model again")
        rho = churn.get("rho")
        if isinstance(rho, (int, float)) and not isinstance(rho, bool) and not 0 <= rho <= 1:
            raise InputError(f"{path}: churn.rho = {rho} is outside [0, 1]; fit the model again")
    return data, str(path)
