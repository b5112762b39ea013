"""The p-moments and survival terms of the hidden-churn model: one place for the likelihood and the program.

Two kinds of expectation make up every probability the model gives:

* the **p-moment** ``M(x, a, b) = E_p[p^x (1-p)^a (1-rho p)^b]`` under
  ``p ~ Beta(alpha, beta)``: the chance of x purchases, a mailed silent quarters
  and b unmailed silent quarters, the purchases' rho factors aside;
* the **survival terms** ``E_theta[(1-theta)^t]`` (alive through quarter t) and
  ``E_theta[(1-theta)^t theta]`` (alive through t, gone at the start of t + 1)
  under ``theta ~ Beta(gamma, delta)``: ratios of Beta functions.

The likelihood needs the p-moment at a scattered set of (x, a, b) with its
derivatives (:func:`log_p_moments`, a finite sum of Beta-function ratios); the
stop-rule program needs it on a whole grid (:func:`log_moment_grid`, by a
recursion). The two are the same quantity, and the tests check that they agree.

References
----------
Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from lapsewise.model.process import Process

# ---------------------------------------------------------------- the p-moment at scattered states (the likelihood)

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



# ---------------------------------------------------------------- the p-moment on a grid (the program)


def log_moment_grid(process: Process, n_max: int, b_max: int, x_max: int | None = None) -> np.ndarray:
    """``log E[p^x (1-p)^a (1-rho p)^b]`` on the grid ``[b, x, n]`` with ``a = n - x - b``.

    Built by the recursion ``M(x, a, b+1) = M(x, a+1, b) + (1 - rho) M(x+1, a, b)``
    (from ``1 - rho p = (1 - p) + (1 - rho) p``), which has no cancellation, from
    ``M(x, a, 0) = B(alpha + x, beta + a) / B(alpha, beta)``. x runs to ``x_max``
    (default ``n_max + 1``).
    """
    columns = n_max + 2 if x_max is None else min(n_max + 2, x_max + 1)
    size = n_max + b_max + 2
    x = np.arange(size)[:, None]
    a = np.arange(size)[None, :]
    layer = special.betaln(process.alpha + x, process.beta + a) - special.betaln(process.alpha, process.beta)
    log_rest = math.log1p(-process.rho) if process.rho < 1 else -np.inf
    grid = np.full((n_max + 1, columns, b_max + 1), -np.inf)
    n = np.arange(n_max + 1)[:, None]
    xs = np.arange(columns)[None, :]
    for b in range(b_max + 1):
        a_index = n - xs - b
        valid = a_index >= 0
        grid[:, :, b] = np.where(valid, layer[np.minimum(xs, size - 1), np.clip(a_index, 0, size - 1)], -np.inf)
        if b < b_max:
            layer = np.logaddexp(layer[:-1, 1:], log_rest + layer[1:, :-1])
            layer = np.pad(layer, ((0, 1), (0, 1)), constant_values=-np.inf)
    return np.ascontiguousarray(grid.transpose(2, 1, 0))


# ---------------------------------------------------------------- a history's sum of terms


def history_sums(terms, term_x: np.ndarray, history_x: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """log of each history's sum of exp(term values), and the scaled pieces needed for a gradient.

    ``terms`` is the sparse histories-by-terms matrix of a likelihood's expansion,
    ``term_x`` the repeat purchases of each term's state. All of a history's terms
    share its x, so the values are shifted by the largest value of their x before
    exponentiating: no term that matters can underflow.
    Returns (log sums, exp of shifted term values, scaled sums).
    """
    shift = np.full(int(term_x.max()) + 1, -np.inf)
    np.maximum.at(shift, term_x, values)
    shift = np.where(np.isfinite(shift), shift, 0.0)
    scaled = np.exp(values - shift[term_x])
    sums = terms @ scaled
    with np.errstate(divide="ignore"):
        return np.log(sums) + shift[history_x], scaled, sums


# ---------------------------------------------------------------- survival


def log_survival(gamma: float, delta: float, quarters: np.ndarray) -> np.ndarray:
    """log E[(1-theta)^t] = log B(gamma, delta + t) - log B(gamma, delta): alive through quarter t."""
    return special.betaln(gamma, delta + quarters) - special.betaln(gamma, delta)


def log_death_after(gamma: float, delta: float, quarters: np.ndarray) -> np.ndarray:
    """log E[(1-theta)^t theta]: alive through quarter t, dead at the start of t + 1."""
    return special.betaln(gamma + 1.0, delta + quarters) - special.betaln(gamma, delta)


def theta_factors(gamma: float, delta: float, max_quarter: int, gradient: bool = False, hessian: bool = False):
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


def log_alive_ahead(gamma: float, delta: float, quarters: int, steps: int) -> np.ndarray:
    """``log P(alive through n + i | alive through n)`` on the grid ``[n, i]``, n = 0..quarters-1, i = 0..steps.

    Alive through n, theta is ``Beta(gamma, delta + n)``, so the chance of lasting i
    more quarters is ``B(gamma, delta + n + i) / B(gamma, delta + n)``.
    """
    n = np.arange(quarters)[:, None]
    i = np.arange(steps + 1)[None, :]
    return special.betaln(gamma, delta + n + i) - special.betaln(gamma, delta + n)
