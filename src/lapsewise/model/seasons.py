"""The seasonal hidden-churn likelihood: multipliers of the purchase probability by quarter of the year, still exact.

With seasons (see :mod:`lapsewise.model.process`) an alive customer buys in a
quarter with probability ``c p``: ``c = s_q`` when mailed and ``c = rho s_q``
when not, ``q`` the quarter of the (fiscal) year. A quarter is therefore of one
of eight *classes* k (quarter of the year x mailed or not), each with its own
``c_k``. Summing over the quarter ``tau`` through which the customer stayed
alive, as the plain likelihood does (:mod:`lapsewise.model.churn`)::

    L = prod_{purchases} c  *  sum_tau  E_theta[(1-theta)^tau * theta^(tau<n)]  *  E_p[p^x prod_k (1 - c_k p)^m_k(tau)]

where ``m_k(tau)`` counts the silent quarters of class k up to tau. The p factor
is the expectation of a polynomial in p of degree ``tau <= n`` under
``p ~ Beta(alpha, beta)``. Gauss-Jacobi quadrature with ``J`` nodes (weight
``p^(alpha-1) (1-p)^(beta-1)``) integrates every polynomial of degree up to
``2J - 1`` exactly, so with ``J = n_max // 2 + 2`` nodes the weighted sum over
the nodes *is* the expectation, up to rounding; every term is positive, so
nothing cancels. The derivatives by rho and the seasons are polynomials of the
same degree and so exact as well. Those by alpha and beta move the nodes: since
the sum over the nodes equals the expectation for every alpha and beta, its
derivative is the expectation's, and it needs only how the nodes and weights
move (central differences of the nodes alone, cheap; :func:`log_state_moments`;
the gradient equals the plain model's exact one to 1e-9). With every ``s_q = 1``
the likelihood equals the plain one (the tests check it to 1e-10).

A *state* of the p factor is (x, the eight class counts); a term of the sum is a
(theta factor, state) pair; as in the plain likelihood the histories are a
sparse histories-by-terms matrix, and only distinct states are integrated.

References
----------
Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
Golub, G. H., & Welsch, J. H. (1969). Calculation of Gauss Quadrature Rules.
Mathematics of Computation, 23(106), 221-230.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import linalg, sparse, special, stats

from lapsewise.data.histories import Histories, season_quarters
from lapsewise.model import optimum
from lapsewise.model.churn import ChurnFit, bound_warnings, fit_covariance, has_unmailed_quarter, on_bounds, sample_histories
from lapsewise.model.moments import history_sums, theta_factors
from lapsewise.model.process import Process

CLASSES = 8
"""Quarter classes: class ``2 q + m`` is quarter of the year q, mailed (m = 1) or not (m = 0)."""

_DIFFERENCE_STEP = 1e-5  # in log alpha and log beta
_CHUNK = 100_000  # states integrated at a time (a states x nodes array per chunk)


def class_multipliers(process: Process) -> np.ndarray:
    """``c_k`` of every class: ``s_q`` when mailed, ``rho s_q`` when not (rho None: every quarter counts as mailed)."""
    seasons = process.multipliers
    c = np.empty(CLASSES)
    c[1::2] = seasons
    c[0::2] = seasons * process.unmailed_response
    return c


@dataclass(frozen=True)
class SeasonalExpansion:
    """Seasonal histories laid out over their possible death quarters (see the module docstring).

    ``terms`` is histories x terms (a 1 where a history has a term); a term has a
    theta factor (``term_theta``, indexing :func:`lapsewise.model.moments.theta_factors`)
    and a p-factor state (``term_state``). ``states`` holds each state's x and class
    counts, shape (states, 1 + CLASSES). ``alive_state`` and ``next_state`` are each
    history's state through n, and the same with one purchase more (for the posterior).
    ``purchases`` holds each history's purchases by quarter of the year and its
    unmailed purchases, shape (histories, 5).
    """

    histories: Histories
    terms: sparse.csr_matrix
    term_theta: np.ndarray
    term_state: np.ndarray
    states: np.ndarray
    alive_state: np.ndarray
    next_state: np.ndarray
    purchases: np.ndarray
    max_quarter: int

    @property
    def nodes(self) -> int:
        """Quadrature nodes: exact for the polynomials of degree up to max_quarter + 1 (the next purchase included)."""
        return (self.max_quarter + 1) // 2 + 2

    @functools.cached_property
    def state_groups(self) -> "StateGroups":
        """The states grouped by the nodes their degree needs, laid out once for every evaluation of a fit."""
        return StateGroups.of(self.states, self.nodes)


@dataclass(frozen=True)
class StateGroups:
    """States grouped by the fewest quadrature nodes exact for their degree (``x + sum_k m_k``): ``sizes[g]``
    nodes for the rows ``members[g]``, whose counts (as floats) are ``counts[g]``."""

    sizes: tuple[int, ...]
    members: tuple[np.ndarray, ...]
    counts: tuple[np.ndarray, ...]
    rows: int

    @classmethod
    def of(cls, states: np.ndarray, nodes: int) -> "StateGroups":
        sizes = _node_groups(int(nodes))
        group = np.searchsorted(sizes, states.sum(axis=1) // 2 + 1)  # J nodes are exact up to degree 2J - 1
        members = [np.flatnonzero(group == index) for index in range(len(sizes))]
        kept = [i for i, m in enumerate(members) if len(m)]
        return cls(
            sizes=tuple(sizes[i] for i in kept),
            members=tuple(members[i] for i in kept),
            counts=tuple(states[members[i]].astype(float) for i in kept),
            rows=len(states),
        )


def base_class_counts(histories: Histories) -> np.ndarray:
    """Silent quarters 1..t_x of every class, shape (histories, CLASSES)."""
    total = season_quarters(histories.phase, histories.t_x)
    mailed = histories.season_mailed_silent
    counts = np.empty((histories.size, CLASSES), dtype=np.int64)
    counts[:, 1::2] = mailed
    counts[:, 0::2] = total - histories.season_x - mailed
    return counts


def expand_seasonal(histories: Histories) -> SeasonalExpansion:
    """Lay seasonal histories out over their death quarters and find their distinct p-factor states.

    Cell ``j`` of a history is the quarter ``tau = t_x + j`` (``0 <= j <= n - t_x``).
    Its class counts are those up to t_x plus one for each quarter t_x + 1 .. tau in
    the class of its quarter of the year and mail flag. A state (x and the eight
    counts) is packed into one integer, a field per count, so a quarter adds a power
    of two to the key and a history's keys are one cumulative sum along its row of
    the after-last quarters; a term's key is the state's with a last bit for "alive
    through n". One hash of the cells' term keys finds the distinct terms.
    """
    if not histories.seasonal:
        raise ValueError("a seasonal expansion needs histories compressed with seasons")
    silent = histories.silent_quarters.astype(np.int64)
    rows = histories.size
    indptr = np.zeros(rows + 1, dtype=np.int64)
    np.cumsum(silent + 1, out=indptr[1:])
    x = histories.x.astype(np.int64)
    max_quarter = int(histories.n.max()) + 1
    count_bits = int(season_quarters(np.arange(4), np.full(4, max_quarter)).max()).bit_length()
    x_bits = (int(x.max()) + 1).bit_length()
    if x_bits + CLASSES * count_bits + 1 > 63:
        raise ValueError("histories too long for the state keys")
    shifts = count_bits * (CLASSES - 1 - np.arange(CLASSES))  # class k's field

    base = base_class_counts(histories)
    base_key = (x << (CLASSES * count_bits)) + (base << shifts[None, :]).sum(axis=1)
    width = histories.after_last.shape[1]
    quarter = np.arange(1, width + 1)[None, :]
    klass = 2 * ((histories.phase[:, None] + histories.t_x[:, None] + quarter) % 4) + histories.after_last[:, :width]
    keys = np.empty((rows, width + 1), dtype=np.int64)
    keys[:, 0] = base_key
    keys[:, 1:] = np.left_shift(1, shifts[klass])
    del klass
    np.cumsum(keys, axis=1, out=keys)
    through_n = keys[np.arange(rows), silent]
    keys <<= 1
    keys[np.arange(rows), silent] += 1  # the last cell: alive through n
    inside = np.arange(width + 1)[None, :] <= silent[:, None]
    cell_terms, term_keys = pd.factorize(keys[inside])
    del keys, inside
    term_keys = np.asarray(term_keys, dtype=np.int64)
    state_codes, state_keys = pd.factorize(np.concatenate([term_keys >> 1, through_n, through_n + (1 << (CLASSES * count_bits))]))
    state_keys = np.asarray(state_keys, dtype=np.int64)
    states = np.empty((len(state_keys), 1 + CLASSES), dtype=np.int64)
    states[:, 0] = state_keys >> (CLASSES * count_bits)
    states[:, 1:] = (state_keys[:, None] >> shifts[None, :]) & ((1 << count_bits) - 1)
    term_state = state_codes[: len(term_keys)]
    tau = states[term_state].sum(axis=1)  # every quarter 1..tau is a purchase or a silent quarter of some class
    terms = sparse.csr_matrix(
        (np.ones(len(cell_terms)), cell_terms.astype(np.int32), indptr.astype(np.int32)), shape=(rows, len(term_keys))
    )
    purchases = np.concatenate([histories.season_x, histories.x_unmailed[:, None]], axis=1).astype(float)
    return SeasonalExpansion(
        histories=histories,
        terms=terms,
        term_theta=tau + (term_keys & 1) * (max_quarter + 1),  # alive through n rather than dead after tau
        term_state=term_state,
        states=states,
        alive_state=state_codes[len(term_keys) : len(term_keys) + rows],
        next_state=state_codes[len(term_keys) + rows :],
        purchases=purchases,
        max_quarter=max_quarter,
    )


# ---------------------------------------------------------------- the p factor by quadrature


@functools.lru_cache(maxsize=64)
def beta_nodes(alpha: float, beta: float, nodes: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Jacobi nodes on [0, 1] and log weights for ``p ~ Beta(alpha, beta)`` (weights summing to 1).

    Golub & Welsch (1969): the nodes are the eigenvalues of the Jacobi matrix of the
    three-term recurrence of the orthogonal polynomials of the weight, the weights the
    squared first components of its normalised eigenvectors. On [-1, 1] with the weight
    ``(1 - t)^a (1 + t)^b`` (``a = beta - 1``, ``b = alpha - 1``, ``p = (1 + t) / 2``)
    the recurrence is the Jacobi polynomials' (Abramowitz & Stegun 22.7.1, from memory).
    Unlike SciPy's ``roots_jacobi``, which scales by the weight's total mass, this
    stays finite for every alpha and beta the fit searches (1e-3 to 1e4).
    """
    a, b = beta - 1.0, alpha - 1.0
    k = np.arange(nodes, dtype=float)
    s = 2.0 * k + a + b
    with np.errstate(divide="ignore", invalid="ignore"):
        diagonal = np.where(np.abs(s * (s + 2.0)) > 0, (b * b - a * a) / (s * (s + 2.0)), (b - a) / (a + b + 2.0))
    diagonal[0] = (b - a) / (a + b + 2.0)
    m = k[1:]
    s = 2.0 * m + a + b
    off = np.sqrt(4.0 * m * (m + a) * (m + b) * (m + a + b) / (s * s * (s + 1.0) * (s - 1.0)))
    t, vectors = linalg.eigh_tridiagonal(diagonal, off)
    p = np.clip((1.0 + t) / 2.0, 0.0, 1.0)
    with np.errstate(divide="ignore"):
        log_weights = 2.0 * np.log(np.abs(vectors[0]))
    return p, log_weights - special.logsumexp(log_weights)


def node_sensitivities(alpha: float, beta: float, nodes: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """How the nodes and log weights of :func:`beta_nodes` move with alpha and beta: (dp/dalpha, dlogw/dalpha,
    dp/dbeta, dlogw/dbeta), by central differences in log alpha and log beta (step 1e-5; the nodes are smooth
    functions of both). Where a weight underflows to 0 its slope is 0 (such a node carries no share)."""
    h = _DIFFERENCE_STEP
    slopes = []
    for name in ("alpha", "beta"):
        base = alpha if name == "alpha" else beta
        moved = [beta_nodes(*((base * math.exp(sign * h), beta) if name == "alpha" else (alpha, base * math.exp(sign * h))), nodes) for sign in (1, -1)]
        d_p = (moved[0][0] - moved[1][0]) / (2.0 * h * base)
        with np.errstate(invalid="ignore"):
            d_log_w = (moved[0][1] - moved[1][1]) / (2.0 * h * base)
        slopes += [d_p, np.where(np.isfinite(d_log_w), d_log_w, 0.0)]
    return tuple(slopes)


def log_state_moments(states: "np.ndarray | StateGroups", alpha: float, beta: float, c: np.ndarray, nodes: int, gradient: bool = False):
    """``log E_p[p^x prod_k (1 - c_k p)^m_k]`` for each state row (x, m_1..m_8), by quadrature; exact (module docstring).

    With ``gradient`` also the derivatives by (alpha, beta, c_1..c_8), shape (states, 2 + CLASSES). Those by
    ``c_k`` differentiate the integrand, a polynomial of the same degree: exact. The quadrature sum equals the
    expectation for every alpha and beta, so its derivative by alpha is the expectation's: with ``f`` the
    integrand, ``sum_i (dw_i/dalpha f(p_i) + w_i f'(p_i) dp_i/dalpha)``, where ``f'/f = x/p - sum_k m_k c_k/(1 - c_k p)``
    is exact and the nodes' slopes come from :func:`node_sensitivities`.

    A state's integrand has degree ``x + sum_k m_k``, and ``J`` nodes are exact up to degree ``2J - 1``, so the
    states are integrated in groups by degree, each with the fewest nodes exact for it (at most ``nodes``):
    the work grows with the states' own lengths, not the longest history's. ``states`` may be given already
    grouped (:class:`StateGroups`).
    """
    groups = states if isinstance(states, StateGroups) else StateGroups.of(np.asarray(states), nodes)
    value = np.empty(groups.rows)
    d = np.empty((groups.rows, 2 + CLASSES)) if gradient else None
    for size, members, counts in zip(groups.sizes, groups.members, groups.counts):
        result = _integrate(counts, alpha, beta, c, size, gradient)
        if gradient:
            value[members], d[members] = result
        else:
            value[members] = result
    return (value, d) if gradient else value


def _node_groups(nodes: int) -> list[int]:
    """The node counts the states are grouped by: a few sizes up to ``nodes``, smallest first."""
    return sorted({min(size, nodes) for size in (6, 11, 16)} | {nodes})


def _integrate(counts: np.ndarray, alpha: float, beta: float, c: np.ndarray, nodes: int, gradient: bool):
    """:func:`log_state_moments` of one group of states, all with ``nodes`` nodes."""
    p, log_weights = beta_nodes(float(alpha), float(beta), int(nodes))
    with np.errstate(divide="ignore"):
        features = np.column_stack([np.log(p), np.log1p(-np.outer(p, c))])  # (nodes, 1 + CLASSES)
    # A node at p = 1 with c = 1 gives log 0: a very negative finite number instead, so that a count of 0 times it is 0.
    features_t = np.ascontiguousarray(np.maximum(features, -1e300).T)
    value = np.empty(len(counts))
    if gradient:
        d = np.empty((len(counts), 2 + CLASSES))
        slope_c = -p[:, None] / (1.0 - np.outer(p, c))  # d log(1 - c p) / d c at each node
        # d log f / d p at each node is counts @ slope_p[node]: x / p for the purchases, -c_k / (1 - c_k p) for class k.
        slope_p = np.column_stack([1.0 / np.maximum(p, 1e-300), -c[None, :] / (1.0 - np.outer(p, c))])  # (nodes, 1 + CLASSES)
        d_p_alpha, d_log_w_alpha, d_p_beta, d_log_w_beta = node_sensitivities(float(alpha), float(beta), int(nodes))
        # The alpha and beta slopes of each node's exponent, side by side: share @ these gives both derivatives at once.
        moves = np.stack([d_p_alpha[:, None] * slope_p, d_p_beta[:, None] * slope_p], axis=0)  # (2, nodes, 1 + CLASSES)
        weight_moves = np.column_stack([d_log_w_alpha, d_log_w_beta])
    for begin in range(0, len(counts), _CHUNK):
        block = counts[begin : begin + _CHUNK]
        share = block @ features_t
        share += log_weights
        peak = share.max(axis=1)
        share -= peak[:, None]
        np.exp(share, out=share)
        total = share.sum(axis=1)
        value[begin : begin + _CHUNK] = np.log(total) + peak
        if gradient:
            share /= total[:, None]
            rows = slice(begin, begin + len(block))
            d[rows, 2:] = block[:, 1:] * (share @ slope_c)
            d[rows, :2] = share @ weight_moves
            d[rows, 0] += np.einsum("ij,ij->i", block, share @ moves[0])
            d[rows, 1] += np.einsum("ij,ij->i", block, share @ moves[1])
    return (value, d) if gradient else value


def _moments_and_derivatives(expansion: SeasonalExpansion, process: Process, gradient: bool):
    """The states' log p factors; with ``gradient`` their derivatives by (alpha, beta, rho, s_1..s_4), shape (states, 7)."""
    c = class_multipliers(process)
    nodes = expansion.nodes
    if not gradient:
        return log_state_moments(expansion.state_groups, process.alpha, process.beta, c, nodes)
    value, d_all = log_state_moments(expansion.state_groups, process.alpha, process.beta, c, nodes, gradient=True)
    d_c = d_all[:, 2:]
    d = np.zeros((len(value), 7))
    d[:, :2] = d_all[:, :2]
    seasons = process.multipliers
    rho = process.unmailed_response
    d[:, 2] = d_c[:, 0::2] @ seasons  # c of the unmailed classes is rho s_q
    d[:, 3:] = d_c[:, 1::2] + d_c[:, 0::2] * rho
    return value, d


def purchase_factor(expansion: SeasonalExpansion, process: Process) -> np.ndarray:
    """log of the purchases' own multipliers: sum_q x_q log s_q + x_unmailed log rho."""
    seasons = process.multipliers
    logs = np.append(np.log(seasons), math.log(process.rho) if process.rho is not None and process.rho > 0 else (0.0 if process.rho is None else -np.inf))
    with np.errstate(invalid="ignore"):
        product = expansion.purchases * logs[None, :]
    return np.where(expansion.purchases > 0, product, 0.0).sum(axis=1)


PARAMETERS = ("alpha", "beta", "gamma", "delta", "rho", "season_1", "season_2", "season_3", "season_4")


def evaluate_seasonal(expansion: SeasonalExpansion, process: Process, gradient: bool = False):
    """Per-history log-likelihood and the states' log p factors; with ``gradient`` also the total's gradient
    by (alpha, beta, gamma, delta, rho, s_1..s_4) (see :func:`lapsewise.model.churn.evaluate` for the layout)."""
    hist = expansion.histories
    moments = _moments_and_derivatives(expansion, process, gradient)
    if gradient:
        moments, d_moments = moments
        theta, d_theta = theta_factors(process.gamma, process.delta, expansion.max_quarter, gradient=True)
    else:
        theta = theta_factors(process.gamma, process.delta, expansion.max_quarter)
    term_x = expansion.states[expansion.term_state, 0]
    log_sums, scaled, sums = history_sums(expansion.terms, term_x, hist.x, theta[expansion.term_theta] + moments[expansion.term_state])
    row = log_sums + purchase_factor(expansion, process)
    if not gradient:
        return row, moments
    with np.errstate(divide="ignore", invalid="ignore"):
        per_sum = np.where(sums > 0, 1.0 / sums, 0.0)
    weight = scaled * (expansion.terms.T @ (hist.count * per_sum))
    by_theta = np.bincount(expansion.term_theta, weights=weight, minlength=len(theta))
    by_state = np.bincount(expansion.term_state, weights=weight, minlength=len(moments))
    d_alpha, d_beta, d_rho, *d_seasons = by_state @ d_moments
    d_gamma, d_delta = by_theta @ d_theta
    counted = hist.count @ expansion.purchases  # purchases by quarter of the year, and unmailed, over all customers
    seasons = process.multipliers
    d_seasons = np.asarray(d_seasons) + counted[:4] / seasons
    if process.rho is not None and process.rho > 0:
        d_rho += counted[4] / process.rho
    return row, moments, np.concatenate([[d_alpha, d_beta, d_gamma, d_delta, d_rho], d_seasons])


# ---------------------------------------------------------------- fitting


_SEASON_BOUNDS = (1e-3, 1.0)
_LOG_BOUNDS = (math.log(1e-3), math.log(1e4))
_RHO_BOUNDS = (1e-6, 1.0 - 1e-9)
_SCOUT_STEPS = 6


def season_rates(histories: Histories) -> np.ndarray:
    """Purchases per observed customer-quarter in each quarter of the year (a start for the search and its reference)."""
    observed = histories.count @ season_quarters(histories.phase, histories.n)
    bought = histories.count @ histories.season_x
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(observed > 0, bought / np.maximum(observed, 1), np.nan)


CURVATURE_CUSTOMERS = 100_000
"""On a base larger than this the standard errors come from the observed information of a sample of this many customers."""

_AT_ONE = 1e-3  # a multiplier within this of 1 is at the top of its range


@dataclass(frozen=True)
class _Layout:
    """Which multipliers the search moves: all but the reference (held at 1) and any ``fixed`` ones (held at 1 too)."""

    mailing_history: bool
    reference: int
    fixed: tuple[int, ...] = ()

    @property
    def free_seasons(self) -> list[int]:
        return [q for q in range(4) if q != self.reference and q not in self.fixed]

    @property
    def names(self) -> tuple[str, ...]:
        head = ("alpha", "beta", "gamma", "delta") + (("rho",) if self.mailing_history else ())
        return head + tuple(f"season_{q + 1}" for q in self.free_seasons)

    @property
    def bounds(self) -> list[tuple[float, float]]:
        return [_LOG_BOUNDS] * 4 + ([_RHO_BOUNDS] if self.mailing_history else []) + [_SEASON_BOUNDS] * len(self.free_seasons)

    @property
    def gradient_columns(self) -> list[int]:
        """The columns of :func:`evaluate_seasonal`'s gradient that the search coordinates take."""
        return [0, 1, 2, 3] + ([4] if self.mailing_history else []) + [5 + q for q in self.free_seasons]

    def process(self, theta: np.ndarray) -> Process:
        alpha, beta, gamma, delta = (float(v) for v in np.exp(theta[:4]))
        rho = float(theta[4]) if self.mailing_history else None
        free = dict(zip(self.free_seasons, (float(v) for v in theta[5 if self.mailing_history else 4 :])))
        return Process(alpha, beta, gamma, delta, rho, tuple(free.get(q, 1.0) for q in range(4)))

    def coordinates(self, process: Process) -> np.ndarray:
        head = list(np.log([process.alpha, process.beta, process.gamma, process.delta]))
        if self.mailing_history:
            head.append(float(np.clip(process.rho, *_RHO_BOUNDS)))
        return np.array(head + [float(np.clip(process.seasons[q], *_SEASON_BOUNDS)) for q in self.free_seasons])

    def objective(self, expansion: SeasonalExpansion):
        """The negative log-likelihood per customer and its gradient in search coordinates."""
        scale = 1.0 / max(float(expansion.histories.count.sum()), 1.0)
        columns = self.gradient_columns

        def objective(theta: np.ndarray):
            process = self.process(theta)
            row, _, grad = evaluate_seasonal(expansion, process, gradient=True)
            value = float(np.dot(expansion.histories.count, row))
            if not np.isfinite(value):
                return 1e10, np.zeros_like(theta)
            grad = grad.copy()
            grad[:4] *= [process.alpha, process.beta, process.gamma, process.delta]  # d/d log(parameter)
            return -value * scale, -grad[columns] * scale

        return objective


def fit_seasons(histories: Histories, mailing_history: bool, plain: ChurnFit) -> ChurnFit:
    """Maximum-likelihood fit of the seasonal model, with the likelihood-ratio test against ``plain`` (the fit without seasons).

    The multipliers are scaled so that the largest is 1: the search holds one
    quarter of the year (the reference) at 1 and bounds the other three to
    (0, 1]. The reference is first the quarter with the most purchases per
    customer-quarter; should another multiplier reach 1, that quarter is tried as
    the reference too and the better fit kept. A multiplier still at 1 then equals
    the reference's and is held there (a season no different from the peak).

    On a base of more than :data:`lapsewise.model.optimum.STAND_IN_CUSTOMERS`
    customers the search and the choice of reference run on a sample of them (the
    churn fit's stand-in), starting from the plain estimates; Newton steps with the
    full gradient finish on the whole base (:func:`lapsewise.model.optimum.minimize`).
    Their curvature, and the standard errors, come from the Hessian (by differences
    of the exact gradient) of the whole base, or of a sample of
    :data:`CURVATURE_CUSTOMERS` customers when the base is larger (a full Hessian
    by differences costs eight full gradients; the sample's standard errors were
    within 2.5% of the full ones on simulated bases, see ``tests/bench/README.md``).
    Returns ``plain`` with a warning when some quarter of the year has no purchase.
    """
    rates = season_rates(histories)
    if not np.all(np.isfinite(rates)) or np.any(rates <= 0):
        missing = [f"quarter {q + 1}" for q in range(4) if not (np.isfinite(rates[q]) and rates[q] > 0)]
        warning = f"seasons not fitted: no purchase observed in {', '.join(missing)} of the year"
        return dataclasses.replace(plain, warnings=plain.warnings + (warning,))
    customers = float(histories.count.sum())
    large = histories.size > optimum.STAND_IN_CUSTOMERS
    sample = expand_seasonal(sample_histories(histories, optimum.STAND_IN_CUSTOMERS)) if large else expand_seasonal(histories)
    sample_customers = float(sample.histories.count.sum())
    start = dataclasses.replace(plain.process, rho=plain.rho if plain.rho is not None else (0.5 if mailing_history else None))

    # The reference quarter, chosen on the sample (the whole base when small).
    tried: dict[int, optimum.Optimum] = {}
    reference = int(np.argmax(rates))
    previous = None
    while reference not in tried:
        layout = _Layout(mailing_history, reference)
        if previous is None:
            ratios = np.clip(rates / rates[reference], 0.05, 0.99)
            starts = [
                layout.coordinates(dataclasses.replace(start, seasons=tuple(float(r) for r in ratios))),
                layout.coordinates(dataclasses.replace(start, seasons=(0.9,) * 4)),
            ]
        else:  # from the last optimum, its multipliers over the new reference's (which reached 1 there)
            scaled = np.asarray(previous.seasons) / previous.seasons[reference]
            starts = [layout.coordinates(dataclasses.replace(previous, seasons=tuple(float(v) for v in np.minimum(scaled, 0.99))))]
        tried[reference] = optimum.minimize(layout.objective(sample), starts, layout.bounds, sample_customers, _SCOUT_STEPS, projected=True)
        previous = layout.process(tried[reference].x)
        seasons = previous.seasons
        top = [q for q in range(4) if q != reference and seasons[q] >= 1.0 - _AT_ONE]
        if not top:
            break
        reference = top[0]
    reference = min(tried, key=lambda q: tried[q].fun)
    scout = _Layout(mailing_history, reference).process(tried[reference].x)
    layout = _Layout(mailing_history, reference, tuple(q for q in range(4) if q != reference and scout.seasons[q] >= 1.0 - _AT_ONE))
    if large:
        # The whole base: Newton steps from the sample's optimum, with the curvature of a larger sample (or the base).
        curvature_base = sample_histories(histories, CURVATURE_CUSTOMERS) if customers > CURVATURE_CUSTOMERS else histories
        curvature_objective = layout.objective(expand_seasonal(curvature_base))
        bounds = layout.bounds

        def curvature(theta: np.ndarray) -> np.ndarray | None:
            return optimum.hessian(curvature_objective, theta, curvature_objective(theta)[1], bounds)

        best = optimum.minimize(
            layout.objective(expand_seasonal(histories)), [layout.coordinates(scout)], bounds, customers, 1, layout.objective(sample), curvature, projected=True
        )
    else:
        best = optimum.minimize(layout.objective(sample), [layout.coordinates(scout)], layout.bounds, customers, 1, projected=True)
    process = layout.process(best.x)
    names = layout.names
    # A multiplier at 1 is not on a bound of the model (the scaling puts the largest there); at 0.001 it is.
    on_bound = [name for name in on_bounds(best.x, layout.bounds, names) if not (name.startswith("season") and process.seasons[int(name[-1]) - 1] >= 0.5)]
    warnings = [w for w in plain.warnings if "sits on the bound" not in w]
    warnings += bound_warnings(on_bound)
    if not best.converged:
        warnings.append(f"the optimiser did not report convergence with seasons ({best.message})")
    unidentified = ["rho"] if mailing_history and not has_unmailed_quarter(histories) else []
    # A multiplier that ends at 1 equals the reference's: held there, like the reference, with no standard error.
    unidentified += [name for name in names if name.startswith("season") and process.seasons[int(name[-1]) - 1] >= 1.0 - 1e-9]
    free = [name not in on_bound + unidentified for name in names]
    logged = [i < 4 for i in range(len(names))]
    errors = dict(zip(names, optimum.standard_errors(best.hessian, best.x, customers, logged=logged, free=free)))
    log_likelihood = -best.fun * customers
    statistic = max(2.0 * (log_likelihood - plain.log_likelihood), 0.0)
    test = {
        "statistic": statistic,
        "degrees_of_freedom": 3,
        "p_value": float(stats.chi2.sf(statistic, 3)),
        "log_likelihood_without": plain.log_likelihood,
    }
    names_out = PARAMETERS if mailing_history else tuple(n for n in PARAMETERS if n != "rho")
    return ChurnFit.of(
        process,
        std_errors={name: errors.get(name) for name in names_out},  # None for the multipliers held at 1
        log_likelihood=log_likelihood,
        customers=int(customers),
        histories=histories.size,
        converged=best.converged,
        warnings=tuple(warnings),
        season_test=test,
        covariance=fit_covariance(best.hessian, customers, names, process, logged, free),
    )
