"""The maximum-likelihood search both fits share: scouting starts, convergence, a Newton finish, the observed information.

A fit hands over an *objective*: the negative log-likelihood per customer as a
function of its search coordinates (logarithms of positive parameters, shares
directly), returning the value and the exact gradient. :func:`minimize`

1. lets every start take a few L-BFGS-B steps and follows the most promising
   one to convergence, on a cheaper stand-in for the objective when the fit has
   one (the likelihood of a sample of the customers);
2. finishes with Newton steps on the objective itself, with the objective's
   exact Hessian when the fit supplies one (the churn fit does) and otherwise
   forward differences of the exact gradient (the order-value fit). From a
   point near the optimum Newton converges in two or three steps where
   L-BFGS-B takes dozens, and its last Hessian is the observed information the
   standard errors need. Should a Newton step fail (a Hessian that is not
   positive definite, a bound in the way, no decrease), L-BFGS-B takes over
   from the best point reached.

The search stops when the Newton decrement says the log-likelihood summed over
all customers is within ``TOLERANCE`` of its maximum.

Everything here runs with one BLAS thread (see :func:`maximize`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from scipy import linalg, optimize
from threadpoolctl import threadpool_limits

Objective = Callable[[np.ndarray], tuple[float, np.ndarray]]

STAND_IN_CUSTOMERS = 20_000
"""Customers in the stand-in sample a fit scouts on when it has more than this many."""

TOLERANCE = 1e-6
"""Stop when the summed log-likelihood is within this of its maximum (by the quadratic model of Newton's method)."""

_HESSIAN_STEP = 1e-5
_NEWTON_STEPS = 12
_NEAR = {"maxiter": 1000, "ftol": 1e-11, "gtol": 1e-7}  # close enough for Newton to finish
_FINISH = {"maxiter": 2000, "ftol": 1e-14, "gtol": 1e-9}


@dataclass(frozen=True)
class Optimum:
    """Where the search ended.

    Attributes
    ----------
    x : numpy.ndarray
        The search coordinates at the optimum.
    fun : float
        The objective there (negative log-likelihood per customer).
    hessian : numpy.ndarray or None
        Hessian of the objective at ``x`` (exact, or by forward differences of its
        gradient); None when it could not be computed (a coordinate with no room
        on either side).
    converged : bool
    message : str
        Why the search stopped, for a warning when it did not converge.
    """

    x: np.ndarray
    fun: float
    hessian: np.ndarray | None
    converged: bool
    message: str


def minimize(
    objective: Objective,
    starts: Sequence[np.ndarray],
    bounds: Sequence[tuple[float, float]],
    customers: float,
    scout_steps: int,
    stand_in: Objective | None = None,
    exact_hessian: Callable[[np.ndarray], np.ndarray] | None = None,
    projected: bool = False,
) -> Optimum:
    """Minimise ``objective`` (a negative log-likelihood per customer) over the box ``bounds``.

    ``customers`` converts the per-customer objective to the summed
    log-likelihood that :data:`TOLERANCE` is stated in. ``stand_in``, when given,
    is a cheaper approximation of ``objective`` used for the scouting and the
    first convergence. ``exact_hessian``, when given, is the objective's Hessian
    as a function of the search coordinates; otherwise the Hessian is taken by
    forward differences of the gradient (:func:`hessian`). With ``projected`` the
    Newton steps keep to the box: a step is clipped to it, and a coordinate at a
    bound whose gradient points out of the box is held there (its row and column
    of the Hessian left out of the step), so an optimum on a bound is reached by
    Newton steps too instead of by the L-BFGS-B fallback.

    The search runs with one BLAS thread. Its dense algebra is on 3x3 to 5x5
    matrices, and each L-BFGS-B step would otherwise wake a pool of BLAS threads,
    which costs many times the step itself (see ``tests/bench/README.md``). The
    limit is the whole process's, so two searches must not run in two threads at
    once (the first to finish would restore the pool under the other).
    """
    def hessian_at(x: np.ndarray, gradient: np.ndarray) -> np.ndarray | None:
        return exact_hessian(x) if exact_hessian is not None else hessian(objective, x, gradient, bounds)

    with threadpool_limits(limits=1, user_api="blas"):
        rough = stand_in or objective
        scouts = [
            optimize.minimize(rough, np.asarray(start, dtype=float), jac=True, method="L-BFGS-B", bounds=bounds, options={"maxiter": scout_steps})
            for start in starts
        ]
        finite = [scout for scout in scouts if np.isfinite(scout.fun)] or scouts
        lead = min(finite, key=lambda result: result.fun)
        near = optimize.minimize(rough, lead.x, jac=True, method="L-BFGS-B", bounds=bounds, options=_NEAR)
        approximate = None
        if stand_in is not None:
            approximate = hessian(stand_in, near.x, near.jac, bounds)
        finished = _newton(objective, hessian_at, near.x, bounds, customers, approximate, projected)
        if finished is not None:
            return finished
        # Newton could not finish (a bound in the way, or a Hessian that is not positive definite):
        # L-BFGS-B goes on from the best point, restarted once should its line search stall at the optimum.
        best = optimize.minimize(objective, near.x, jac=True, method="L-BFGS-B", bounds=bounds, options=_FINISH)
        if not best.success:
            again = optimize.minimize(objective, best.x, jac=True, method="L-BFGS-B", bounds=bounds, options=_FINISH)
            if again.fun <= best.fun:
                best = again
        return Optimum(
            x=best.x,
            fun=float(best.fun),
            hessian=hessian_at(best.x, best.jac),
            converged=bool(best.success),
            message=str(best.message),
        )


def hessian(objective: Objective, x: np.ndarray, gradient: np.ndarray, bounds: Sequence[tuple[float, float]]) -> np.ndarray | None:
    """The Hessian of ``objective`` at ``x`` by forward differences of its exact gradient, symmetrised.

    Each coordinate steps by ``1e-5`` of its size (at least ``1e-5``), towards
    the side of its bounds with room; None when neither side has room.
    """
    steps = np.array([_HESSIAN_STEP * max(abs(value), 1.0) for value in x])
    for i, (low, high) in enumerate(bounds):
        if x[i] + steps[i] > high:
            steps[i] = -steps[i]
            if x[i] + steps[i] < low:
                return None
    columns = np.empty((len(x), len(x)))
    for i, step in enumerate(steps):
        moved = x.copy()
        moved[i] += step
        columns[:, i] = (objective(moved)[1] - gradient) / step
    return (columns + columns.T) / 2


def _newton(
    objective: Objective,
    hessian_at: Callable[[np.ndarray, np.ndarray], np.ndarray | None],
    x: np.ndarray,
    bounds: Sequence[tuple[float, float]],
    customers: float,
    curvature: np.ndarray | None = None,
    projected: bool = False,
) -> Optimum | None:
    """Newton steps with a backtracking line search; None when a step fails (the caller falls back).

    ``curvature``, when given, is an approximate Hessian (the stand-in's) that the
    steps use until the decrement it gives is below tolerance; the exact Hessian
    is then taken at that point (``hessian_at(x, gradient)``), which either confirms
    the optimum (and is returned with it) or takes over the steps. Each step with the
    approximate Hessian costs one gradient; each exact Hessian as many gradients as
    there are coordinates when taken by differences.
    """
    low = np.array([b[0] for b in bounds])
    high = np.array([b[1] for b in bounds])
    x = np.asarray(x, dtype=float)
    fun, gradient = objective(x)
    exact = False
    if not np.isfinite(fun):
        return None
    for _ in range(_NEWTON_STEPS):
        if curvature is None:
            curvature, exact = hessian_at(x, gradient), True
        moving = np.ones(len(x), dtype=bool)
        if projected:  # held: at a bound, with the gradient pushing out of the box
            moving = ~(((x <= low) & (gradient > 0)) | ((x >= high) & (gradient < 0)))
        factor = _positive_definite(curvature[np.ix_(moving, moving)] if curvature is not None else None)
        if factor is None:
            if exact:
                return None
            curvature = None
            continue
        step = np.zeros(len(x))
        step[moving] = -linalg.cho_solve(factor, gradient[moving])
        decrement = float(-gradient @ step)  # g' H^-1 g: twice the gain the quadratic model promises
        if decrement / 2 * customers <= TOLERANCE:
            if exact:
                return Optimum(x=x, fun=float(fun), hessian=curvature, converged=True, message="Newton decrement below tolerance")
            curvature = None  # confirm with the exact Hessian here
            continue
        trial = _line_search(objective, x, fun, step, decrement, low, high, projected)
        if trial is None:
            if exact:
                return None
            curvature = None
            continue
        x, fun, gradient = trial
        exact = False  # the Hessian was taken at the previous point: still a good approximation
    return None


def _positive_definite(curvature: np.ndarray | None):
    """The Cholesky factor of a finite, positive definite matrix, else None."""
    if curvature is None or not np.all(np.isfinite(curvature)):
        return None
    try:
        return linalg.cho_factor(curvature)
    except linalg.LinAlgError:
        return None


def _line_search(
    objective: Objective, x: np.ndarray, fun: float, step: np.ndarray, decrement: float, low: np.ndarray, high: np.ndarray, projected: bool = False
):
    """Halve the step until it decreases the objective enough (Armijo); None when it leaves the box (unless
    ``projected``: then the trial point is clipped to the box) or never decreases it."""
    length = 1.0
    while length >= 1 / 64:
        trial = x + length * step
        if projected:
            trial = np.clip(trial, low, high)
        elif np.any(trial < low) or np.any(trial > high):
            return None
        trial_fun, trial_gradient = objective(trial)
        if np.isfinite(trial_fun) and trial_fun <= fun - 1e-4 * length * decrement:
            return trial, trial_fun, trial_gradient
        length /= 2
    return None


def covariance(curvature: np.ndarray | None, customers: float, free: Sequence[bool]) -> np.ndarray | None:
    """The asymptotic covariance of the free search coordinates: the inverse of the observed information.

    The observed information of the free coordinates is ``customers * curvature``
    (``curvature`` the Hessian of the per-customer objective). None when there is
    no free coordinate or the information is not positive definite.
    """
    index = np.flatnonzero(free)
    if curvature is None or index.size == 0:
        return None
    factor = _positive_definite(customers * curvature[np.ix_(index, index)])
    if factor is None:
        return None
    matrix = linalg.cho_solve(factor, np.eye(index.size))
    return (matrix + matrix.T) / 2.0


def standard_errors(curvature: np.ndarray | None, x: np.ndarray, customers: float, logged: Sequence[bool], free: Sequence[bool]) -> list[float | None]:
    """Standard errors of the natural parameters from the Hessian of the per-customer objective in search coordinates.

    The square roots of :func:`covariance`'s diagonal. A coordinate that is the
    logarithm of its parameter gives that parameter the standard error
    ``exp(x) * se(x)`` (the delta method); the others are the parameters
    themselves. None for coordinates that are not free, or when the information
    is not positive definite.
    """
    errors: list[float | None] = [None] * len(x)
    matrix = covariance(curvature, customers, free)
    if matrix is None:
        return errors
    for position, i in enumerate(np.flatnonzero(free)):
        variance = matrix[position, position]
        if np.isfinite(variance) and variance > 0:
            error = math.sqrt(variance)
            errors[i] = float(math.exp(x[i]) * error) if logged[i] else float(error)
    return errors
