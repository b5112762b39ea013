"""The mailing-aware hidden-churn likelihood and its maximum-likelihood fit.

The process is described in :mod:`lapsewise.model.process`. The likelihood is
exact. Summing over the quarter ``tau`` through which the customer stayed alive
(``t_x <= tau <= n``)::

    L = sum_tau  E_theta[(1-theta)^tau * theta^(tau<n)]  *  rho^x_u * E_p[p^x (1-p)^a_tau (1-rho p)^b_tau]

where ``a_tau`` and ``b_tau`` count the mailed and unmailed silent quarters up
to ``tau`` and ``x_u`` the purchases in unmailed quarters. The theta factor is a
ratio of Beta functions and the p factor a finite sum of Beta-function ratios
(both in :mod:`lapsewise.model.moments`); with every quarter mailed the p factor
is the single ratio ``B(alpha + x, beta + a) / B(alpha, beta)``.

References
----------
Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy import sparse

from lapsewise.data.codes import integer_codes
from lapsewise.data.histories import Histories
from lapsewise.model import optimum
from lapsewise.model.moments import MomentTerms, history_sums, log_p_moments, theta_factors
from lapsewise.model.process import Process
from lapsewise.model.uncertainty import Covariance

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
    seasons : tuple of 4 floats or None
        Multipliers of the purchase probability by quarter of the (fiscal) year, the
        largest 1 (:mod:`lapsewise.model.seasons`); None when not fitted.
    season_test : dict or None
        The likelihood-ratio test of the seasons against none: ``statistic``,
        ``degrees_of_freedom``, ``p_value``, ``log_likelihood_without``.
    covariance : Covariance or None
        The free parameters' asymptotic covariance on unconstrained scales
        (:mod:`lapsewise.model.uncertainty`); None in model files written before it was kept.
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
    seasons: tuple[float, float, float, float] | None = None
    season_test: dict | None = None
    covariance: Covariance | None = None

    @classmethod
    def of(cls, process: Process, **facts) -> "ChurnFit":
        """A fit with the parameters of ``process`` (its seasons included) and the other fields from ``facts``."""
        return cls(alpha=process.alpha, beta=process.beta, gamma=process.gamma, delta=process.delta, rho=process.rho, seasons=process.seasons, **facts)

    @property
    def process(self) -> Process:
        """The fitted process (the estimates without their errors)."""
        return Process(self.alpha, self.beta, self.gamma, self.delta, self.rho, self.seasons)

    @property
    def mailing_history(self) -> bool:
        return self.rho is not None

    @property
    def unmailed_response(self) -> float:
        """rho, or 1.0 when every quarter counts as mailed."""
        return self.process.unmailed_response

    def to_dict(self) -> dict:
        return {
            "alpha": self.alpha,
            "beta": self.beta,
            "gamma": self.gamma,
            "delta": self.delta,
            "rho": self.rho,
            "std_errors": dict(self.std_errors),
            "log_likelihood": self.log_likelihood if math.isfinite(self.log_likelihood) else None,
            "customers": self.customers,
            "histories": self.histories,
            "converged": self.converged,
            "warnings": list(self.warnings),
            "seasons": [1.0] * 4 if self.seasons is None else list(self.seasons),
            "season_test": None if self.season_test is None else dict(self.season_test),
            "covariance": None if self.covariance is None else self.covariance.to_dict(),
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
            log_likelihood=float("nan") if data.get("log_likelihood") is None else float(data["log_likelihood"]),
            customers=int(data.get("customers", 0)),
            histories=int(data.get("histories", 0)),
            converged=bool(data.get("converged", True)),
            warnings=tuple(data.get("warnings", ())),
            seasons=_seasons_or_none(data.get("seasons")),
            season_test=None if data.get("season_test") is None else dict(data["season_test"]),
            covariance=Covariance.from_dict(data.get("covariance")),
        )


def _seasons_or_none(seasons) -> tuple[float, float, float, float] | None:
    """The model file's seasons as a tuple; None when absent or all 1 (a model without seasons)."""
    if seasons is None or all(float(v) == 1.0 for v in seasons):
        return None
    return tuple(float(v) for v in seasons)


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
    def moment_terms(self) -> MomentTerms:
        """The triples' moment terms, laid out once for every evaluation of a fit."""
        return MomentTerms.of(self.triples)

    @functools.cached_property
    def moment_terms_all_mailed(self) -> MomentTerms:
        """The same with every quarter counted as mailed (rho None)."""
        return MomentTerms.of(self.triples, unmailed=False)

    def moments_layout(self, rho: float | None) -> MomentTerms:
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

def log_unmailed_factor(hist: Histories, rho: float | None) -> np.ndarray:
    """rho ** x_unmailed in logs (0 for customers with no unprompted purchase)."""
    if rho is None:
        return np.zeros(hist.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(hist.x_unmailed > 0, hist.x_unmailed * np.log(rho), 0.0)


def evaluate(expansion: Expansion, process: Process, gradient: bool = False, hessian: bool = False):
    """Per-history log-likelihood and the log moments; with ``gradient``, the total's gradient by the parameters;
    with ``hessian``, also its Hessian.

    A history's log-likelihood is ``log sum_s exp(v_s) + u`` over its states s, with
    ``u = x_unmailed log rho``. With ``w_s`` the states' shares of the sum, its gradient
    is ``g = sum_s w_s v_s' + u'`` and its Hessian ``sum_s w_s (v_s'' + v_s' v_s'^T) - h h^T + u''``
    with ``h = sum_s w_s v_s'``. Summed over the customers, the first part needs only
    each state's total share, the second one more product of the sparse terms.
    """
    alpha, beta, gamma, delta, rho = process.alpha, process.beta, process.gamma, process.delta, process.rho
    hist = expansion.histories
    if not (gradient or hessian):
        moments = log_p_moments(expansion.moments_layout(rho), alpha, beta, rho)
        theta = theta_factors(gamma, delta, expansion.max_quarter)
        log_sums, _, _ = history_sums(expansion.terms, expansion.triples[expansion.state_triple, 0], hist.x, theta[expansion.state_theta] + moments[expansion.state_triple])
        return log_sums + log_unmailed_factor(hist, rho), moments
    moments, d_moments, *dd_moments = log_p_moments(expansion.moments_layout(rho), alpha, beta, rho, gradient=True, hessian=hessian)
    theta, d_theta, *dd_theta = theta_factors(gamma, delta, expansion.max_quarter, gradient=True, hessian=hessian)
    log_sums, scaled, sums = history_sums(expansion.terms, expansion.triples[expansion.state_triple, 0], hist.x, theta[expansion.state_theta] + moments[expansion.state_triple])
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
    row = log_sums + log_unmailed_factor(hist, rho)
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


def history_log_likelihood(expansion: Expansion, process: Process) -> np.ndarray:
    """Exact log-likelihood of each distinct history."""
    return evaluate(expansion, process)[0]


def total_log_likelihood(expansion: Expansion, process: Process) -> float:
    return float(np.dot(expansion.histories.count, history_log_likelihood(expansion, process)))


def total_gradient(expansion: Expansion, process: Process) -> tuple[float, np.ndarray]:
    """The total log-likelihood and its gradient by (alpha, beta, gamma, delta, rho)."""
    row, _, grad = evaluate(expansion, process, gradient=True)
    return float(np.dot(expansion.histories.count, row)), grad


def total_hessian(expansion: Expansion, process: Process) -> tuple[float, np.ndarray, np.ndarray]:
    """The total log-likelihood, its gradient and its Hessian by (alpha, beta, gamma, delta, rho), exact.

    With rho None its row and column are zero.
    """
    row, _, grad, curvature = evaluate(expansion, process, hessian=True)
    return float(np.dot(expansion.histories.count, row)), grad, curvature


# ---------------------------------------------------------------- fitting


def _unpack(theta: np.ndarray, mailing_history: bool) -> Process:
    """The process at search coordinates (log alpha, log beta, log gamma, log delta[, rho])."""
    alpha, beta, gamma, delta = np.exp(theta[:4])
    rho = float(theta[4]) if mailing_history else None
    return Process(float(alpha), float(beta), float(gamma), float(delta), rho)


def fit_churn(histories: Histories, mailing_history: bool) -> ChurnFit:
    """Maximum-likelihood fit of the hidden-churn model on compressed histories.

    The search runs on log-parameters (rho on [0, 1] directly): several
    deterministic starts each take a few L-BFGS-B steps, on the likelihood of a
    fixed random sample of the customers when there are many; the best is
    followed to convergence there and finished by Newton steps on the exact
    likelihood of all of them (see :mod:`lapsewise.model.optimum`). Standard errors come
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
        stand_in = _objective(expand(sample_histories(histories, optimum.STAND_IN_CUSTOMERS)), mailing_history)
    starts = [np.append(np.log(start[:4]), start[4:] if mailing_history else []) for start in _STARTS]
    best = optimum.minimize(objective, starts, bounds, customers, _SCOUT_STEPS, stand_in, _curvature(expansion, mailing_history))
    fitted = _unpack(best.x, mailing_history)
    names = PARAMETERS if mailing_history else PARAMETERS[:4]
    on_bound = on_bounds(best.x, bounds, names)
    warnings = bound_warnings(on_bound)
    unidentified = []
    if mailing_history and not has_unmailed_quarter(histories):
        unidentified.append("rho")
        warnings.append("no customer has an unmailed quarter, so rho is not identified by the data")
    free = [name not in on_bound + unidentified for name in names]
    logged = [name != "rho" for name in names]
    errors = optimum.standard_errors(best.hessian, best.x, customers, logged=logged, free=free)
    repeaters = int(histories.count[histories.x > 0].sum())
    if repeaters < 100:
        warnings.append(f"only {repeaters} customers have a repeat purchase; the estimates rest on thin data")
    if not best.converged:
        warnings.append(f"the optimiser did not report convergence ({best.message})")
    return ChurnFit.of(
        fitted,
        std_errors=dict(zip(names, errors)),
        log_likelihood=-best.fun * customers,
        customers=customers,
        histories=histories.size,
        converged=best.converged,
        warnings=tuple(warnings),
        covariance=fit_covariance(best.hessian, customers, names, fitted, logged, free),
    )


def fit_covariance(curvature, customers: float, names, process: Process, logged, free) -> Covariance | None:
    """The free parameters' covariance on unconstrained scales from the search's curvature (None when it has none)."""
    matrix = optimum.covariance(curvature, customers, free)
    if matrix is None:
        return None
    kept = [i for i, is_free in enumerate(free) if is_free]
    values = [parameter_value(process, names[i]) for i in kept]
    return Covariance.from_search([names[i] for i in kept], values, matrix, [logged[i] for i in kept])


def parameter_value(process: Process, name: str) -> float:
    """A parameter of the process by its name in the model file (``season_1`` to ``season_4`` for the multipliers)."""
    if name.startswith("season_"):
        return float(process.seasons[int(name[-1]) - 1])
    return float(getattr(process, name))


def _objective(expansion: Expansion, mailing_history: bool) -> optimum.Objective:
    """The negative log-likelihood per customer of the expanded histories and its gradient, in search coordinates."""
    scale = 1.0 / max(float(expansion.histories.count.sum()), 1.0)

    def objective(theta: np.ndarray) -> tuple[float, np.ndarray]:
        process = _unpack(theta, mailing_history)
        value, grad = total_gradient(expansion, process)
        if not np.isfinite(value):
            return 1e10, np.zeros_like(theta)
        chain = np.array([process.alpha, process.beta, process.gamma, process.delta]) * grad[:4]  # d/d log(parameter)
        if mailing_history:
            chain = np.append(chain, grad[4])
        return -value * scale, -chain * scale

    return objective


def _curvature(expansion: Expansion, mailing_history: bool) -> Callable[[np.ndarray], np.ndarray]:
    """The exact Hessian of :func:`_objective` in search coordinates (log-parameters, rho itself)."""
    scale = 1.0 / max(float(expansion.histories.count.sum()), 1.0)
    free = 5 if mailing_history else 4

    def curvature(theta: np.ndarray) -> np.ndarray:
        process = _unpack(theta, mailing_history)
        _, grad, second = total_hessian(expansion, process)
        # d/d log p = p d/dp, so d2/(d log p_i d log p_j) = p_i p_j d2/(dp_i dp_j) + [i = j] p_i d/dp_i.
        chain = np.append([process.alpha, process.beta, process.gamma, process.delta], [1.0] * (free - 4))
        result = chain[:, None] * second[:free, :free] * chain[None, :]
        result[range(4), range(4)] += chain[:4] * grad[:4]
        return -result * scale

    return curvature


def sample_histories(histories: Histories, size: int) -> Histories:
    """The histories of ``size`` customers drawn at random (seeded, so the fit is deterministic).

    Each history's count becomes its draws times ``customers / size``, so the
    sample's log-likelihood per customer estimates the whole base's without bias.
    """
    customers = float(histories.count.sum())
    draws = np.random.default_rng(0).choice(histories.size, size=size, p=histories.count / customers)
    rows, drawn = np.unique(draws, return_counts=True)
    kept = {f.name: getattr(histories, f.name) for f in dataclasses.fields(histories) if f.name not in ("count", "inverse")}
    return Histories(
        **{name: None if value is None else value[rows] for name, value in kept.items()},
        count=drawn * (customers / size),
        inverse=np.arange(len(rows)),
    )


def has_unmailed_quarter(histories: Histories) -> bool:
    after_unmailed = histories.after_last.sum(axis=1) < histories.silent_quarters
    return bool(((histories.unmailed_silent > 0) | (histories.x_unmailed > 0) | after_unmailed).any())


def bound_warnings(names: list[str]) -> list[str]:
    """The warning for each parameter that ended on the bound of its search range."""
    return [f"{name} sits on the bound of its range; its value and standard error are not reliable" for name in names]


def on_bounds(theta: np.ndarray, bounds: list[tuple[float, float]], names: tuple[str, ...]) -> list[str]:
    hits = []
    for value, (low, high), name in zip(theta, bounds, names):
        if name == "rho" or name.startswith("season"):
            if value <= low + 1e-4 or value >= high - 1e-4:
                hits.append(name)
        elif value <= low + 1e-3 or value >= high - 1e-3:
            hits.append(name)
    return hits

