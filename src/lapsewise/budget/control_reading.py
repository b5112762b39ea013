"""Reading a control cell after its quarter: rho from the held customers alone, beside the model's.

The cell (:mod:`lapsewise.budget.control_cell`) was drawn at the start of the
panel's as-of quarter from the customers the policy would mail, stratified by
segment, and held. In that quarter the held customers' order rate is rho times
that of comparable mailed customers. The comparison group of a segment is the
customers mailed in that quarter, not in the cell, whose state when the cell
was drawn (repeat purchases x and silent quarters, counted up to the quarter
before) is one that a held customer of the segment had. Matching on those
states, which is what the policy's segments are bands of, needs no policy at
fit time, leaves out mailed customers of states the cell never reached (long
lapsed customers mailed outside the policy, say), and splits a segment no finer
than the cell does.

The estimate combines the segments with the cell's weights ``w_s = n_s / n``
(``n_s`` held customers of segment s who were really held):

    rho_cell = U / M,   U = sum_s w_s u_s = cell orders / cell size,   M = sum_s w_s m_s,

with ``u_s`` and ``m_s`` the held and mailed order rates of segment s: the
cell's rate over the mailed rate of a group with the cell's segment mix (a
combined ratio estimate, which stays finite when a small segment's cell has no
order). Its standard error is the delta method's,

    Var(rho_cell) ~= Var(U) / M^2 + U^2 Var(M) / M^4,
    Var(U) = sum_s w_s^2 r_s (1 - r_s) / n_s with r_s = rho_cell m_s,   Var(M) = sum_s w_s^2 m_s (1 - m_s) / M_s,

where the held rate of each segment is taken as rho_cell times its mailed rate
(the model's own assumption, a common rho), which keeps the variance of a
segment whose few held customers happened not to order from reading as 0.
With one segment and ``n_m`` mailed customers this is the variance the cell
was sized with.

Held customers who were mailed anyway in the quarter (a list error) are counted
and left out, as are those who became customers only in that quarter and those
of a segment with no mailed comparison.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.budget.control_cell import Z_95
from lapsewise.data.panel import Panel, truncate
from lapsewise.data.summary import summarize
from lapsewise.data.suppression import refuse_if_none_match
from lapsewise.errors import InputError
from lapsewise.files.inputs import CELL_SEGMENT_COLUMN, ID_COLUMN, Loaded


def ratio_estimate(cell_size, cell_orders, mailed_count, mailed_orders) -> tuple[np.ndarray, np.ndarray]:
    """rho_cell and its standard error from counts per segment (last axis), as in the module docstring.

    Vectorised over any leading axes (repetitions of a simulation, say). Segments with no held or no
    mailed customer carry no weight.
    """
    cell_size, cell_orders, mailed_count, mailed_orders = (np.asarray(a, dtype=np.float64) for a in (cell_size, cell_orders, mailed_count, mailed_orders))
    usable = (cell_size > 0) & (mailed_count > 0)
    held = np.where(usable, cell_size, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        weight = held / held.sum(axis=-1, keepdims=True)
        mailed_rate = np.where(usable, mailed_orders / mailed_count, 0.0)
        held_rate_total = np.where(usable, cell_orders, 0.0).sum(axis=-1) / held.sum(axis=-1)
        comparison = (weight * mailed_rate).sum(axis=-1)
        rho = held_rate_total / comparison
        held_rate = np.clip(rho[..., None] * mailed_rate, 0.0, 1.0)
        variance_held = np.where(usable, weight**2 * held_rate * (1 - held_rate) / held, 0.0).sum(axis=-1)
        variance_mailed = np.where(usable, weight**2 * mailed_rate * (1 - mailed_rate) / mailed_count, 0.0).sum(axis=-1)
        variance = variance_held / comparison**2 + held_rate_total**2 * variance_mailed / comparison**4
    return rho, np.sqrt(variance)


@dataclass(frozen=True)
class CellCounts:
    """The cell against the quarter's orders and mailings, per segment of the cell file (sorted names).

    ``listed`` ids in the file, ``matched`` of them customers here; ``mailed_anyway`` held customers mailed in
    the quarter, ``joined`` who first ordered in it (not customers when the cell was drawn), ``without_comparison``
    held customers of a segment with no mailed customer of their states; all these are left out.
    """

    segments: tuple[str, ...]
    cell_size: np.ndarray
    cell_orders: np.ndarray
    mailed_count: np.ndarray
    mailed_orders: np.ndarray
    listed: int
    matched: int
    mailed_anyway: int
    joined: int
    without_comparison: int


def cell_counts(panel: Panel, cell: Loaded, orders_name: str = "the orders") -> CellCounts:
    """Count held and mailed customers and their orders in the panel's as-of quarter, per segment of the cell."""
    if not panel.mailing_history:
        raise InputError(f"{cell.name}: reading a control cell needs the quarter's mailings (--mailings), to tell the held customers from the mailed")
    ids = cell.frame[ID_COLUMN].to_numpy()
    position = pd.Index(ids).get_indexer(panel.customer_ids)
    in_cell = position >= 0
    matched = int(in_cell.sum())
    refuse_if_none_match(cell.name, ids, matched, panel, orders_name, "give the cell file that 'lapsewise control-cell' wrote for this base")
    if not len(ids):
        raise InputError(f"{cell.name}: the cell file lists no customer; give the file that 'lapsewise control-cell' wrote")
    rows = np.arange(panel.customers)
    n = panel.n
    present = n >= 1  # a customer when the cell was drawn, at the start of the as-of quarter
    ordered = panel.purchased[rows, n].astype(bool) & present
    # Sent a piece in the quarter, whenever it arrived: the randomised comparison is of sending against holding
    # (a piece that came after an order is not counted as mailed by the model, but the customer was not held).
    mailed = panel.sent_in(n) & present
    state = _state_before(panel, present)
    held = in_cell & present & ~mailed
    label_codes, names = pd.factorize(pd.Series(cell.frame[CELL_SEGMENT_COLUMN].to_numpy()), sort=True)
    segment = np.full(panel.customers, -1, dtype=np.int64)
    segment[in_cell] = label_codes[position[in_cell]]
    # Which states each segment's held customers had; a mailed customer of such a state counts in that segment.
    state_codes, state_keys = pd.factorize(state, sort=True)
    segment_state = np.zeros((len(names), len(state_keys)), dtype=np.int64)
    segment_state[segment[held], state_codes[held]] = 1
    comparison = mailed & ~in_cell
    mailed_count = segment_state @ np.bincount(state_codes[comparison], minlength=len(state_keys))
    mailed_orders = segment_state @ np.bincount(state_codes[comparison & ordered], minlength=len(state_keys))
    cell_size = np.bincount(segment[held], minlength=len(names))
    cell_orders = np.bincount(segment[held & ordered], minlength=len(names))
    without = int(cell_size[mailed_count == 0].sum())
    return CellCounts(
        segments=tuple(str(name) for name in names),
        cell_size=cell_size,
        cell_orders=cell_orders,
        mailed_count=mailed_count,
        mailed_orders=mailed_orders,
        listed=len(ids),
        matched=matched,
        mailed_anyway=int((in_cell & present & mailed).sum()),
        joined=int((in_cell & ~present).sum()),
        without_comparison=without,
    )


def _state_before(panel: Panel, present: np.ndarray) -> np.ndarray:
    """Each customer's (repeat purchases, silent quarters) when the cell was drawn, the segments' measures at the end
    of the quarter before the as-of quarter, as one integer (-1 for a customer who joined in the as-of quarter)."""
    state = np.full(panel.customers, -1, dtype=np.int64)
    if present.any():
        summary = summarize(truncate(panel, panel.end_quarter - 1))
        state[present] = summary.x * (int(summary.silent_quarters.max()) + 1) + summary.silent_quarters
    return state


@dataclass(frozen=True)
class ControlReading:
    """rho from the cell beside the model's, and whether they disagree beyond their errors (95%)."""

    rho_cell: float
    rho_cell_se: float
    rho_model: float | None
    rho_model_se: float | None
    counts: CellCounts

    @property
    def customers(self) -> int:
        """Held customers the estimate rests on."""
        return int(self.counts.cell_size[self.counts.mailed_count > 0].sum())

    @property
    def disagree(self) -> bool:
        """The two estimates differ by more than 1.96 standard errors of their difference (taken as independent)."""
        if self.rho_model is None or not np.isfinite(self.rho_cell):
            return False
        spread = np.hypot(self.rho_cell_se, self.rho_model_se or 0.0)
        return bool(abs(self.rho_cell - self.rho_model) > Z_95 * spread)

    def to_dict(self) -> dict:
        return {
            "rho_cell": round(self.rho_cell, 6),
            "rho_cell_se": round(self.rho_cell_se, 6),
            "rho_model": None if self.rho_model is None else round(self.rho_model, 6),
            "rho_model_se": None if self.rho_model_se is None else round(self.rho_model_se, 6),
            "customers": self.customers,
            "disagree": self.disagree,
        }


def read_control_cell(counts: CellCounts, rho_model: float | None, rho_model_se: float | None) -> ControlReading:
    """The estimate from the counts, beside the model's rho; refused when no held customer can be compared."""
    usable = (counts.cell_size > 0) & (counts.mailed_count > 0)
    if not usable.any():
        raise InputError(
            "the control cell cannot be read: none of its customers was both held in the as-of quarter and matched by a mailed "
            f"customer of the same state ({counts.mailed_anyway:,} were mailed anyway, {counts.joined:,} joined in that quarter); "
            "fit with --as-of at the end of the quarter the cell was held in"
        )
    rho, se = ratio_estimate(counts.cell_size, counts.cell_orders, counts.mailed_count, counts.mailed_orders)
    if not np.isfinite(rho):
        raise InputError(
            "the control cell cannot be read: the mailed customers of the cell's states placed no order in the as-of quarter, "
            "so there is no rate to compare the held customers with; check that the fit's as-of quarter is the one the cell was held in"
        )
    return ControlReading(float(rho), float(se), rho_model, rho_model_se, counts)
