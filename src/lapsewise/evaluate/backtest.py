"""Backtest: fit on a calibration period, predict the holdout quarters given the mailings actually made.

The model is fitted on the panel as it stood ``holdout_quarters`` before the
as-of quarter and is not refitted. For every customer known then, each holdout
quarter is predicted from everything seen before it (the calibration history
and the earlier holdout quarters) and from whether the customer was actually
mailed in it: the model's chance of a purchase, times rho when unmailed. The
sum over quarters is the expected number of repeat purchases, compared with
what the customers actually did.

Why quarter by quarter: a firm's mailings react to purchases (a lapse rule
mails a customer again after an order). A forecast made once at the end of
calibration that took the later mailings as given would ignore that a mailing
in the holdout often means a purchase just before it, and would under-predict.
Conditioning each quarter on what came before is exact under the model
whatever rule the firm followed, as long as the rule used only what the firm
could see.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.data.histories import compress_arrays, history_arrays
from lapsewise.data.panel import Panel, select, truncate
from lapsewise.data.quarters import quarter_label
from lapsewise.data.summary import DEFAULT_FREQUENCY_BANDS, band_labels, band_of, summarize
from lapsewise.errors import InputError
from lapsewise.model.fitted import Model, fit_model
from lapsewise.model.scores import check_unmailed_quarters
from lapsewise.model.posterior import posterior
from lapsewise.model.process import Process


@dataclass(frozen=True)
class Backtest:
    """Actual against predicted repeat purchases over the holdout quarters.

    Attributes
    ----------
    holdout_quarters : int
    calibration_as_of : str
        Last day of the calibration period.
    model : Model
        The model fitted on the calibration period.
    customers : int
        Customers known at the end of the calibration period.
    actual, predicted : float
        Repeat purchases in the holdout quarters, summed over those customers.
    by_frequency : DataFrame
        Per calibration frequency band: customers, actual_mean, predicted_mean.
    by_quarter : DataFrame
        Per holdout quarter: quarter, mailed (share of customers mailed), actual, predicted.
    """

    holdout_quarters: int
    calibration_as_of: str
    model: Model
    customers: int
    actual: float
    predicted: float
    by_frequency: pd.DataFrame
    by_quarter: pd.DataFrame

    @property
    def relative_difference(self) -> float:
        """(predicted - actual) / actual; NaN when nothing was bought."""
        return (self.predicted - self.actual) / self.actual if self.actual else float("nan")

    def to_dict(self) -> dict:
        return {
            "holdout_quarters": self.holdout_quarters,
            "calibration_as_of": self.calibration_as_of,
            "customers": self.customers,
            "actual_repeat_purchases": int(self.actual),
            "predicted_repeat_purchases": round(float(self.predicted), 4),
            "churn": {k: v for k, v in self.model.to_dict()["churn"].items()},
            "by_frequency": [
                {
                    "frequency": r.frequency,
                    "customers": int(r.customers),
                    "actual_mean": round(float(r.actual_mean), 6),
                    "predicted_mean": round(float(r.predicted_mean), 6),
                }
                for r in self.by_frequency.itertuples()
            ],
            "by_quarter": [
                {
                    "quarter": r.quarter,
                    "quarter_of_year": int(r.quarter_of_year),
                    "mailed_share": round(float(r.mailed_share), 6),
                    "actual": int(r.actual),
                    "predicted": round(float(r.predicted), 4),
                }
                for r in self.by_quarter.itertuples()
            ],
        }


def holdout_predictions(process: Process, panel: Panel, calibration_end: int, holdout_quarters: int) -> np.ndarray:
    """Chance of a purchase in each holdout quarter (columns) for each customer of ``panel`` (rows).

    Quarter ``calibration_end + h`` is predicted from the history up to the quarter
    before it and from whether it was mailed. Every customer must be known by
    ``calibration_end``. The history up to a quarter is the panel's rows read up to
    it: the statistics count only quarters 1..n, so no truncated copy is made.
    """
    predicted = np.zeros((panel.customers, holdout_quarters))
    for h in range(holdout_quarters):
        phase = panel.first_quarter % 4 if process.seasonal else None
        histories = compress_arrays(history_arrays(panel.purchased, panel.mailed, calibration_end + h - panel.first_quarter, phase))
        p_buy = posterior(process, histories).p_buy[histories.inverse]
        column = calibration_end + h + 1 - panel.first_quarter
        mailed = panel.mailed[np.arange(panel.customers), column].astype(bool)
        predicted[:, h] = p_buy * np.where(mailed, 1.0, process.unmailed_response)
    return predicted


def run_backtest(panel: Panel, holdout_quarters: int, seasons: bool = True) -> Backtest:
    """Fit on all but the last ``holdout_quarters`` quarters (with or without ``seasons``) and predict them."""
    if holdout_quarters < 1:
        raise InputError(f"--holdout-quarters {holdout_quarters}: give at least 1")
    calibration_end = panel.end_quarter - holdout_quarters
    earliest = int(panel.first_quarter.min())
    if calibration_end < earliest + 2:
        raise InputError(
            f"--holdout-quarters {holdout_quarters}: leaves fewer than 2 calibration quarters "
            f"(the data cover {panel.end_quarter - earliest + 1} quarters); choose a smaller number"
        )
    calibration = truncate(panel, calibration_end)
    model = fit_model(calibration, seasons=seasons)
    check_unmailed_quarters(model, panel, f"--holdout-quarters {holdout_quarters}")
    known = select(panel, panel.first_quarter <= calibration_end)
    columns = (calibration_end - known.first_quarter)[:, None] + 1 + np.arange(holdout_quarters)[None, :]
    purchased = np.take_along_axis(known.purchased, columns, axis=1).astype(bool)
    mailed = np.take_along_axis(known.mailed, columns, axis=1).astype(bool)
    predicted = holdout_predictions(model.churn.process, known, calibration_end, holdout_quarters)

    summary = summarize(calibration)
    band = band_of(summary.x, DEFAULT_FREQUENCY_BANDS)
    frame = pd.DataFrame({"band": band, "actual": purchased.sum(axis=1), "predicted": predicted.sum(axis=1)})
    grouped = frame.groupby("band").agg(customers=("actual", "size"), actual_mean=("actual", "mean"), predicted_mean=("predicted", "mean"))
    grouped.insert(0, "frequency", np.asarray(band_labels(DEFAULT_FREQUENCY_BANDS))[grouped.index])
    by_quarter = pd.DataFrame(
        {
            "quarter": [quarter_label(calibration_end + h + 1, panel.fiscal_year_start) for h in range(holdout_quarters)],
            "quarter_of_year": [(calibration_end + h + 1) % 4 + 1 for h in range(holdout_quarters)],
            "mailed_share": mailed.mean(axis=0),
            "actual": purchased.sum(axis=0),
            "predicted": predicted.sum(axis=0),
        }
    )
    return Backtest(
        holdout_quarters=holdout_quarters,
        calibration_as_of=model.as_of,
        model=model,
        customers=known.customers,
        actual=float(purchased.sum()),
        predicted=float(predicted.sum()),
        by_frequency=grouped.reset_index(drop=True),
        by_quarter=by_quarter,
    )
