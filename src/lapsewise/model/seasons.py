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
same degree and so exact as well; those by alpha and beta (which move the nodes)
are central differences of the exact value in log alpha and log beta (step
1e-5, relative error about 1e-8 against the exact plain gradient). With every ``s_q = 1`` the likelihood equals the plain one
(the tests check it to 1e-10).

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
from scipy import linalg, sparse, special

from lapsewise.data.histories import Histories, season_quarters
from lapsewise.model.moments import history_sums, theta_factors
from lapsewise.model.process import Process

CLASSES = 8
"""Quarter classes: class ``2 q + m`` is quarter of the year q, mailed (m = 1) or not (m = 0)."""

_DIFFERENCE_STEP = 1e-5  # in log alpha and log beta
_CHUNK = 100_000  # states integrated at a time (a states x nodes array per chunk)


def class_multipliers(process: Process) -> np.ndarray:
    """``c_k`` of every class: ``s_q`` when mailed, ``rho s_q`` when not (rho None: every quarter counts as mailed)."""
    seasons = np.asarray(process.seasons if process.seasons is not None else (1.0,) * 4, dtype=float)
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
    the class of its quarter of the year and mail flag: a running sum over the cells
    that restarts with every history.
    """
    if not histories.seasonal:
        raise ValueError("a seasonal expansion needs histories compressed with seasons")
    silent = histories.silent_quarters.astype(np.int64)
    rows = histories.size
    indptr = np.zeros(rows + 1, dtype=np.int64)
    np.cumsum(silent + 1, out=indptr[1:])
    cells = int(indptr[-1])
    first, last = indptr[:-1], indptr[1:] - 1
    owner = np.repeat(np.arange(rows), silent + 1)
    step = np.arange(cells) - first[owner]  # j
    base = base_class_counts(histories)
    increments = np.zeros((cells, CLASSES), dtype=np.int32)
    later = step >= 1
    season = (histories.phase[owner] + histories.t_x[owner] + step) % 4
    flag = histories.after_last[owner[later], step[later] - 1]
    np.add.at(increments, (np.flatnonzero(later), 2 * season[later] + flag), 1)
    increments[first] += base.astype(np.int32)
    counts = np.cumsum(increments, axis=0)
    counts -= (counts[first] - base)[owner].astype(np.int32)  # restart at each history
    del increments
    x = histories.x
    max_quarter = int(histories.n.max()) + 1
    bits = max(int(counts.max()), int(x.max()) + 1, 1).bit_length()
    if bits * (1 + CLASSES) > 63:
        raise ValueError("histories too long for the state keys")

    def keys(x_: np.ndarray, counts_: np.ndarray) -> np.ndarray:
        key = np.asarray(x_, dtype=np.int64).copy()
        for k in range(CLASSES):
            key = (key << bits) | counts_[:, k]
        return key

    cell_keys = keys(x[owner], counts)
    through_n = counts[last]
    all_keys = np.concatenate([cell_keys, keys(x, through_n), keys(x + 1, through_n)])
    codes, unique = pd.factorize(all_keys)
    states = np.empty((len(unique), 1 + CLASSES), dtype=np.int64)
    rest = np.asarray(unique, dtype=np.int64)
    for k in range(CLASSES, 0, -1):
        states[:, k] = rest & ((1 << bits) - 1)
        rest = rest >> bits
    states[:, 0] = rest
    cell_state = codes[:cells]
    tau = histories.t_x[owner] + step
    theta_index = tau.copy()
    theta_index[last] += max_quarter + 1  # alive through n rather than dead after tau
    term_codes, term_keys = pd.factorize(theta_index * len(unique) + cell_state)
    term_keys = np.asarray(term_keys, dtype=np.int64)
    terms = sparse.csr_matrix((np.ones(cells), term_codes.astype(np.int32), indptr.astype(np.int32)), shape=(rows, len(term_keys)))
    purchases = np.concatenate([histories.season_x, histories.x_unmailed[:, None]], axis=1).astype(float)
    return SeasonalExpansion(
        histories=histories,
        terms=terms,
        term_theta=term_keys // len(unique),
        term_state=term_keys % len(unique),
        states=states,
        alive_state=codes[cells : cells + rows],
        next_state=codes[cells + rows :],
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


def log_state_moments(states: np.ndarray, alpha: float, beta: float, c: np.ndarray, nodes: int, gradient: bool = False):
    """``log E_p[p^x prod_k (1 - c_k p)^m_k]`` for each state row (x, m_1..m_8), by quadrature; exact (module docstring).

    With ``gradient`` also the derivatives by ``c_k``, shape (states, CLASSES).
    """
    p, log_weights = beta_nodes(float(alpha), float(beta), int(nodes))
    with np.errstate(divide="ignore"):
        features = np.column_stack([np.log(p), np.log1p(-np.outer(p, c))])  # (nodes, 1 + CLASSES)
    counts = states.astype(float)
    value = np.empty(len(states))
    d_c = np.empty((len(states), CLASSES)) if gradient else None
    slope = -p[:, None] / (1.0 - np.outer(p, c))  # d log(1 - c p) / d c at each node
    for begin in range(0, len(states), _CHUNK):
        block = counts[begin : begin + _CHUNK]
        with np.errstate(invalid="ignore"):
            exponents = block[:, 1:] @ features[:, 1:].T + np.outer(block[:, 0], features[:, 0]) + log_weights
        exponents = np.where(np.isnan(exponents), -np.inf, exponents)  # 0 * log 0: a count of 0 at a node p = 1
        peak = exponents.max(axis=1)
        share = np.exp(exponents - peak[:, None])
        total = share.sum(axis=1)
        value[begin : begin + _CHUNK] = np.log(total) + peak
        if gradient:
            share /= total[:, None]
            d_c[begin : begin + _CHUNK] = block[:, 1:] * (share @ slope)
    return (value, d_c) if gradient else value


def _moments_and_derivatives(expansion: SeasonalExpansion, process: Process, gradient: bool):
    """The states' log p factors; with ``gradient`` their derivatives by (alpha, beta, rho, s_1..s_4), shape (states, 7)."""
    c = class_multipliers(process)
    nodes = expansion.nodes
    if not gradient:
        return log_state_moments(expansion.states, process.alpha, process.beta, c, nodes)
    value, d_c = log_state_moments(expansion.states, process.alpha, process.beta, c, nodes, gradient=True)
    d = np.zeros((len(value), 7))
    h = _DIFFERENCE_STEP
    for column, (name, base) in enumerate((("alpha", process.alpha), ("beta", process.beta))):
        up = dict(alpha=process.alpha, beta=process.beta)
        down = dict(up)
        up[name], down[name] = base * math.exp(h), base * math.exp(-h)
        rise = log_state_moments(expansion.states, up["alpha"], up["beta"], c, nodes) - log_state_moments(expansion.states, down["alpha"], down["beta"], c, nodes)
        d[:, column] = rise / (2.0 * h) / base
    seasons = np.asarray(process.seasons if process.seasons is not None else (1.0,) * 4)
    rho = process.unmailed_response
    d[:, 2] = d_c[:, 0::2] @ seasons  # c of the unmailed classes is rho s_q
    d[:, 3:] = d_c[:, 1::2] + d_c[:, 0::2] * rho
    return value, d


def purchase_factor(expansion: SeasonalExpansion, process: Process) -> np.ndarray:
    """log of the purchases' own multipliers: sum_q x_q log s_q + x_unmailed log rho."""
    seasons = np.asarray(process.seasons if process.seasons is not None else (1.0,) * 4)
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
    seasons = np.asarray(process.seasons if process.seasons is not None else (1.0,) * 4)
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


def fit_seasons(histories: Histories, mailing_history: bool, plain: "ChurnFit") -> "ChurnFit":
    """Maximum-likelihood fit of the seasonal model, with the likelihood-ratio test against ``plain`` (the fit without seasons).

    The multipliers are scaled so that the largest is 1: the search fixes one
    quarter of the year (the reference) at 1 and bounds the other three to
    (0, 1]. It starts with the quarter with the most purchases per customer-quarter
    as the reference; should another multiplier reach 1, that quarter is tried as
    the reference too and the better fit kept. The search itself is the churn
    fit's (:func:`lapsewise.model.optimum.minimize`, from the plain estimates),
    with the Hessian by differences of the gradient. Returns ``plain`` with a
    warning when some quarter of the year is never observed.
    """
    from lapsewise.model.churn import ChurnFit, has_unmailed_quarter, on_bounds, sample_histories
    from lapsewise.model import optimum
    from scipy import stats

    rates = season_rates(histories)
    if not np.all(np.isfinite(rates)) or np.any(rates <= 0):
        missing = [f"quarter {q + 1}" for q in range(4) if not (np.isfinite(rates[q]) and rates[q] > 0)]
        warning = f"seasons not fitted: no purchase observed in {', '.join(missing)} of the year"
        return dataclasses.replace(plain, warnings=plain.warnings + (warning,))
    expansion = expand_seasonal(histories)
    customers = float(histories.count.sum())
    stand_in = None
    if histories.size > optimum.STAND_IN_CUSTOMERS:
        stand_in = expand_seasonal(sample_histories(histories, optimum.STAND_IN_CUSTOMERS))
    tried = []
    reference = int(np.argmax(rates))
    while reference not in [t[0] for t in tried]:
        best = _search(expansion, stand_in, mailing_history, plain, reference, rates, customers)
        tried.append((reference, best))
        seasons = _seasons_at(best.x, mailing_history, reference)
        top = [q for q in range(4) if q != reference and seasons[q] >= _SEASON_BOUNDS[1] - 1e-4]
        if not top:
            break
        reference = top[0]
    reference, best = min(tried, key=lambda item: item[1].fun)
    process = _unpack(best.x, mailing_history, reference)
    names = _names(mailing_history, reference)
    bounds = _bounds(mailing_history)
    # A multiplier at 1 is not on a bound of the model (the scaling puts the largest there); at 0.001 it is.
    on_bound = [name for name in on_bounds(best.x, bounds, names) if not (name.startswith("season") and process.seasons[int(name[-1]) - 1] >= 0.5)]
    warnings = [w for w in plain.warnings if "sits on the bound" not in w]
    warnings += [f"{name} sits on the bound of its range; its value and standard error are not reliable" for name in on_bound]
    if not best.converged:
        warnings.append(f"the optimiser did not report convergence with seasons ({best.message})")
    unidentified = ["rho"] if mailing_history and not has_unmailed_quarter(histories) else []
    free = [name not in on_bound + unidentified for name in names]
    errors = optimum.standard_errors(best.hessian, best.x, customers, logged=[i < 4 for i in range(len(names))], free=free)
    std_errors = dict(zip(names, errors))
    std_errors[f"season_{reference + 1}"] = None  # fixed at 1 by the scaling
    log_likelihood = -best.fun * customers
    statistic = max(2.0 * (log_likelihood - plain.log_likelihood), 0.0)
    test = {
        "statistic": statistic,
        "degrees_of_freedom": 3,
        "p_value": float(stats.chi2.sf(statistic, 3)),
        "log_likelihood_without": plain.log_likelihood,
    }
    return ChurnFit(
        alpha=process.alpha,
        beta=process.beta,
        gamma=process.gamma,
        delta=process.delta,
        rho=process.rho,
        std_errors={name: std_errors.get(name) for name in PARAMETERS if name in std_errors or name.startswith("season")},
        log_likelihood=log_likelihood,
        customers=int(customers),
        histories=histories.size,
        converged=best.converged,
        warnings=tuple(warnings),
        seasons=process.seasons,
        season_test=test,
    )


def _names(mailing_history: bool, reference: int) -> tuple[str, ...]:
    free_seasons = [f"season_{q + 1}" for q in range(4) if q != reference]
    return ("alpha", "beta", "gamma", "delta") + (("rho",) if mailing_history else ()) + tuple(free_seasons)


def _bounds(mailing_history: bool) -> list[tuple[float, float]]:
    return [_LOG_BOUNDS] * 4 + ([_RHO_BOUNDS] if mailing_history else []) + [_SEASON_BOUNDS] * 3


def _seasons_at(theta: np.ndarray, mailing_history: bool, reference: int) -> tuple[float, ...]:
    free = list(theta[5 if mailing_history else 4 :])
    return tuple(1.0 if q == reference else float(free.pop(0)) for q in range(4))


def _unpack(theta: np.ndarray, mailing_history: bool, reference: int) -> Process:
    alpha, beta, gamma, delta = (float(v) for v in np.exp(theta[:4]))
    rho = float(theta[4]) if mailing_history else None
    return Process(alpha, beta, gamma, delta, rho, _seasons_at(theta, mailing_history, reference))


def _objective(expansion: SeasonalExpansion, mailing_history: bool, reference: int):
    """The negative log-likelihood per customer and its gradient in search coordinates."""
    scale = 1.0 / max(float(expansion.histories.count.sum()), 1.0)
    keep = [0, 1, 2, 3] + ([4] if mailing_history else []) + [5 + q for q in range(4) if q != reference]

    def objective(theta: np.ndarray):
        process = _unpack(theta, mailing_history, reference)
        row, _, grad = evaluate_seasonal(expansion, process, gradient=True)
        value = float(np.dot(expansion.histories.count, row))
        if not np.isfinite(value):
            return 1e10, np.zeros_like(theta)
        grad = grad.copy()
        grad[:4] *= [process.alpha, process.beta, process.gamma, process.delta]  # d/d log(parameter)
        return -value * scale, -grad[keep] * scale

    return objective


def _search(expansion, stand_in, mailing_history, plain, reference, rates, customers):
    from lapsewise.model import optimum

    head = list(np.log([plain.alpha, plain.beta, plain.gamma, plain.delta]))
    if mailing_history:
        head.append(float(np.clip(plain.rho if plain.rho is not None else 0.5, *_RHO_BOUNDS)))
    ratios = np.clip(rates / rates[reference], 0.05, 0.99)
    starts = [
        np.array(head + [float(ratios[q]) for q in range(4) if q != reference]),
        np.array(head + [0.9] * 3),
    ]
    objective = _objective(expansion, mailing_history, reference)
    rough = None if stand_in is None else _objective(stand_in, mailing_history, reference)
    return optimum.minimize(objective, starts, _bounds(mailing_history), customers, _SCOUT_STEPS, rough)
