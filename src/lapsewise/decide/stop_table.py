"""The stop table: for every (x, t_x), the silent quarter at which mailing stops paying, beside the breakeven rule's.

A customer with x repeat purchases, the last in quarter t_x, who has been
mailed for k silent quarters since is in program state ``(n, x, b) =
(t_x + k, x, 0)`` with the posterior's chance of being alive. The table solves
the program once per spend band and reads off, for each (x, t_x), the first k
at which holding beats mailing.

When the quarters differ (seasons in the model, seasonal costs in the policy) or
the policy offers versions of the piece, the calendar program
(:mod:`lapsewise.decide.calendar`) plans instead, and each row follows its plan
through the silent quarters: ``actions`` names the choice for k = 0, 1, 2, ...
(a version, or "hold"), ``stop_after`` is the number of silent quarters after
which no further piece is planned, and with seasons there is a row per quarter
of the year of the last order (``last_purchase_season``, 1-4).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from lapsewise.data.histories import mailed_silent_histories
from lapsewise.decide import calendar as cal
from lapsewise.decide.decisions import Decisions, decide
from lapsewise.decide.order_values import SpendBand, spend_bands
from lapsewise.decide.program import chances, decision_process, planning_process, seasons_supported, solve_with
from lapsewise.files.policy_file import Economics, Version
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
    calendar: bool = False
    seasonal: bool = False
    blind: "StopTable | None" = None
    """With the calendar program: the single-piece, season-blind table, for the comparison the output reads off."""
    choices: tuple[str, ...] = ("hold", "piece")
    """The names ``actions`` use: holding, then the versions of the piece (the first is the standard one)."""

    @property
    def stop_points(self) -> np.ndarray:
        return self.rows["stop_after"].to_numpy()

    def in_season(self, season: int) -> "StopTable":
        """The rows and cells of customers whose last order fell in this quarter of the year (1-4); the whole
        table when it has no seasons. Each (band, x, t_x) then appears once, as in a season-blind table."""
        if not self.seasonal:
            return self
        return dataclasses.replace(
            self, rows=self.rows[self.rows["last_purchase_season"] == season].reset_index(drop=True),
            cells=self.cells[self.cells["last_purchase_season"] == season].reset_index(drop=True),
        )


def all_states(horizon: int) -> tuple[np.ndarray, np.ndarray]:
    """Every (x, t_x) with t_x up to the horizon: (0, 0) and 1 <= x <= t_x <= horizon."""
    pairs = [(0, 0)] + [(x, t) for t in range(1, horizon + 1) for x in range(1, t + 1)]
    pairs.sort()
    x, t = np.array(pairs).T
    return x, t


def build_stop_table(
    churn: ChurnFit, spend: SpendFit | None, economics: Economics, band_count: int = 3, each: Callable = map, rho_estimable: bool = True, policy_source: str = "the policy",
    versions: tuple[Version, ...] | None = None, calendar: bool | None = None, seasonal_rows: bool | None = None,
) -> StopTable:
    """Solve the program for each spend band and read off the stop point of every (x, t_x).

    ``each`` maps a function over the bands (the pipeline passes one that runs two at a time);
    ``rho_estimable`` and ``policy_source`` are :func:`~lapsewise.decide.program.decision_process`'s.
    With ``versions`` (the policy's) the calendar program plans when it is needed
    (:func:`~lapsewise.decide.calendar.needs_calendar`; ``calendar`` forces the choice), beside the single-piece,
    season-blind table it is read against; ``seasonal_rows`` forces a row per quarter of the year of the last
    order, or none (the tables of parameter draws take the estimates' layout).
    """
    blind = _single_piece_table(churn, spend, economics, band_count, each, rho_estimable, policy_source)
    planning = planning_process(churn, economics.unmailed_response, rho_estimable=rho_estimable, policy_source=policy_source)
    if not seasons_supported(churn):
        planning = planning.without_seasons()
    if calendar is None:
        calendar = versions is not None and cal.needs_calendar(planning, economics, versions)
    if not calendar:
        return blind
    return _calendar_table(planning, blind, versions, each, seasonal_rows)


def _single_piece_table(churn, spend, economics, band_count, each, rho_estimable, policy_source) -> StopTable:
    """The single-piece program's table: every quarter alike, the standard piece (``piece_cost``) or holding."""
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
                    "actions": [tuple(PIECE if m else HOLD for m in line) for line in mail],
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


PIECE = "piece"
"""The single-piece table's name for mailing the standard piece in ``actions``."""
HOLD = "hold"


def _calendar_table(process: Process, blind: StopTable, versions: tuple[Version, ...], each: Callable, seasonal_rows: bool | None = None) -> StopTable:
    """The calendar program's table: per band, each (x, t_x) (and quarter of the year of the last order, with
    seasons) followed through its silent quarters by the plan the program makes there."""
    economics, horizon = blind.economics, blind.economics.horizon_quarters
    x_rows, t_rows = all_states(horizon)
    first = cal.calendar_for(process, economics, versions, blind.bands[0].order_value)
    seasonal = first.seasonal if seasonal_rows is None else seasonal_rows
    seasons = (0, 1, 2, 3) if seasonal else (0,)
    x = np.tile(x_rows, len(seasons))
    t_x = np.tile(t_rows, len(seasons))
    last = np.repeat(np.asarray(seasons), len(x_rows))  # quarter of the year (0-3) of the last order
    steps = horizon + 1

    def band_plan(band: SpendBand) -> tuple[cal.CalendarProgram, cal.SilentPlan]:
        calendar = cal.calendar_for(process, economics, versions, band.order_value)
        layers = horizon + 3 if calendar.seasonal else horizon
        keep = tuple(range(horizon - 1, layers)) if calendar.seasonal else (horizon - 1,)
        program = cal.solve_calendar(process, calendar, economics.discount, layers, layers, n_max=2 * horizon, b_max=horizon, x_max=horizon, keep=keep)
        # Before the last order: t_x - x silent quarters, all mailed with the full piece, then the x orders.
        first_quarter = (last - t_x) % 4
        silent = [[calendar.seasons[(f + i) % 4] for i in range(1, t - xx + 1)] for f, t, xx in zip(first_quarter, t_x, x)]
        belief = cal.Belief.from_history(program, t_x, x, silent, width=horizon + steps + 1)
        return program, cal.plan_along_silence(program, belief, (last + 1) % 4, horizon, steps)

    names = (HOLD,) + tuple(v.name for v in versions)
    row_frames, cell_frames = [], []
    for band, (program, plan) in zip(blind.bands, each(band_plan, blind.bands)):
        mail = plan.chosen > 0
        best_piece = plan.values[:, :, 1:].max(axis=2)
        quarter = (last[:, None] + 1 + np.arange(steps)[None, :]) % 4
        margins, costs = np.asarray(program.calendar.margins)[quarter], np.asarray(program.calendar.versions[0].piece_cost)[quarter]
        breakeven = plan.p_buy * margins >= costs
        row_frames.append(
            pd.DataFrame(
                {
                    "spend_band": band.label,
                    "order_value": band.order_value,
                    "frequency": x,
                    "last_purchase_quarter": t_x,
                    "last_purchase_season": last + 1 if seasonal else 0,
                    "stop_after": _after_last(mail),
                    "breakeven_stop_after": _first_false(breakeven),
                    "actions": [tuple(names[c] for c in line) for line in plan.chosen],
                }
            )
        )
        cell_frames.append(
            pd.DataFrame(
                {
                    "spend_band": band.label,
                    "frequency": np.repeat(x, steps),
                    "last_purchase_quarter": np.repeat(t_x, steps),
                    "last_purchase_season": np.repeat(last + 1 if seasonal else np.zeros_like(last), steps),
                    "silent_quarters": np.tile(np.arange(steps), len(x)),
                    "p_alive": plan.alive.ravel(),
                    "p_buy": plan.p_buy.ravel(),
                    "mail": mail.ravel(),
                    "value_of_mailing": (best_piece - plan.values[:, :, 0]).ravel(),
                    "action": np.asarray(names, dtype=object)[plan.chosen.ravel()],
                }
            )
        )
    return dataclasses.replace(
        blind, process=process, rows=pd.concat(row_frames, ignore_index=True), cells=pd.concat(cell_frames, ignore_index=True),
        calendar=True, seasonal=seasonal, blind=blind, choices=names,
    )


def _after_last(flags: np.ndarray) -> np.ndarray:
    """Per row, the index after the last True (0 when none; -1 when the last entry is True: mailed throughout)."""
    reversed_first = flags[:, ::-1].argmax(axis=1)
    after = flags.shape[1] - reversed_first
    return np.where(~flags.any(axis=1), 0, np.where(flags[:, -1], -1, after))


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


@dataclass(frozen=True)
class CalendarChanges:
    """What the calendar and the versions changed in one band, against the single-piece, season-blind table:
    of ``plans`` rows, how many stop ``later`` and ``earlier`` (and by how many quarters on average), how many
    ``step_down`` to another version before they stop, and how many ``hold_between`` (hold, then mail again)."""

    band: str
    plans: int
    later: int
    earlier: int
    mean_shift: float
    step_down: int
    hold_between: int


def calendar_changes(table: StopTable) -> list[CalendarChanges]:
    """Per band, :class:`CalendarChanges` of a calendar table against its season-blind single-piece table."""
    if not table.calendar or table.blind is None:
        return []
    horizon = table.economics.horizon_quarters
    blind = table.blind.rows.set_index(["spend_band", "frequency", "last_purchase_quarter"])["stop_after"]
    out = []
    for band in table.bands:
        rows = table.rows[table.rows["spend_band"] == band.label]
        mine = rows["stop_after"].to_numpy()
        theirs = blind.loc[[(band.label, x, t) for x, t in zip(rows["frequency"], rows["last_purchase_quarter"])]].to_numpy()
        mine_end, theirs_end = np.where(mine < 0, horizon + 1, mine), np.where(theirs < 0, horizon + 1, theirs)
        standard = table.choices[1]
        step_down = hold_between = 0
        for actions, stop in zip(rows["actions"], mine_end):
            planned = actions[: min(stop, len(actions))]
            step_down += any(a not in (HOLD, standard) for a in planned)
            hold_between += HOLD in planned
        moved = mine_end != theirs_end
        out.append(
            CalendarChanges(
                band.label, len(rows), int((mine_end > theirs_end).sum()), int((mine_end < theirs_end).sum()),
                float(np.mean(mine_end[moved] - theirs_end[moved])) if moved.any() else 0.0, int(step_down), int(hold_between),
            )
        )
    return out
