"""The mailing-aware hidden-churn model: exact likelihood, maximum-likelihood fit, posterior quantities.

Customer i has a purchase probability ``p ~ Beta(alpha, beta)`` and a churn
probability ``theta ~ Beta(gamma, delta)``. Quarter 0 is the first purchase. At
the start of every later quarter an alive customer dies, for good, with
probability ``theta``. An alive customer buys with probability ``p`` in a mailed
quarter and ``rho * p`` in an unmailed one. With every quarter mailed this is
the BG/BB model of Fader, Hardie & Berger (2010); ``rho`` is then not
identified and is stored as ``None``.

The likelihood is exact. Summing over the quarter ``tau`` through which the
customer stayed alive (``t_x <= tau <= n``)::

    L = sum_tau  E_theta[(1-theta)^tau * theta^(tau<n)]  *  rho^x_u * E_p[p^x (1-p)^a_tau (1-rho p)^b_tau]

where ``a_tau`` and ``b_tau`` count the mailed and unmailed silent quarters up
to ``tau`` and ``x_u`` the purchases in unmailed quarters. The theta factor is a
ratio of Beta functions. The p factor is the expectation of a polynomial of
degree at most ``n`` under a Beta(alpha, beta) weight, which Gauss-Jacobi
quadrature with ``n // 2 + 1`` nodes computes exactly; with every quarter mailed
it is the Beta-function ratio ``B(alpha + x, beta + a) / B(alpha, beta)``.

References
----------
Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy import sparse, special

from lapsewise import optimum
from lapsewise.panel import Histories, compress_arrays, integer_codes

PARAMETERS = ("alpha", "beta", "gamma", "delta", "rho")
_LOG_BOUNDS = (math.log(1e-3), math.log(1e4))
_RHO_BOUNDS = (1e-6, 1.0 - 1e-9)
_SCOUT_STEPS = 6
_STARTS = (
    (1.0, 1.0, 1.0, 1.0, 0.5),
    (0.5, 2.0, 0.5, 3.0, 0.3),
    (2.0, 0.7, 1.5, 5.0, 0.7),
    (1.0, 4.0, 0.3, 1.0, 0.2),
)


@dataclass(frozen=True)
class ChurnFit:
    """A fitted hidden-churn model.

    Attributes
    ----------
    alpha, beta : float
        Beta distribution of the purchase probability p (published names, FHB 2010).
    gamma, delta : float
        Beta distribution of the churn probability theta.
    rho : float or None
        Share of the purchase probability that remains in an unmailed quarter;
        None when there is no mailing history (every quarter counted as mailed).
    std_errors : dict
        Standard errors from the observed information; None where not available.
    log_likelihood : float
    customers, histories : int
        Customers fitted and the distinct histories they compress to.
    converged : bool
    warnings : tuple of str
    """

    alpha: float
    beta: float
    gamma: float
    delta: float
    rho: float | None
    std_errors: dict[str, float | None] = field(default_factory=dict)
    log_likelihood: float = float("nan")
    customers: int = 0
    histories: int = 0
    converged: bool = True
    warnings: tuple[str, ...] = ()

    @property
    def mailing_history(self) -> bool:
        return self.rho is not None

    @property
    def unmailed_response(self) -> float:
        """rho, or 1.0 when every quarter counts as mailed."""
        return 1.0 if self.rho is None else float(self.rho)

    def to_dict(self) -> dict:
        return {
            "alpha": self.alpha,
            "beta": self.beta,
            "gamma": self.gamma,
            "delta": self.delta,
            "rho": self.rho,
            "std_errors": dict(self.std_errors),
            "log_likelihood": self.log_likelihood,
            "customers": self.customers,
            "histories": self.histories,
            "converged": self.converged,
            "warnings": list(self.warnings),
        }

    @classmethod
    def from_dict(cls, data: dict) -> "ChurnFit":
        return cls(
            alpha=float(data["alpha"]),
            beta=float(data["beta"]),
            gamma=float(data["gamma"]),
            delta=float(data["delta"]),
            rho=None if data.get("rho") is None else float(data["rho"]),
            std_errors=dict(data.get("std_errors", {})),
            log_likelihood=float(data.get("log_likelihood", float("nan"))),
            customers=int(data.get("customers", 0)),
            histories=int(data.get("histories", 0)),
            converged=bool(data.get("converged", True)),
            warnings=tuple(data.get("warnings", ())),
        )


# ---------------------------------------------------------------- the expansion over death quarters


@dataclass(frozen=True)
class Expansion:
    """Distinct histories laid out over every quarter through which the customer may have stayed alive.

    A history's likelihood is a sum of terms, one per quarter ``tau`` with
    ``t_x <= tau <= n`` through which the customer may have stayed alive. A term
    depends only on its *state*: the theta factor (death after tau, or alive
    through n) and the (purchases, mailed silent, unmailed silent) counts up to
    tau. Few states occur however many customers there are, so the likelihood is a
    sparse histories-by-states matrix ``terms`` (a 1 where a history has a state)
    times the vector of the states' term values.

    ``state_theta`` indexes ``[log E(1-theta)^t theta for t = 0..M] + [log E(1-theta)^t for t = 0..M]``;
    ``state_triple`` indexes rows of ``triples``; ``alive_triple`` and
    ``next_triple`` index (x, a_n, b_n) and (x + 1, a_n, b_n), used for the posterior.
    """

    histories: Histories
    terms: sparse.csr_matrix
    state_theta: np.ndarray
    state_triple: np.ndarray
    triples: np.ndarray
    alive_triple: np.ndarray
    next_triple: np.ndarray
    max_quarter: int

    @property
    def cells(self) -> int:
        return int(self.terms.nnz)

    @functools.cached_property
    def moment_terms(self) -> "MomentTerms":
        """The triples' moment terms, laid out once for every evaluation of a fit."""
        return MomentTerms.of(self.triples)

    @functools.cached_property
    def moment_terms_all_mailed(self) -> "MomentTerms":
        """The same with every quarter counted as mailed (rho None)."""
        return MomentTerms.of(self.triples, unmailed=False)

    def moments_layout(self, rho: float | None) -> "MomentTerms":
        return self.moment_terms if rho is not None else self.moment_terms_all_mailed


def _restarting_sums(start: np.ndarray, increments: np.ndarray, totals: np.ndarray, first: np.ndarray) -> np.ndarray:
    """Running sums over the cells that restart with every history, built in ``increments`` itself.

    A history's first cell (``first``) holds ``start``; each later cell adds its
    entry of ``increments`` (the entries at first cells are ignored). ``totals``
    is the sum of a history's increments, so one cumulative sum does it all. The
    result overwrites ``increments`` (on millions of cells a fresh array costs
    more than the arithmetic).
    """
    increments[first] = start
    increments[first[1:]] -= start[:-1] + totals[:-1]  # cancel what the previous history ran up to
    return np.cumsum(increments, out=increments)


def expand(histories: Histories) -> Expansion:
    """Lay the histories out over their possible death quarters (done once per fit, not per evaluation).

    Cell ``j`` (``0 <= j <= n - t_x``) of a history is the quarter ``tau = t_x + j``
    through which the customer stayed alive. Its state is (theta index, x, a): the
    mailed silent quarters ``a`` up to tau are a running sum of the mail flags after
    the last purchase, and the unmailed ones follow, ``b = tau - x - a``, since every
    quarter 1..tau is a purchase or a silent quarter. The cells of a history are
    contiguous, so the state keys are one cumulative sum over them and the states are
    found in a table of the few possible keys: a few passes over the cells, no sorting.
    """
    silent = histories.silent_quarters.astype(np.int32)
    rows = len(silent)
    indptr = np.zeros(rows + 1, dtype=np.int64)
    np.cumsum(silent + 1, out=indptr[1:])
    cells = int(indptr[-1])
    first, last = indptr[:-1], indptr[1:] - 1
    x = histories.x.astype(np.int32)
    mailed_after = histories.after_last.sum(axis=1, dtype=np.int32)
    a_n = histories.mailed_silent.astype(np.int32) + mailed_after
    b_n = histories.unmailed_silent.astype(np.int32) + silent - mailed_after
    max_quarter = int(histories.n.max()) + 1

    # The key of a state is (theta index * base + x) * base + a. The theta index is tau, plus
    # max_quarter + 1 at a history's last cell (alive through n rather than dead after tau). From one
    # cell to the next tau grows by 1 and a by the quarter's mail flag, so the key grows by base**2 + flag.
    base = int(max(x.max() + 2, a_n.max() + 1, b_n.max() + 1))
    state_count = (2 * max_quarter + 2) * base**2
    width = histories.after_last.shape[1]
    flags = np.zeros((rows, width + 1), dtype=np.int8)  # the flag each cell adds (none for a history's first cell)
    flags[:, 1:] = histories.after_last
    steps = flags[np.arange(width + 1)[None, :] <= silent[:, None]].astype(np.int64 if state_count >= 2**31 else np.int32)
    del flags
    steps += base * base
    start = (histories.t_x.astype(np.int64) * base + x) * base + histories.mailed_silent
    state_key = _restarting_sums(start, steps, silent.astype(np.int64) * base * base + mailed_after, first)
    state_key[last] += (max_quarter + 1) * base * base
    states, cell_state = integer_codes(state_key, state_count)
    del state_key, steps
    state_theta = states // (base * base)
    state_x, state_a = states // base % base, states % base
    state_tau = np.where(state_theta > max_quarter, state_theta - max_quarter - 1, state_theta)

    def key(x_, a_, b_):
        return (x_.astype(np.int64) * base + a_) * base + b_

    triple_keys = np.concatenate([key(state_x, state_a, state_tau - state_x - state_a), key(x, a_n, b_n), key(x + 1, a_n, b_n)])
    unique_triples, inverse = integer_codes(triple_keys, base**3)
    triples = np.stack([unique_triples // (base * base), unique_triples // base % base, unique_triples % base], axis=1).astype(np.int64)
    terms = sparse.csr_matrix((np.ones(cells), cell_state.astype(np.int32, copy=False), indptr.astype(np.int32)), shape=(rows, len(states)))
    return Expansion(
        histories=histories,
        terms=terms,
        state_theta=state_theta,
        state_triple=inverse[: len(states)],
        triples=triples,
        alive_triple=inverse[len(states) : len(states) + rows],
        next_triple=inverse[len(states) + rows :],
        max_quarter=max_quarter,
    )


# ---------------------------------------------------------------- the pieces of the likelihood

@dataclass(frozen=True)
class MomentTerms:
    """The terms of :func:`log_p_moments` for a set of triples, laid out flat once (they do not depend on the parameters).

    Triple ``(x, a, b)`` has ``b + 1`` terms ``c = 0..b`` (one, c = 0, when ``b`` is
    ignored), stored contiguously from ``start``. A term's Beta function
    ``B(alpha + x + c, beta + a + b - c)`` needs gammaln at ``alpha + k_alpha``,
    ``beta + k_beta`` and ``alpha + beta + k_total``, integer offsets, so an
    evaluation computes the special functions once per offset and gathers.
    """

    start: np.ndarray
    owner: np.ndarray
    c: np.ndarray
    log_binomial: np.ndarray
    k_alpha: np.ndarray
    k_beta: np.ndarray
    k_total: np.ndarray

    @classmethod
    def of(cls, triples: np.ndarray, unmailed: bool = True) -> "MomentTerms":
        x, a, b = (np.asarray(triples[:, i], dtype=np.int64) for i in range(3))
        if not unmailed:
            b = np.zeros_like(b)
        length = b + 1
        start = np.zeros(len(b), dtype=np.int64)
        np.cumsum(length[:-1], out=start[1:])
        owner = np.repeat(np.arange(len(b)), length)
        c = np.arange(int(length.sum())) - start[owner]
        b_term = b[owner]
        log_binomial = special.gammaln(b_term + 1.0) - special.gammaln(c + 1.0) - special.gammaln(b_term - c + 1.0)
        return cls(
            start=start,
            owner=owner,
            c=c.astype(float),
            log_binomial=log_binomial,
            k_alpha=x[owner] + c,
            k_beta=(a + b)[owner] - c,
            k_total=(x + a + b)[owner],
        )

    @property
    def rows(self) -> int:
        return len(self.start)


def log_p_moments(
    triples: np.ndarray | MomentTerms, alpha: float, beta: float, rho: float | None, gradient: bool = False, hessian: bool = False
) -> np.ndarray | tuple[np.ndarray, ...]:
    """log E_p[p^x (1-p)^a (1-rho p)^b] under p ~ Beta(alpha, beta), for each row (x, a, b).

    Writing ``1 - rho p = (1 - p) + (1 - rho) p`` turns the integrand into a sum of
    ``b + 1`` Beta-type terms with positive coefficients::

        E = sum_c C(b, c) (1 - rho)^c B(alpha + x + c, beta + a + b - c) / B(alpha, beta)

    which is exact (as Gauss-Jacobi quadrature with ``n // 2 + 1`` nodes would be,
    the integrand being a polynomial of degree at most n) and free of cancellation.
    With ``rho`` None (no mailing history) b is 0 and only the c = 0 term remains.
    ``triples`` may be given already laid out as :class:`MomentTerms` (built with
    ``unmailed=False`` when rho is None). With ``gradient`` also returns the
    derivatives by (alpha, beta, rho), shape (rows, 3); with ``hessian`` as well
    the second derivatives, shape (rows, 3, 3).

    Each term is ``exp(t_c)`` with ``t_c`` linear in log-gamma functions and in
    ``log(1 - rho)``, so with the terms' shares ``pi_c`` the derivatives are
    ``sum pi_c t_c'`` and ``sum pi_c (t_c'' + t_c' t_c'^T) - (sum pi_c t_c')(sum pi_c t_c')^T``,
    less those of ``log B(alpha, beta)``.
    """
    layout = triples if isinstance(triples, MomentTerms) else MomentTerms.of(np.asarray(triples), unmailed=rho is not None)
    gradient = gradient or hessian
    if layout.rows == 0:
        empty = (np.zeros(0), np.zeros((0, 3)), np.zeros((0, 3, 3)))
        return empty[: 2 + hessian] if gradient else empty[0]
    if rho is None:
        rho = 1.0
    size = int(max(layout.k_alpha.max(), layout.k_beta.max(), layout.k_total.max())) + 1
    offsets = np.arange(size, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_share = np.where(layout.c == 0, 0.0, layout.c * np.log1p(-rho)) if rho < 1.0 else np.where(layout.c == 0, 0.0, -np.inf)
    log_gamma_alpha, log_gamma_beta = special.gammaln(alpha + offsets), special.gammaln(beta + offsets)
    log_gamma_total = special.gammaln(alpha + beta + offsets)
    terms = layout.log_binomial + log_share + log_gamma_alpha[layout.k_alpha] + log_gamma_beta[layout.k_beta] - log_gamma_total[layout.k_total]
    peak = np.maximum.reduceat(terms, layout.start)
    share = np.exp(terms - peak[layout.owner])
    total = np.add.reduceat(share, layout.start)
    # B(alpha, beta) from the same table entries, so that a triple (0, 0, 0) gives exactly 0.
    value = np.log(total) + peak - (log_gamma_alpha[0] + log_gamma_beta[0] - log_gamma_total[0])
    if not gradient:
        return value
    share /= total[layout.owner]
    psi = special.digamma
    psi_total = psi(alpha + beta + offsets)[layout.k_total]
    # Each term's derivatives by (alpha, beta, rho); rho enters only through (1 - rho)^c.
    term_d = [psi(alpha + offsets)[layout.k_alpha] - psi_total, psi(beta + offsets)[layout.k_beta] - psi_total]
    term_d.append(-layout.c / (1.0 - rho) if rho < 1.0 else np.zeros(len(layout.c)))
    mean_d = np.stack([np.add.reduceat(share * d, layout.start) for d in term_d], axis=1)
    normaliser = np.array([psi(alpha) - psi(alpha + beta), psi(beta) - psi(alpha + beta), 0.0])
    if not hessian:
        return value, mean_d - normaliser
    trigamma = functools.partial(special.polygamma, 1)
    tri_total = trigamma(alpha + beta + offsets)[layout.k_total]
    term_dd = {
        (0, 0): trigamma(alpha + offsets)[layout.k_alpha] - tri_total,
        (0, 1): -tri_total,
        (1, 1): trigamma(beta + offsets)[layout.k_beta] - tri_total,
        (2, 2): -layout.c / (1.0 - rho) ** 2 if rho < 1.0 else np.zeros(len(layout.c)),
    }
    curvature = np.empty((layout.rows, 3, 3))
    for i in range(3):
        for j in range(i, 3):
            inner = term_d[i] * term_d[j]
            if (i, j) in term_dd:
                inner = inner + term_dd[(i, j)]
            curvature[:, i, j] = curvature[:, j, i] = np.add.reduceat(share * inner, layout.start) - mean_d[:, i] * mean_d[:, j]
    tri_ab = trigamma(alpha + beta)
    curvature -= np.array([[trigamma(alpha) - tri_ab, -tri_ab, 0.0], [-tri_ab, trigamma(beta) - tri_ab, 0.0], [0.0, 0.0, 0.0]])
    return value, mean_d - normaliser, curvature


def log_survival(gamma: float, delta: float, quarters: np.ndarray) -> np.ndarray:
    """log E[(1-theta)^t] = log B(gamma, delta + t) - log B(gamma, delta): alive through quarter t."""
    return special.betaln(gamma, delta + quarters) - special.betaln(gamma, delta)


def log_death_after(gamma: float, delta: float, quarters: np.ndarray) -> np.ndarray:
    """log E[(1-theta)^t theta]: alive through quarter t, dead at the start of t + 1."""
    return special.betaln(gamma + 1.0, delta + quarters) - special.betaln(gamma, delta)


def _theta_vector(gamma: float, delta: float, max_quarter: int, gradient: bool = False, hessian: bool = False):
    """The theta factors indexed by ``Expansion.state_theta``; with ``gradient`` their derivatives by (gamma, delta),
    with ``hessian`` also their second derivatives, shape (factors, 2, 2)."""
    t = np.arange(max_quarter + 1, dtype=float)
    value = np.concatenate([log_death_after(gamma, delta, t), log_survival(gamma, delta, t)])
    if not (gradient or hessian):
        return value
    psi = special.digamma
    base_gamma = psi(gamma + delta) - psi(gamma)
    base_delta = psi(gamma + delta) - psi(delta)
    death_gamma = psi(gamma + 1) - psi(gamma + delta + t + 1) + base_gamma
    death_delta = psi(delta + t) - psi(gamma + delta + t + 1) + base_delta
    survive_gamma = psi(gamma) - psi(gamma + delta + t) + base_gamma
    survive_delta = psi(delta + t) - psi(gamma + delta + t) + base_delta
    first = np.stack([np.concatenate([death_gamma, survive_gamma]), np.concatenate([death_delta, survive_delta])], axis=1)
    if not hessian:
        return value, first
    # Second derivatives of log B(gamma + 1, delta + t) and log B(gamma, delta + t), less those of log B(gamma, delta).
    tri = functools.partial(special.polygamma, 1)
    base = tri(gamma + delta)
    death_end, survive_end = tri(gamma + delta + t + 1), tri(gamma + delta + t)
    gamma_gamma = np.concatenate([tri(gamma + 1) - death_end - tri(gamma) + base, base - survive_end])
    gamma_delta = np.concatenate([base - death_end, base - survive_end])
    delta_delta = np.concatenate([tri(delta + t) - death_end, tri(delta + t) - survive_end]) - tri(delta) + base
    second = np.stack([np.stack([gamma_gamma, gamma_delta], axis=1), np.stack([gamma_delta, delta_delta], axis=1)], axis=1)
    return value, first, second


def _log_unmailed_factor(hist: Histories, rho: float | None) -> np.ndarray:
    """rho ** x_unmailed in logs (0 for customers with no unprompted purchase)."""
    if rho is None:
        return np.zeros(hist.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(hist.x_unmailed > 0, hist.x_unmailed * np.log(rho), 0.0)


def _history_sums(expansion: Expansion, values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """log of each history's sum of exp(state values), and the scaled pieces needed for the gradient.

    All of a history's states share its x, so the values are shifted by the largest
    value of their x before exponentiating: no term that matters can underflow.
    Returns (log sums, exp of shifted state values, scaled sums).
    """
    hist = expansion.histories
    state_x = expansion.triples[expansion.state_triple, 0]
    shift = np.full(int(state_x.max()) + 1, -np.inf)
    np.maximum.at(shift, state_x, values)
    shift = np.where(np.isfinite(shift), shift, 0.0)
    scaled = np.exp(values - shift[state_x])
    sums = expansion.terms @ scaled
    with np.errstate(divide="ignore"):
        return np.log(sums) + shift[hist.x], scaled, sums


def _evaluate(expansion: Expansion, params: tuple, gradient: bool = False, hessian: bool = False):
    """Per-history log-likelihood and the log moments; with ``gradient``, the total's gradient by the parameters;
    with ``hessian``, also its Hessian.

    A history's log-likelihood is ``log sum_s exp(v_s) + u`` over its states s, with
    ``u = x_unmailed log rho``. With ``w_s`` the states' shares of the sum, its gradient
    is ``g = sum_s w_s v_s' + u'`` and its Hessian ``sum_s w_s (v_s'' + v_s' v_s'^T) - h h^T + u''``
    with ``h = sum_s w_s v_s'``. Summed over the customers, the first part needs only
    each state's total share, the second one more product of the sparse terms.
    """
    alpha, beta, gamma, delta, rho = params
    hist = expansion.histories
    if not (gradient or hessian):
        moments = log_p_moments(expansion.moments_layout(rho), alpha, beta, rho)
        theta = _theta_vector(gamma, delta, expansion.max_quarter)
        log_sums, _, _ = _history_sums(expansion, theta[expansion.state_theta] + moments[expansion.state_triple])
        return log_sums + _log_unmailed_factor(hist, rho), moments
    moments, d_moments, *dd_moments = log_p_moments(expansion.moments_layout(rho), alpha, beta, rho, gradient=True, hessian=hessian)
    theta, d_theta, *dd_theta = _theta_vector(gamma, delta, expansion.max_quarter, gradient=True, hessian=hessian)
    log_sums, scaled, sums = _history_sums(expansion, theta[expansion.state_theta] + moments[expansion.state_triple])
    # d log L_h / d value_s = terms[h, s] * exp(value_s) / L_h; weighted by the customers per history.
    with np.errstate(divide="ignore", invalid="ignore"):
        per_sum = np.where(sums > 0, 1.0 / sums, 0.0)
    weight = scaled * (expansion.terms.T @ (hist.count * per_sum))
    by_theta = np.bincount(expansion.state_theta, weights=weight, minlength=len(theta))
    by_triple = np.bincount(expansion.state_triple, weights=weight, minlength=len(moments))
    d_alpha, d_beta, d_rho = by_triple @ d_moments
    d_gamma, d_delta = by_theta @ d_theta
    unmailed = float(np.dot(hist.count, hist.x_unmailed))
    if rho is not None:
        d_rho += unmailed / rho
    row = log_sums + _log_unmailed_factor(hist, rho)
    grad = np.array([d_alpha, d_beta, d_gamma, d_delta, d_rho])
    if not hessian:
        return row, moments, grad
    # The states' derivatives by (alpha, beta, gamma, delta, rho): the moments give 0, 1 and 4, theta 2 and 3.
    by_moments, by_thetas = [0, 1, 4], [2, 3]
    d_state = np.zeros((len(weight), 5))
    d_state[:, by_moments] = d_moments[expansion.state_triple]
    d_state[:, by_thetas] = d_theta[expansion.state_theta]
    curvature = (d_state * weight[:, None]).T @ d_state
    curvature[np.ix_(by_moments, by_moments)] += np.tensordot(by_triple, dd_moments[0], axes=1)
    curvature[np.ix_(by_thetas, by_thetas)] += np.tensordot(by_theta, dd_theta[0], axes=1)
    # Each history's h, scaled by the square root of its customers: the sum of count * h h^T is one product.
    history_d = expansion.terms @ (d_state * scaled[:, None])
    history_d *= (per_sum * np.sqrt(hist.count))[:, None]
    curvature -= history_d.T @ history_d
    if rho is not None:
        curvature[4, 4] -= unmailed / rho**2
    return row, moments, grad, curvature


def history_log_likelihood(expansion: Expansion, params: tuple[float, float, float, float, float | None]) -> np.ndarray:
    """Exact log-likelihood of each distinct history."""
    return _evaluate(expansion, params)[0]


def total_log_likelihood(expansion: Expansion, params: tuple[float, float, float, float, float | None]) -> float:
    return float(np.dot(expansion.histories.count, history_log_likelihood(expansion, params)))


def total_gradient(expansion: Expansion, params: tuple[float, float, float, float, float | None]) -> tuple[float, np.ndarray]:
    """The total log-likelihood and its gradient by (alpha, beta, gamma, delta, rho)."""
    row, _, grad = _evaluate(expansion, params, gradient=True)
    return float(np.dot(expansion.histories.count, row)), grad


def total_hessian(expansion: Expansion, params: tuple[float, float, float, float, float | None]) -> tuple[float, np.ndarray, np.ndarray]:
    """The total log-likelihood, its gradient and its Hessian by (alpha, beta, gamma, delta, rho), exact.

    With rho None its row and column are zero.
    """
    row, _, grad, curvature = _evaluate(expansion, params, hessian=True)
    return float(np.dot(expansion.histories.count, row)), grad, curvature


# ---------------------------------------------------------------- fitting


def _unpack(theta: np.ndarray, mailing_history: bool) -> tuple[float, float, float, float, float | None]:
    alpha, beta, gamma, delta = np.exp(theta[:4])
    rho = float(theta[4]) if mailing_history else None
    return float(alpha), float(beta), float(gamma), float(delta), rho


def fit_churn(histories: Histories, mailing_history: bool) -> ChurnFit:
    """Maximum-likelihood fit of the hidden-churn model on compressed histories.

    The search runs on log-parameters (rho on [0, 1] directly): several
    deterministic starts each take a few L-BFGS-B steps, on the likelihood of a
    fixed random sample of the customers when there are many; the best is
    followed to convergence there and finished by Newton steps on the exact
    likelihood of all of them (see :mod:`lapsewise.optimum`). Standard errors come
    from the observed information, the exact Hessian of the log-likelihood
    (:func:`total_hessian`), which also steers the Newton steps. The cost grows
    with the number of distinct histories, not customers.

    References
    ----------
    Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
    with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
    """
    expansion = expand(histories)
    customers = int(histories.count.sum())
    bounds = [_LOG_BOUNDS] * 4 + ([_RHO_BOUNDS] if mailing_history else [])
    objective = _objective(expansion, mailing_history)
    stand_in = None
    if histories.size > optimum.STAND_IN_CUSTOMERS:
        stand_in = _objective(expand(_sample(histories, optimum.STAND_IN_CUSTOMERS)), mailing_history)
    starts = [np.append(np.log(start[:4]), start[4:] if mailing_history else []) for start in _STARTS]
    best = optimum.maximize(objective, starts, bounds, customers, _SCOUT_STEPS, stand_in, _curvature(expansion, mailing_history))
    params = _unpack(best.x, mailing_history)
    names = PARAMETERS if mailing_history else PARAMETERS[:4]
    on_bound = _on_bounds(best.x, bounds, names)
    warnings = [f"{name} sits on the bound of its range; its value and standard error are not reliable" for name in on_bound]
    unidentified = []
    if mailing_history and not _has_unmailed_quarter(histories):
        unidentified.append("rho")
        warnings.append("no customer has an unmailed quarter, so rho is not identified by the data")
    free = [name not in on_bound + unidentified for name in names]
    errors = optimum.standard_errors(best.hessian, best.x, customers, logged=[name != "rho" for name in names], free=free)
    repeaters = int(histories.count[histories.x > 0].sum())
    if repeaters < 100:
        warnings.append(f"only {repeaters} customers have a repeat purchase; the estimates rest on thin data")
    if not best.converged:
        warnings.append(f"the optimiser did not report convergence ({best.message})")
    return ChurnFit(
        alpha=params[0],
        beta=params[1],
        gamma=params[2],
        delta=params[3],
        rho=params[4],
        std_errors=dict(zip(names, errors)),
        log_likelihood=-best.fun * customers,
        customers=customers,
        histories=histories.size,
        converged=best.converged,
        warnings=tuple(warnings),
    )


def _objective(expansion: Expansion, mailing_history: bool) -> optimum.Objective:
    """The negative log-likelihood per customer of the expanded histories and its gradient, in search coordinates."""
    scale = 1.0 / max(float(expansion.histories.count.sum()), 1.0)

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        params = _unpack(theta, mailing_history)
        value, grad = total_gradient(expansion, params)
        if not np.isfinite(value):
            return 1e10, np.zeros_like(theta)
        chain = np.array(params[:4]) * grad[:4]  # d/d log(parameter)
        if mailing_history:
            chain = np.append(chain, grad[4])
        return -value * scale, -chain * scale

    return objective


def _curvature(expansion: Expansion, mailing_history: bool) -> Callable[[np.ndarray], np.ndarray]:
    """The exact Hessian of :func:`_objective` in search coordinates (log-parameters, rho itself)."""
    scale = 1.0 / max(float(expansion.histories.count.sum()), 1.0)
    free = 5 if mailing_history else 4

    def curvature(theta: np.ndarray) -> np.ndarray:
        params = _unpack(theta, mailing_history)
        _, grad, second = total_hessian(expansion, params)
        # d/d log p = p d/dp, so d2/(d log p_i d log p_j) = p_i p_j d2/(dp_i dp_j) + [i = j] p_i d/dp_i.
        chain = np.append(params[:4], [1.0] * (free - 4))
        result = chain[:, None] * second[:free, :free] * chain[None, :]
        result[range(4), range(4)] += chain[:4] * grad[:4]
        return -result * scale

    return curvature


def _sample(histories: Histories, size: int) -> Histories:
    """The histories of ``size`` customers drawn at random (seeded, so the fit is deterministic).

    Each history's count becomes its draws times ``customers / size``, so the
    sample's log-likelihood per customer estimates the whole base's without bias.
    """
    customers = float(histories.count.sum())
    draws = np.random.default_rng(0).choice(histories.size, size=size, p=histories.count / customers)
    rows, drawn = np.unique(draws, return_counts=True)
    return Histories(
        **{name: getattr(histories, name)[rows] for name in ("x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent", "after_last")},
        count=drawn * (customers / size),
        inverse=np.arange(len(rows)),
    )


def _has_unmailed_quarter(histories: Histories) -> bool:
    after_unmailed = histories.after_last.sum(axis=1) < histories.silent_quarters
    return bool(((histories.unmailed_silent > 0) | (histories.x_unmailed > 0) | after_unmailed).any())


def _on_bounds(theta: np.ndarray, bounds: list[tuple[float, float]], names: tuple[str, ...]) -> list[str]:
    hits = []
    for value, (low, high), name in zip(theta, bounds, names):
        if name == "rho":
            if value <= low + 1e-4 or value >= high - 1e-4:
                hits.append(name)
        elif value <= low + 1e-3 or value >= high - 1e-3:
            hits.append(name)
    return hits


# ---------------------------------------------------------------- posterior quantities


@dataclass(frozen=True)
class Posterior:
    """Per-history posterior quantities at the as-of quarter n.

    ``p_alive`` is the probability of being alive in quarter n + 1 (FHB 2010's
    definition); ``p_buy`` the probability of a purchase in quarter n + 1 if
    mailed; ``log_likelihood`` the history's log-likelihood; ``log_buy_factor``
    the log of ``rho^x_u E_p[p^(x+1) (1-p)^a_n (1-rho p)^b_n] / L``, which times
    ``E[(1-theta)^(n+h)]`` (and times rho if unmailed) is the chance of a
    purchase in quarter n + h. ``alive_now`` is the chance of being alive through
    quarter n itself, the weight the stop-rule program starts from.
    """

    p_alive: np.ndarray
    p_buy: np.ndarray
    log_likelihood: np.ndarray
    log_buy_factor: np.ndarray
    n: np.ndarray
    alive_now: np.ndarray


def fit_params(fit: ChurnFit) -> tuple[float, float, float, float, float | None]:
    return fit.alpha, fit.beta, fit.gamma, fit.delta, fit.rho


def posterior(fit: ChurnFit, histories: Histories) -> Posterior:
    """P(alive), P(buy next quarter if mailed) and the log-likelihood of each distinct history."""
    expansion = expand(histories)
    log_l, moments = _evaluate(expansion, fit_params(fit))
    unmailed = _log_unmailed_factor(histories, fit.rho)
    n = histories.n.astype(float)
    next_survival = log_survival(fit.gamma, fit.delta, n + 1)
    log_alive = next_survival + unmailed + moments[expansion.alive_triple] - log_l
    log_alive_now = log_survival(fit.gamma, fit.delta, n) + unmailed + moments[expansion.alive_triple] - log_l
    log_buy_factor = unmailed + moments[expansion.next_triple] - log_l
    return Posterior(
        p_alive=np.exp(log_alive),
        p_buy=np.exp(next_survival + log_buy_factor),
        log_likelihood=log_l,
        log_buy_factor=log_buy_factor,
        n=histories.n,
        alive_now=np.exp(log_alive_now),
    )


def expected_purchases(fit: ChurnFit, post: Posterior, quarters: int) -> np.ndarray:
    """Expected purchases in quarters n+1 .. n+quarters if mailed every quarter."""
    h = np.arange(1, quarters + 1)[None, :]
    survival = np.exp(log_survival(fit.gamma, fit.delta, post.n[:, None] + h))
    return np.exp(post.log_buy_factor) * survival.sum(axis=1)


def dert(fit: ChurnFit, post: Posterior, discount_rate: float) -> np.ndarray:
    """Discounted expected residual transactions (FHB 2010) if mailed every quarter, per-quarter rate d.

    ``DERT = sum_{h>=1} P(purchase in n + h) / (1 + d)^h``, summed in closed form:
    ``B(gamma, delta + n + 1) / B(gamma, delta) / (1 + d) * 2F1(1, delta + n + 1; gamma + delta + n + 1; 1 / (1 + d))``
    times the buy factor.

    References
    ----------
    Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
    with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
    """
    n = post.n.astype(float)
    head = log_survival(fit.gamma, fit.delta, n + 1) - math.log1p(discount_rate)
    series = special.hyp2f1(1.0, fit.delta + n + 1, fit.gamma + fit.delta + n + 1, 1.0 / (1.0 + discount_rate))
    return np.exp(post.log_buy_factor + head) * series


# ---------------------------------------------------------------- the return curve


def mailed_silent_histories(x: np.ndarray, t_x: np.ndarray, silent: np.ndarray) -> Histories:
    """Histories of customers mailed every quarter: x repeat purchases, last in t_x, then ``silent`` mailed silent quarters."""
    x, t_x, silent = (np.asarray(v, dtype=np.int64) for v in (x, t_x, silent))
    width = max(int(silent.max()), 1)
    arrays = {
        "x": x,
        "x_unmailed": np.zeros_like(x),
        "t_x": t_x,
        "n": t_x + silent,
        "mailed_silent": t_x - x,
        "unmailed_silent": np.zeros_like(x),
        "after_last": (np.arange(width)[None, :] < silent[:, None]).astype(np.uint8),
    }
    return compress_arrays(arrays)


def return_curve(fit: ChurnFit, x: int, t_x: int, max_silent: int) -> tuple[np.ndarray, np.ndarray]:
    """P(alive) and P(buy next quarter) after k = 0..max_silent further mailed quarters without a purchase."""
    k = np.arange(max_silent + 1)
    hist = mailed_silent_histories(np.full(k.shape, x), np.full(k.shape, t_x), k)
    post = posterior(fit, hist)
    return post.p_alive[hist.inverse], post.p_buy[hist.inverse]
