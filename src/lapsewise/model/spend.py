"""The gamma-gamma model of order value: likelihood, fit and conditional expected order value.

A customer's order values are independent draws from a gamma distribution with
shape ``p`` and rate ``nu``, so that their mean order value is ``p / nu``;
across customers ``nu`` is itself gamma distributed with shape ``q`` and rate
``gamma``. The parameters keep their published names ``p``, ``q`` and
``gamma``. What a customer tells the model is ``x``, the number of repeat
purchase quarters, and ``m_x``, the mean net spend over them (see
:class:`lapsewise.data.summary.CustomerSummary`). First purchases are left out, as in
the paper, and the model assumes that how often a customer buys says nothing
about how much they spend; the fit reports the correlation between the two so
that a reader can judge that assumption.

For a customer with ``x >= 1`` and mean repeat value ``m_x`` the density is::

    f(m_x | p, q, gamma, x) = Gamma(p x + q) / (Gamma(p x) Gamma(q))
                              * gamma^q * m_x^(p x - 1) * x^(p x) / (gamma + m_x x)^(p x + q)

and the customer's expected mean order value given what was seen is::

    E[M | x, m_x] = (gamma + m_x x) p / (p x + q - 1)

which for ``x = 0`` is the population mean ``p gamma / (q - 1)``, defined only
when ``q > 1``.

References
----------
Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). RFM and CLV: Using
Iso-Value Curves for Customer Base Analysis. Journal of Marketing Research,
42(4), 415-430.

Colombo, R. and Jiang, W. (1999). A stochastic RFM model. Journal of
Interactive Marketing, 13(3), 2-12.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.special import digamma, gammaln

from lapsewise.errors import InputError
from lapsewise.model import optimum
from lapsewise.model.uncertainty import Covariance

PARAMETER_NAMES = ("p", "q", "gamma")

FEWEST_REPEAT_CUSTOMERS = 30
"""Below this many repeat customers the fit is reported with a warning."""

LARGEST_CORRELATION = 0.3
"""Above this absolute correlation between ``x`` and ``m_x`` the fit is reported with a warning."""

# The search range of each parameter, fitted on spend divided by its median (so gamma is in
# units of the median mean repeat value; p and q have no units).
_SEARCH_RANGE = {"p": (1e-4, 1e4), "q": (1e-4, 1e4), "gamma": (1e-6, 1e8)}
# Starting (p, q); gamma starts where the population mean equals the sample mean.
_STARTING_SHAPES = ((1.0, 2.0), (3.0, 4.0), (10.0, 11.0), (0.5, 1.5))
_SCOUT_STEPS = 8
# How close (in log space) an estimate must be to an end of its range to count as on it.
_ON_BOUND = 1e-3


# ---------------------------------------------------------------- likelihood


def spend_log_likelihood(p: float, q: float, gamma: float, x: np.ndarray, m_x: np.ndarray) -> np.ndarray:
    """Log density of each customer's mean repeat value under the gamma-gamma model.

    Parameters
    ----------
    p : float
        Shape of the gamma distribution of one customer's order values.
    q : float
        Shape of the gamma distribution of the rate ``nu`` across customers.
    gamma : float
        Rate of the gamma distribution of ``nu`` across customers (in currency units).
    x : numpy.ndarray
        Repeat purchases per customer, each at least 1.
    m_x : numpy.ndarray
        Mean value of those repeat purchases per customer, each above 0.

    Returns
    -------
    numpy.ndarray
        ``log f(m_x | p, q, gamma, x)``, one value per customer.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). RFM and CLV: Using
    Iso-Value Curves for Customer Base Analysis. Journal of Marketing Research,
    42(4), 415-430.
    """
    x = np.asarray(x, dtype=np.float64)
    m_x = np.asarray(m_x, dtype=np.float64)
    px = p * x
    return (
        gammaln(px + q)
        - gammaln(px)
        - gammaln(q)
        + q * np.log(gamma)
        + (px - 1.0) * np.log(m_x)
        + px * np.log(x)
        - (px + q) * np.log(gamma + m_x * x)
    )


@dataclass(frozen=True)
class SpendSums:
    """What the summed log-likelihood needs of the data, computed once per fit (the fast form of summing
    :func:`spend_log_likelihood` over the customers, its plain twin, which the tests compare it with).

    The gamma-function terms depend on a customer only through x, which takes few
    values, so they are summed per distinct x; the only term that needs every
    customer at every evaluation is ``log(gamma + m_x x)``.
    """

    x_values: np.ndarray
    x_counts: np.ndarray
    x: np.ndarray
    spend_total: np.ndarray  # m_x * x per customer
    sum_x_log_m: float
    sum_log_m: float
    sum_x_log_x: float

    @classmethod
    def of(cls, x: np.ndarray, m_x: np.ndarray) -> "SpendSums":
        values, counts = np.unique(x, return_counts=True)
        log_m = np.log(m_x)
        return cls(values, counts.astype(float), x, m_x * x, float(x @ log_m), float(log_m.sum()), float(x @ np.log(x)))

    def value_and_gradient(self, p: float, q: float, gamma: float) -> tuple[float, np.ndarray]:
        """The summed log-likelihood and its gradient by (p, q, gamma), equal to summing
        ``spend_log_likelihood`` and its gradient over the customers (checked in the tests)."""
        count = float(self.x_counts.sum())
        k, c = self.x_values, self.x_counts
        total = gamma + self.spend_total
        log_total = np.log(total)
        inverse = 1.0 / total
        sum_x_log_total = float(self.x @ log_total)
        sum_log_total = float(log_total.sum())
        value = (
            float(c @ (gammaln(p * k + q) - gammaln(p * k)))
            - count * gammaln(q)
            + count * q * math.log(gamma)
            + p * self.sum_x_log_m
            - self.sum_log_m
            + p * self.sum_x_log_x
            - p * sum_x_log_total
            - q * sum_log_total
        )
        d_p = float(c @ (k * (digamma(p * k + q) - digamma(p * k)))) + self.sum_x_log_m + self.sum_x_log_x - sum_x_log_total
        d_q = float(c @ digamma(p * k + q)) - count * digamma(q) + count * math.log(gamma) - sum_log_total
        d_gamma = count * q / gamma - p * float(self.x @ inverse) - q * float(inverse.sum())
        return value, np.array([d_p, d_q, d_gamma])


def _repeat_customers(x: np.ndarray, m_x: np.ndarray) -> np.ndarray:
    """Customers the model learns from: at least one repeat purchase and a positive, finite mean value."""
    with np.errstate(invalid="ignore"):
        return (x >= 1) & np.isfinite(m_x) & (m_x > 0)


# ---------------------------------------------------------------- the fitted model


@dataclass(frozen=True)
class SpendFit:
    """A fitted gamma-gamma order-value model and everything needed to judge it.

    Attributes
    ----------
    p : float
        Shape of the gamma distribution of one customer's order values.
    q : float
        Shape of the gamma distribution of the rate ``nu`` across customers.
    gamma : float
        Rate of the gamma distribution of ``nu`` across customers (currency units).
    std_errors : dict
        ``{"p": se, "q": se, "gamma": se}`` from the observed information; ``None``
        where it is not available (the Hessian is not positive definite, or the
        estimate is on the edge of the search range).
    log_likelihood : float
        Log-likelihood at the estimates, summed over the customers used.
    customers : int
        Repeat customers with positive spend that the fit used.
    converged : bool
        Whether the optimizer reported convergence.
    frequency_value_correlation : float
        Pearson correlation between ``x`` and ``m_x`` among the customers used
        (NaN when it is undefined). The model assumes it is zero.
    warnings : tuple of str
        One line each on anything that makes the estimates less trustworthy.
    covariance : Covariance or None
        The free parameters' asymptotic covariance on the log scale
        (:mod:`lapsewise.model.uncertainty`); None in model files written before it was kept.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). RFM and CLV: Using
    Iso-Value Curves for Customer Base Analysis. Journal of Marketing Research,
    42(4), 415-430.
    """

    p: float
    q: float
    gamma: float
    std_errors: dict[str, float | None] = field(default_factory=dict)
    log_likelihood: float = math.nan
    customers: int = 0
    converged: bool = False
    frequency_value_correlation: float = math.nan
    warnings: tuple[str, ...] = ()
    covariance: Covariance | None = None

    @property
    def population_mean(self) -> float:
        """Mean order value across customers, ``p gamma / (q - 1)``; NaN when ``q <= 1`` (undefined)."""
        if self.q <= 1:
            return math.nan
        return self.p * self.gamma / (self.q - 1)

    def to_dict(self) -> dict:
        """JSON-safe form: undefined numbers become ``None``."""
        return {
            "p": _number_or_none(self.p),
            "q": _number_or_none(self.q),
            "gamma": _number_or_none(self.gamma),
            "std_errors": {name: _number_or_none(self.std_errors.get(name)) for name in PARAMETER_NAMES},
            "log_likelihood": _number_or_none(self.log_likelihood),
            "customers": int(self.customers),
            "converged": bool(self.converged),
            "frequency_value_correlation": _number_or_none(self.frequency_value_correlation),
            "warnings": list(self.warnings),
            "covariance": None if self.covariance is None else self.covariance.to_dict(),
        }

    @classmethod
    def from_dict(cls, data: dict) -> SpendFit:
        """Rebuild a fit from :meth:`to_dict` output."""
        return cls(
            p=_number(data["p"]),
            q=_number(data["q"]),
            gamma=_number(data["gamma"]),
            std_errors={name: _number_or_none(data["std_errors"].get(name)) for name in PARAMETER_NAMES},
            log_likelihood=_number(data["log_likelihood"]),
            customers=int(data["customers"]),
            converged=bool(data["converged"]),
            frequency_value_correlation=_number(data["frequency_value_correlation"]),
            warnings=tuple(data["warnings"]),
            covariance=Covariance.from_dict(data.get("covariance")),
        )


def _number_or_none(value: float | None) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def _number(value: float | None) -> float:
    return math.nan if value is None else float(value)


# ---------------------------------------------------------------- fitting


def fit_spend(x: np.ndarray, m_x: np.ndarray) -> SpendFit:
    """Fit the gamma-gamma model by maximum likelihood.

    Only customers with at least one repeat purchase and a finite, positive mean
    repeat value are used; the others are ignored, and the number used is
    reported. The log-likelihood is maximised over the logarithms of ``p``,
    ``q`` and ``gamma`` (:func:`lapsewise.model.optimum.minimize`): several fixed
    starting points each take a few L-BFGS-B steps, the best is followed to
    convergence and finished by Newton steps. Spend is divided by its median
    while searching (``gamma`` scales with spend; ``p`` and ``q`` do not), so the
    search behaves the same in any currency. Standard errors come from the
    observed information, the finite-difference Hessian (of the analytic
    gradient) of the log-likelihood, by the delta method.

    Parameters
    ----------
    x : numpy.ndarray
        Repeat purchases per customer.
    m_x : numpy.ndarray
        Mean value of the repeat purchases per customer (NaN when ``x = 0``).

    Returns
    -------
    SpendFit
        Estimates, standard errors, log-likelihood, convergence, the
        frequency-value correlation and warnings.

    Raises
    ------
    InputError
        When no customer has a repeat purchase with positive spend.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). RFM and CLV: Using
    Iso-Value Curves for Customer Base Analysis. Journal of Marketing Research,
    42(4), 415-430.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    m_x = np.asarray(m_x, dtype=np.float64).ravel()
    if x.shape != m_x.shape:
        raise ValueError(f"x and m_x must have the same length, not {x.size} and {m_x.size}")
    used = _repeat_customers(x, m_x)
    if not used.any():
        raise InputError(
            "no customer has a repeat purchase with positive spend; "
            "the spend model needs repeat customers, or set order_value in the policy file"
        )
    x, m_x = x[used], m_x[used]

    scale = float(np.median(m_x))
    scaled = m_x / scale
    log_bounds = [(math.log(low), math.log(high)) for low, high in (_SEARCH_RANGE[name] for name in PARAMETER_NAMES)]

    objective = _objective(SpendSums.of(x, scaled))
    stand_in = None
    if x.size > optimum.STAND_IN_CUSTOMERS:
        # Scouting and the first convergence on a fixed random sample of the customers; Newton finishes on all.
        sample = np.sort(np.random.default_rng(0).choice(x.size, size=optimum.STAND_IN_CUSTOMERS, replace=False))
        stand_in = _objective(SpendSums.of(x[sample], scaled[sample]))

    # Gamma starts where the population mean equals the sample mean.
    starts = [
        np.clip(np.log([p_start, q_start, float(np.mean(scaled)) * (q_start - 1.0) / p_start]), *np.transpose(log_bounds))
        for p_start, q_start in _STARTING_SHAPES
    ]
    best = optimum.minimize(objective, starts, log_bounds, x.size, _SCOUT_STEPS, stand_in)

    p, q, gamma_scaled = (float(v) for v in np.exp(best.x))
    gamma = gamma_scaled * scale
    on_bound = [
        name
        for name, value, (low, high) in zip(PARAMETER_NAMES, best.x, log_bounds)
        if value - low < _ON_BOUND or high - value < _ON_BOUND
    ]
    free = [name not in on_bound for name in PARAMETER_NAMES]
    errors = optimum.standard_errors(best.hessian, best.x, x.size, logged=[True] * 3, free=free)
    # gamma was searched in units of the median spend: on the log scale that is a shift, so its variance is the same.
    search_covariance = optimum.covariance(best.hessian, x.size, free)
    covariance = None if search_covariance is None else Covariance(tuple(n for n, f in zip(PARAMETER_NAMES, free) if f), search_covariance)
    if errors[2] is not None:
        errors[2] *= scale  # gamma was searched in units of the median spend
    std_errors = dict(zip(PARAMETER_NAMES, errors))
    correlation = _correlation(x, m_x)

    warnings = []
    if not best.converged:
        warnings.append(f"the optimizer did not converge ({best.message}); treat the spend estimates with caution")
    for name in on_bound:
        value = {"p": p, "q": q, "gamma": gamma}[name]
        warnings.append(
            f"{name} = {value:.4g} is at the edge of its search range: the data do not pin it down, "
            "and it has no standard error"
        )
    missing = [name for name in PARAMETER_NAMES if std_errors[name] is None and name not in on_bound]
    if missing:
        warnings.append(
            f"the observed information is not positive definite: no standard error for {', '.join(missing)}"
        )
    if q <= 1:
        warnings.append(
            f"q = {q:.3g} is at most 1: the mean order value across customers is undefined (spend varies too widely "
            "between customers), so customers without repeat purchases have no expected order value; "
            "set order_value in the policy file"
        )
    if x.size < FEWEST_REPEAT_CUSTOMERS:
        warnings.append(
            f"only {x.size} repeat {'customer' if x.size == 1 else 'customers'} with positive spend (fewer than {FEWEST_REPEAT_CUSTOMERS}): "
            "the spend estimates are rough"
        )
    if math.isfinite(correlation) and abs(correlation) > LARGEST_CORRELATION:
        warnings.append(
            f"repeat purchases and mean repeat value are correlated ({correlation:+.2f}); the model assumes they are not, "
            "so expected order values may be biased"
        )

    return SpendFit(
        p=p,
        q=q,
        gamma=gamma,
        std_errors=std_errors,
        log_likelihood=float(spend_log_likelihood(p, q, gamma, x, m_x).sum()),
        customers=int(x.size),
        converged=best.converged,
        frequency_value_correlation=correlation,
        warnings=tuple(warnings),
        covariance=covariance,
    )


def _objective(sums: SpendSums) -> optimum.Objective:
    """The negative log-likelihood per customer and its gradient, by the logarithms of (p, q, gamma)."""
    customers = float(sums.x_counts.sum())

    def objective(log_parameters: np.ndarray) -> tuple[float, np.ndarray]:
        p, q, gamma = np.exp(log_parameters)
        value, gradient = sums.value_and_gradient(p, q, gamma)
        return -value / customers, -gradient * np.array([p, q, gamma]) / customers

    return objective


def _correlation(x: np.ndarray, m_x: np.ndarray) -> float:
    """Pearson correlation of x and m_x; NaN when either does not vary."""
    if x.size < 2 or np.ptp(x) == 0 or np.ptp(m_x) == 0:
        return math.nan
    return float(np.corrcoef(x, m_x)[0, 1])


# ---------------------------------------------------------------- expected order value


def expected_order_value(fit: SpendFit, x: np.ndarray, m_x: np.ndarray) -> np.ndarray:
    """Each customer's expected mean order value given their repeat purchases.

    ``E[M | x, m_x] = (gamma + m_x x) p / (p x + q - 1)``: a weighted average of
    the population mean and the customer's own mean repeat value, leaning
    towards the customer's own as ``x`` grows. Customers with no repeat
    purchase, or without a finite positive ``m_x``, get the population mean
    ``p gamma / (q - 1)``. Where the expectation is undefined (``q <= 1`` for the
    population mean, ``p x + q <= 1`` for a repeat customer) the result is NaN.

    Parameters
    ----------
    fit : SpendFit
        The fitted model.
    x : numpy.ndarray
        Repeat purchases per customer.
    m_x : numpy.ndarray
        Mean value of the repeat purchases per customer (NaN when ``x = 0``).

    Returns
    -------
    numpy.ndarray of float64
        Expected mean order value per customer, in the units of ``m_x``.

    References
    ----------
    Fader, P. S., Hardie, B. G. S. and Lee, K. L. (2005). RFM and CLV: Using
    Iso-Value Curves for Customer Base Analysis. Journal of Marketing Research,
    42(4), 415-430.
    """
    x = np.asarray(x, dtype=np.float64)
    m_x = np.asarray(m_x, dtype=np.float64)
    x, m_x = np.broadcast_arrays(x, m_x)
    repeat = _repeat_customers(x, m_x)
    x_used = np.where(repeat, x, 0.0)
    m_used = np.where(repeat, m_x, 0.0)
    denominator = fit.p * x_used + fit.q - 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        value = (fit.gamma + m_used * x_used) * fit.p / denominator
    return np.where(denominator > 0, value, np.nan)
