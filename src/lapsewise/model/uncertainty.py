"""How sure the fits are: the estimates' covariance on unconstrained scales, and draws of the parameters from it.

Every fit reports its free parameters' asymptotic covariance, the inverse of the
observed information (the Hessian of the log-likelihood at the estimates), on
scales on which any real number is a valid parameter:

* the logarithm of alpha, beta, gamma, delta, the seasonal multipliers and the
  order-value model's p, q and gamma;
* the logit of rho, ``log(rho / (1 - rho))``.

A search that ran on the parameter itself (rho, the multipliers) has its
covariance carried to these scales by the delta method: the variance of
``u = g(v)`` is ``g'(v)^2`` times that of v, and a covariance ``g'(v_i) g'(v_j)``
times.

Draws are normal on these scales, ``u = u_hat + L z`` with ``L L' = Sigma`` and z
standard normal, and are mapped back; on the natural scale they are
log-normal (or logit-normal), so they never leave the parameters' ranges and
they are skewed where the estimate is near a bound, as the likelihood is. A
multiplier drawn above 1 is set to 1 (the largest multiplier is 1 by
definition). A parameter the fit could not give an error (on a bound, or not
identified) stays at its estimate in every draw. The churn and order-value
models are fitted on separate likelihoods, so their draws are independent.

Why not a bootstrap over customers: it refits the model once per draw (about
half a minute each at a million customers with seasons), while the normal draws
cost nothing beyond the fit; at the bases the tool is for (thousands of
customers and more) the likelihood is close to normal on these scales, and the
coverage of the ranges built on them is checked by simulation in the tests.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

RANGE = (0.05, 0.95)
"""The percentiles of the draws that bound a range: the 5th and the 95th."""
LOGIT = ("rho",)
"""Parameters on the logit scale; every other is on the log scale."""


def to_unconstrained(name: str, value: float) -> float:
    """``log(value)``, or ``logit(value)`` for rho."""
    if name in LOGIT:
        return math.log(value / (1.0 - value))
    return math.log(value)


def from_unconstrained(name: str, value: float) -> float:
    """The inverse of :func:`to_unconstrained`."""
    if name in LOGIT:
        return 1.0 / (1.0 + math.exp(-value))
    return math.exp(value)


def slope(name: str, value: float) -> float:
    """``d u / d value`` of :func:`to_unconstrained` at ``value``: ``1 / value``, or ``1 / (value (1 - value))`` for rho."""
    if name in LOGIT:
        return 1.0 / (value * (1.0 - value))
    return 1.0 / value


@dataclass(frozen=True, eq=False)
class Covariance:
    """The asymptotic covariance of a fit's free parameters on the unconstrained scales (module docstring).

    ``parameters`` names the rows and columns of ``matrix``. Two are equal when their names and entries are.
    """

    parameters: tuple[str, ...]
    matrix: np.ndarray

    def __eq__(self, other) -> bool:
        return isinstance(other, Covariance) and self.parameters == other.parameters and np.array_equal(self.matrix, other.matrix)

    __hash__ = None

    @classmethod
    def from_search(cls, names: Sequence[str], values: Sequence[float], matrix: np.ndarray, logged: Sequence[bool]) -> "Covariance":
        """Carry a search's covariance to the unconstrained scales.

        ``names``, ``values`` and ``logged`` describe the search coordinates that
        ``matrix`` covers: their names, the parameters' estimates (natural scale),
        and whether the coordinate is already the logarithm of the parameter.
        """
        scale = np.array([1.0 if log else slope(name, value) for name, value, log in zip(names, values, logged)])
        return cls(tuple(names), scale[:, None] * np.asarray(matrix, dtype=float) * scale[None, :])

    @classmethod
    def from_errors(cls, estimates: dict[str, float], errors: dict[str, float | None]) -> "Covariance":
        """Independent parameters with the given standard errors (natural scale), carried to the unconstrained scales.

        For a model file written before the covariance was kept: the draws then ignore the estimates' correlations.
        """
        names = tuple(name for name in estimates if errors.get(name) is not None)
        scale = np.array([float(errors[name]) * slope(name, estimates[name]) for name in names])
        return cls(names, np.diag(scale**2))

    def without(self, name: str) -> "Covariance":
        keep = [i for i, other in enumerate(self.parameters) if other != name]
        return Covariance(tuple(self.parameters[i] for i in keep), self.matrix[np.ix_(keep, keep)])

    def to_dict(self) -> dict:
        return {"parameters": list(self.parameters), "matrix": [[float(v) for v in row] for row in self.matrix]}

    @classmethod
    def from_dict(cls, data: dict | None) -> "Covariance | None":
        if data is None:
            return None
        return cls(tuple(data["parameters"]), np.array(data["matrix"], dtype=float).reshape(len(data["parameters"]), len(data["parameters"])))


def draw_parameters(estimates: dict[str, float], covariance: Covariance, draws: int, rng: np.random.Generator) -> list[dict[str, float]]:
    """``draws`` sets of parameters, normal on the unconstrained scales around ``estimates``.

    ``L`` is the symmetric square root of the covariance (its eigenvectors times the
    roots of its eigenvalues, a negative rounding error taken as 0), so a zero
    covariance gives the estimates themselves, exactly. Parameters outside
    ``covariance.parameters`` keep their estimates.
    """
    names = [name for name in covariance.parameters if name in estimates]
    index = [covariance.parameters.index(name) for name in names]
    matrix = covariance.matrix[np.ix_(index, index)]
    if not names:
        return [dict(estimates) for _ in range(draws)]
    z = rng.standard_normal((draws, len(names)))
    eigenvalues, eigenvectors = np.linalg.eigh(matrix)
    root = eigenvectors * np.sqrt(np.clip(eigenvalues, 0.0, None))[None, :]
    offsets = z @ root.T
    centre = [to_unconstrained(name, estimates[name]) for name in names]
    out = []
    for row in offsets:
        drawn = dict(estimates)
        for name, u, step in zip(names, centre, row):
            if step != 0.0:
                drawn[name] = from_unconstrained(name, u + step)
        out.append(drawn)
    return out


def churn_estimates(churn) -> dict[str, float]:
    """The churn fit's parameters by name (rho when fitted, the multipliers when seasonal)."""
    values = {"alpha": churn.alpha, "beta": churn.beta, "gamma": churn.gamma, "delta": churn.delta}
    if churn.rho is not None:
        values["rho"] = churn.rho
    if churn.seasons is not None:
        values.update({f"season_{q + 1}": s for q, s in enumerate(churn.seasons)})
    return values


def spend_estimates(spend) -> dict[str, float]:
    return {"p": spend.p, "q": spend.q, "gamma": spend.gamma}


def drawn_churn(churn, values: dict[str, float]):
    """The churn fit with the drawn ``values`` (a multiplier drawn above 1 set to 1)."""
    seasons = churn.seasons
    if seasons is not None:
        seasons = tuple(min(values[f"season_{q + 1}"], 1.0) for q in range(4))
    return dataclasses.replace(
        churn, alpha=values["alpha"], beta=values["beta"], gamma=values["gamma"], delta=values["delta"], rho=values.get("rho", churn.rho), seasons=seasons
    )


def drawn_spend(spend, values: dict[str, float]):
    return dataclasses.replace(spend, p=values["p"], q=values["q"], gamma=values["gamma"])


@dataclass(frozen=True)
class Draws:
    """Models with drawn parameters, and how they were drawn.

    ``models`` are copies of the fitted model with drawn churn (and order-value)
    parameters; ``independent`` names the fits whose model file kept no covariance
    (their draws use the standard errors alone, ignoring correlations); ``fixed`` the
    parameters held at their estimates (no standard error).
    """

    models: tuple
    seed: int
    independent: tuple[str, ...]
    fixed: tuple[str, ...]

    def __len__(self) -> int:
        return len(self.models)

    def notes(self) -> list[str]:
        out = []
        if self.independent:
            out.append(f"the model file keeps no covariance for {' and '.join(self.independent)} (written before it was kept): "
                       "the draws take the estimates as independent; fit again for their correlations")
        if self.fixed:
            out.append(f"held at the estimate in every draw (no standard error): {', '.join(self.fixed)}")
        return out


def fit_covariance_or_errors(estimates: dict[str, float], fit) -> tuple[Covariance, bool]:
    """The fit's covariance, or one built from its standard errors (True) when the model file kept none."""
    if fit.covariance is not None:
        return fit.covariance, False
    return Covariance.from_errors(estimates, fit.std_errors), True


def model_draws(model, draws: int, seed: int) -> Draws:
    """``draws`` copies of ``model`` (a :class:`lapsewise.model.fitted.Model`) with parameters drawn from the fits'
    covariance, churn first and then order value from one generator seeded with ``seed``."""
    rng = np.random.default_rng(seed)
    churn_values = churn_estimates(model.churn)
    churn_cov, churn_independent = fit_covariance_or_errors(churn_values, model.churn)
    churn_draws = draw_parameters(churn_values, churn_cov, draws, rng)
    fixed = [name for name in churn_values if name not in churn_cov.parameters and not _held_at_one(name, churn_values)]
    independent = ["the churn model"] if churn_independent else []
    spend_draws = [None] * draws
    if model.spend is not None:
        spend_values = spend_estimates(model.spend)
        spend_cov, spend_independent = fit_covariance_or_errors(spend_values, model.spend)
        spend_draws = draw_parameters(spend_values, spend_cov, draws, rng)
        fixed += [f"spend {name}" for name in spend_values if name not in spend_cov.parameters]
        independent += ["the order-value model"] if spend_independent else []
    models = tuple(
        dataclasses.replace(model, churn=drawn_churn(model.churn, c), spend=None if s is None else drawn_spend(model.spend, s))
        for c, s in zip(churn_draws, spend_draws)
    )
    return Draws(models, seed, tuple(independent), tuple(fixed))


def _held_at_one(name: str, values: dict[str, float]) -> bool:
    """A multiplier at 1 is the reference quarter (or equals it): held there by the model's scaling, not for want of data."""
    return name.startswith("season_") and values[name] >= 1.0 - 1e-9


def shifted_models(model, size: float = 2.0) -> list[tuple[str, float, object, object]]:
    """For each parameter with a standard error: (name, its standard error on the natural scale, the model with it
    ``size`` standard errors lower, and higher).

    The parameter moves on its unconstrained scale and the fit's other parameters move with it as their
    covariance says (``Sigma[:, i] / Sigma[i, i]`` per unit of it: their most likely values given it), so that
    a parameter the data pin down only jointly with others (alpha with beta, the order-value model's p, q and
    gamma) is not moved against what the data allow.
    """
    out = []
    fits = [("churn", model.churn, churn_estimates(model.churn))]
    if model.spend is not None:
        fits.append(("spend", model.spend, spend_estimates(model.spend)))
    for which, fit, values in fits:
        covariance, _ = fit_covariance_or_errors(values, fit)
        names = [name for name in covariance.parameters if name in values]
        index = [covariance.parameters.index(name) for name in names]
        matrix = covariance.matrix[np.ix_(index, index)]
        centre = np.array([to_unconstrained(name, values[name]) for name in names])
        for i, name in enumerate(names):
            error = math.sqrt(max(matrix[i, i], 0.0))
            direction = matrix[:, i] / error if error > 0 else np.zeros(len(names))
            moved = []
            for sign in (-1.0, 1.0):
                shifted = dict(values)
                for other, u, step in zip(names, centre, sign * size * direction):
                    if step != 0.0:
                        shifted[other] = from_unconstrained(other, u + step)
                if which == "churn":
                    moved.append(dataclasses.replace(model, churn=drawn_churn(model.churn, shifted)))
                else:
                    moved.append(dataclasses.replace(model, spend=drawn_spend(model.spend, shifted)))
            out.append((name if which == "churn" else f"spend {name}", error / slope(name, values[name]), moved[0], moved[1]))
    return out
