"""The stop table: for every (x, t_x), the silent quarter at which mailing stops paying, beside the breakeven rule's.

A customer with x repeat purchases, the last in quarter t_x, who has been
mailed for k silent quarters since is in program state ``(n, x, b) =
(t_x + k, x, 0)`` with the posterior's chance of being alive. The table solves
the program once per spend band and reads off, for each (x, t_x), the first k
at which holding beats mailing.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from lapsewise.data.histories import mailed_silent_histories
from lapsewise.decide.decisions import Decisions, decide
from lapsewise.decide.order_values import SpendBand, spend_bands
from lapsewise.decide.program import chances, decision_process, solve_with
from lapsewise.files.policy_file import Economics
from lapsewise.model.churn import ChurnFit
from lapsewise.model.posterior import posterior
from lapsewise.model.process import Process
from lapsewise.model.spend import SpendFit
from lapsewise.model.uncertainty import RANGE


@dataclass(frozen=True)
class StopTable:
    """When to stop mailing, for every (x, t_x) with t_x up to the horizon, per spend band.

    ``rows`` is a DataFrame with columns spend_band, order_value, frequency (x),
    last_purchase_quarter (t_x), stop_after (silent quarters at which the customer is
    first not mailed; -1 when mailed throughout), breakeven_stop_after (the same for the
    one-period breakeven rule), and ``cells`` a DataFrame with spend_band, frequency,
    last_purchase_quarter, silent_quarters, p_alive, p_buy, mail, value_of_mailing for
    every state up to ``horizon`` silent quarters.
    """

    economics: Economics
    process: Process
    bands: tuple[SpendBand, ...]
    rows: pd.DataFrame
    cells: pd.DataFrame
    draws: int = 0
    sensitivity: pd.DataFrame | None = None
    notes: tuple[str, ...] = ()

    @property
    def stop_points(self) -> np.ndarray:
        return self.rows["stop_after"].to_numpy()


def all_states(horizon: int) -> tuple[np.ndarray, np.ndarray]:
    """Every (x, t_x) with t_x up to the horizon: (0, 0) and 1 <= x <= t_x <= horizon."""
    pairs = [(0, 0)] + [(x, t) for t in range(1, horizon + 1) for x in range(1, t + 1)]
    pairs.sort()
    x, t = np.array(pairs).T
    return x, t


def build_stop_table(
    churn: ChurnFit, spend: SpendFit | None, economics: Economics, band_count: int = 3, each: Callable = map, rho_estimable: bool = True, policy_source: str = "the policy"
) -> StopTable:
    """Solve the program for each spend band and read off the stop point of every (x, t_x).

    ``each`` maps a function over the bands (the pipeline passes one that runs two at a time);
    ``rho_estimable`` and ``policy_source`` are :func:`~lapsewise.decide.program.decision_process`'s.
    """
    process = decision_process(churn, economics.unmailed_response, rho_estimable=rho_estimable, policy_source=policy_source)
    horizon = economics.horizon_quarters
    bands = spend_bands(spend, economics, band_count)
    x_rows, t_rows = all_states(horizon)
    silent = np.arange(horizon + 1)
    x = np.repeat(x_rows, len(silent))
    t_x = np.repeat(t_rows, len(silent))
    k = np.tile(silent, len(x_rows))
    histories = mailed_silent_histories(x, t_x, k)
    post = posterior(process, histories)
    alive, p_buy = post.alive_now[histories.inverse], post.p_buy[histories.inverse]

    # The bands' programs share the tables that do not depend on the margin.
    shared = chances(process, economics.piece_cost, economics.discount, horizon, n_max=2 * horizon, b_max=0, n_min=0, x_max=horizon)

    def band_decisions(band: SpendBand) -> Decisions:
        program = solve_with(shared, economics.margin(band.order_value))
        return decide(program, t_x + k, x, np.zeros_like(x), alive)

    row_frames, cell_frames = [], []
    for band, decisions in zip(bands, each(band_decisions, bands)):
        margin = economics.margin(band.order_value)
        mail = decisions.mail.reshape(len(x_rows), len(silent))
        breakeven = (p_buy * margin >= economics.piece_cost).reshape(len(x_rows), len(silent))
        row_frames.append(
            pd.DataFrame(
                {
                    "spend_band": band.label,
                    "order_value": band.order_value,
                    "frequency": x_rows,
                    "last_purchase_quarter": t_rows,
                    "stop_after": _first_false(mail),
                    "breakeven_stop_after": _first_false(breakeven),
                }
            )
        )
        cell_frames.append(
            pd.DataFrame(
                {
                    "spend_band": band.label,
                    "frequency": x,
                    "last_purchase_quarter": t_x,
                    "silent_quarters": k,
                    "p_alive": alive,
                    "p_buy": p_buy,
                    "mail": decisions.mail,
                    "value_of_mailing": decisions.value_of_mailing,
                }
            )
        )
    return StopTable(economics, process, bands, pd.concat(row_frames, ignore_index=True), pd.concat(cell_frames, ignore_index=True))


def _first_false(flags: np.ndarray) -> np.ndarray:
    """Per row, the index of the first False (-1 when every entry is True)."""
    stopped = ~flags
    return np.where(stopped.any(axis=1), stopped.argmax(axis=1), -1)


def with_ranges(point: StopTable, drawn: list[StopTable], notes: tuple[str, ...] = ()) -> StopTable:
    """The stop table at the estimates with, per row, the 5th-95th percentile range of the stop point over the
    draws (``stop_after_low``, ``stop_after_high``) and the share of draws whose stop point equals the estimate's
    (``agreement``); ``notes`` say how the draws were made (:meth:`lapsewise.model.uncertainty.Draws.notes`).

    A stop point of -1 (mailed throughout the horizon) counts as later than any other. The percentiles are taken
    outward (the draw at or below the 5th, at or above the 95th), so the range holds at least 90% of the draws.
    """
    if not drawn:
        return point
    horizon = point.economics.horizon_quarters
    rows = point.rows.copy()
    points = np.stack([table.stop_points for table in drawn])
    later = np.where(points < 0, horizon + 1, points)
    low = np.quantile(later, RANGE[0], axis=0, method="lower")
    high = np.quantile(later, RANGE[1], axis=0, method="higher")
    rows["stop_after_low"] = np.where(low > horizon, -1, low).astype(np.int64)
    rows["stop_after_high"] = np.where(high > horizon, -1, high).astype(np.int64)
    rows["agreement"] = (points == point.stop_points[None, :]).mean(axis=0)
    return dataclasses.replace(point, rows=rows, draws=len(drawn), notes=notes)


def with_sensitivity(point: StopTable, shifted: list[tuple[str, float, StopTable, StopTable]]) -> StopTable:
    """The stop table with, per parameter, how many stop points move when it is two standard errors lower or higher.

    ``shifted`` holds (parameter, standard error, table with it lower, table with it higher).
    """
    rows = [
        {
            "parameter": name,
            "std_error": error,
            "moved_lower": int((lower.stop_points != point.stop_points).sum()),
            "moved_higher": int((higher.stop_points != point.stop_points).sum()),
            "stop_points": len(point.rows),
        }
        for name, error, lower, higher in shifted
    ]
    return dataclasses.replace(point, sensitivity=pd.DataFrame(rows, columns=["parameter", "std_error", "moved_lower", "moved_higher", "stop_points"]))
