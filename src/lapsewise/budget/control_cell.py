"""A randomised no-mail control cell: how many of this quarter's mailable customers to hold, and which.

Every value of mailing rests on rho, the share of the purchase probability left
when a customer is not mailed, and rho estimated from the firm's own mailing
(which follows purchases) can be badly biased. Holding a random cell of the
customers the policy would mail, and comparing their order rate with that of the
mailed ones, estimates it without that bias.

The size. Among the ``N`` eligible customers (value of mailing above 0, not
suppressed), hold ``n_u`` and mail ``n_m = N - n_u``. With ``r_m`` the expected
order rate of the eligible if mailed and ``r_u = rho * r_m`` if held, the
estimate ``rho_hat = rate_unmailed / rate_mailed`` has, by the delta method
(the variance of the log of a ratio of two independent proportions),

    Var(rho_hat) ~= rho^2 [ (1 - r_u) / (n_u r_u) + (1 - r_m) / (n_m r_m) ],

and the cell is the smallest ``n_u`` with ``z * sqrt(Var) <= D`` (z the
two-sided 95% normal quantile, D the precision asked for). For ``n_u`` up to
``N / 2`` the variance falls as ``n_u`` grows (the unmailed term dominates since
``r_u < r_m``), so when half the eligible cannot reach ``D`` no cell can that
still mails most customers, and the request is refused with the precision half
would give.

The draw. The cell is stratified by segment with proportional allocation:
segment ``s`` with ``N_s`` eligible customers holds ``n_u * N_s / N`` rounded by
largest remainders (each segment first takes the whole part, then the segments
with the largest fractional parts take one more until the total is ``n_u``; ties
go to the segment whose name sorts first), so the total is exactly ``n_u``.
Within a segment the held customers are a simple random sample: every eligible
customer gets a uniform draw from ``numpy.random.default_rng(seed)`` and each
segment holds its customers with the smallest draws. The same inputs and seed
give the same cell.

References
----------
Katz, D., Baptista, J., Azen, S. P., & Pike, M. C. (1978). Obtaining confidence
intervals for the risk ratio in cohort studies. Biometrics, 34(3), 469-474
(the variance of the log of a ratio of two proportions, from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.budget.segments import categorical
from lapsewise.budget.values import CustomerValues
from lapsewise.errors import InputError

Z_95 = 1.959963984540054
"""The two-sided 95% quantile of the standard normal distribution (scipy.stats.norm.ppf(0.975))."""

DEFAULT_SEED = 1
"""The seed of the cell's draw when none is given."""


def ratio_half_width(rho: float, r_m: float, held: np.ndarray | int, eligible: int) -> np.ndarray:
    """The expected 95% half-width of ``rho_hat`` when ``held`` of ``eligible`` customers are held (delta method).

    Vectorised over ``held``; a cell of 0, or one that leaves nobody mailed, has an infinite half-width.
    """
    held = np.asarray(held, dtype=np.float64)
    mailed = eligible - held
    r_u = rho * r_m
    with np.errstate(divide="ignore", invalid="ignore"):
        variance = rho**2 * ((1 - r_u) / (held * r_u) + (1 - r_m) / (mailed * r_m))
    return np.where((held > 0) & (mailed > 0), Z_95 * np.sqrt(variance), np.inf)


def cell_size(rho: float, r_m: float, eligible: int, precision: float) -> int:
    """The smallest number of customers to hold for a 95% half-width of at most ``precision`` on rho.

    At most half the eligible are held; when even half cannot reach the precision the request is refused
    with the precision half would give.
    """
    check_precision(precision)
    if not 0 < rho <= 1:
        raise InputError(
            f"the rho to plan the cell with is {rho:g}; the sample size needs a planning value above 0 and at most 1 "
            "(set unmailed_response in the policy to a guess, e.g. 0.3)"
        )
    if not 0 < r_m < 1:
        raise InputError(f"the eligible customers' expected order rate if mailed is {r_m:g}; a cell needs a rate above 0 and below 1")
    half = eligible // 2
    if half < 1:
        raise InputError(f"only {eligible:,} customer(s) would be mailed this quarter; a control cell needs at least 2")
    best = float(ratio_half_width(rho, r_m, half, eligible))
    if best > precision:
        raise InputError(
            f"--precision {precision:g}: holding half of the {eligible:,} customers the policy would mail ({half:,}) estimates rho "
            f"only to within +-{best:.3g}; ask for --precision {np.ceil(best * 1000) / 1000:g} or more, or wait for a larger base"
        )
    # The half-width falls as the cell grows up to half the base (module docstring): bisect for the first that reaches it.
    low, high = 0, half  # the half-width at low is above the precision, at high within it
    while high - low > 1:
        middle = (low + high) // 2
        if ratio_half_width(rho, r_m, middle, eligible) <= precision:
            high = middle
        else:
            low = middle
    return high


def check_precision(precision: float) -> None:
    if not (np.isfinite(precision) and 0 < precision < 1):
        raise InputError(f"--precision: {precision:g} is not a half-width for rho; give a number above 0 and below 1, e.g. 0.1")


def proportional_allocation(sizes: np.ndarray, total: int) -> np.ndarray:
    """Split ``total`` across groups of ``sizes`` in proportion, rounded by largest remainders (ties: the first group).

    The parts sum to ``total`` exactly, and none exceeds its group when ``total <= sizes.sum()``.
    """
    sizes = np.asarray(sizes, dtype=np.int64)
    quota = total * sizes / max(int(sizes.sum()), 1)
    parts = np.floor(quota).astype(np.int64)
    short = total - int(parts.sum())
    order = np.argsort(-(quota - parts), kind="stable")
    parts[order[:short]] += 1
    return parts


def stratified_draw(codes: np.ndarray, parts: np.ndarray, seed: int) -> np.ndarray:
    """Row indices of a stratified random sample: ``parts[g]`` rows of code ``g``, simple random within each code.

    Every row gets one uniform draw and each code keeps its rows with the smallest draws; returned in row order.
    """
    rng = np.random.default_rng(seed)
    draws = rng.random(len(codes))
    order = np.lexsort((draws, codes))
    sorted_codes = codes[order]
    start = np.searchsorted(sorted_codes, np.arange(len(parts)))
    rank = np.arange(len(order)) - start[sorted_codes]
    return np.sort(order[rank < parts[sorted_codes]])


@dataclass(frozen=True)
class ControlCell:
    """A drawn control cell and the figures behind its size.

    Attributes
    ----------
    customer_ids, segment : numpy.ndarray
        The held customers and their segments, in the base's order.
    eligible : int
        Customers the policy would mail this quarter (value of mailing above 0, not suppressed).
    precision_asked, precision : float
        The 95% half-width on rho asked for, and the one the cell's size gives (at most the one asked for).
    rho, rho_source : float, str
        The rho the size is planned with and where it comes from.
    rate_mailed : float
        r_m, the eligible customers' mean chance of an order next quarter if mailed.
    expected_value_forgone : float
        The sum of the held customers' value of mailing (currency units).
    seed : int
    segments : pandas.DataFrame
        Per segment: ``segment``, ``eligible``, ``held``.
    """

    customer_ids: np.ndarray
    segment: np.ndarray
    eligible: int
    precision_asked: float
    precision: float
    rho: float
    rho_source: str
    rate_mailed: float
    expected_value_forgone: float
    seed: int
    segments: pd.DataFrame

    @property
    def customers_in_cell(self) -> int:
        return len(self.customer_ids)

    def rows(self) -> pd.DataFrame:
        """The cell file's rows: ``customer_id, segment``."""
        return pd.DataFrame({"customer_id": self.customer_ids, "segment": categorical(self.segment)})

    def to_dict(self) -> dict:
        return {
            "customers_in_cell": self.customers_in_cell,
            "eligible": self.eligible,
            "precision": round(self.precision, 6),
            "expected_value_forgone": round(self.expected_value_forgone, 4),
            "seed": self.seed,
        }


def eligible_customers(values: CustomerValues) -> np.ndarray:
    """Who the policy would mail this quarter without a budget: a version worth mailing, not suppressed."""
    return (values.values.max(axis=1) > 0) & ~values.suppressed


def draw_control_cell(values: CustomerValues, precision: float, rho: float, rho_source: str, seed: int = DEFAULT_SEED) -> ControlCell:
    """Size the cell for ``precision`` (see the module docstring) and draw it, stratified by segment."""
    check_precision(precision)
    eligible = np.flatnonzero(eligible_customers(values))
    if len(eligible) == 0:
        raise InputError("no customer would be mailed this quarter (no value of mailing above 0 outside the suppression list); there is nothing to hold")
    rate_mailed = float(values.p_buy[eligible].mean())
    held = cell_size(rho, rate_mailed, len(eligible), precision)
    labels = categorical(values.segment[eligible])
    codes = np.asarray(labels.codes, dtype=np.int64)
    sizes = np.bincount(codes, minlength=len(labels.categories))
    parts = proportional_allocation(sizes, held)
    rows = eligible[stratified_draw(codes, parts, seed)]
    return ControlCell(
        customer_ids=values.customer_ids[rows],
        segment=values.segment[rows],
        eligible=len(eligible),
        precision_asked=precision,
        precision=float(ratio_half_width(rho, rate_mailed, held, len(eligible))),
        rho=float(rho),
        rho_source=rho_source,
        rate_mailed=rate_mailed,
        expected_value_forgone=float(values.values[rows].max(axis=1).sum()),
        seed=seed,
        segments=pd.DataFrame({"segment": list(labels.categories), "eligible": sizes, "held": parts}),
    )
