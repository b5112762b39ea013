"""The order values the stop table shows: the policy's fixed value, or bands of the spend model.

The program's margin is ``gross_margin * order_value - order_cost``, so it is
solved once per order value. The stop table shows one table per band: with
``order_value`` in the policy there is one; otherwise the fitted gamma-gamma
population of mean order values is cut into bands of equal share, each solved
at its median and labelled with it. The values of mailing behind the plan and
the mail list use each customer's own order value instead
(:mod:`lapsewise.decide.own_margins`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from lapsewise.errors import InputError
from lapsewise.files.policy_file import Economics
from lapsewise.model.spend import SpendFit

NO_ORDER_VALUE = "the model has no usable order-value model; set order_value in the policy's [economics] or pass --order-value"


@dataclass(frozen=True)
class SpendBand:
    """A band of expected order values (currency units) and the value the program uses for it."""

    label: str
    low: float
    high: float
    order_value: float


def spend_bands(spend: SpendFit | None, economics: Economics, count: int) -> tuple[SpendBand, ...]:
    """The order values the program is solved for.

    With ``order_value`` in the policy there is one band at that value. Otherwise
    the fitted gamma-gamma population of mean order values is cut into ``count``
    bands of equal share, each represented by its median (its share's midpoint
    quantile). The bands are for display: the stop table shows one table per band.
    """
    if economics.order_value is not None:
        return (SpendBand("all", 0.0, math.inf, economics.order_value),)
    if spend is None or not (spend.q > 1):
        raise InputError(NO_ORDER_VALUE)
    # Mean order value = p / nu with nu ~ Gamma(q, rate gamma): its u-quantile is p / (the (1-u)-quantile of nu),
    # and that quantile is gammainccinv(q, u) / gamma (the inverse of the upper regularized incomplete gamma).
    def quantile(u: float) -> float:
        if u <= 0:
            return 0.0
        if u >= 1:
            return math.inf
        return spend.p * spend.gamma / float(special.gammainccinv(spend.q, u))

    bands = []
    names = {1: ["all"], 2: ["lower", "upper"], 3: ["low", "middle", "high"]}.get(count, [f"band {i + 1}" for i in range(count)])
    for i in range(count):
        low, high = quantile(i / count), quantile((i + 1) / count)
        middle = quantile((i + 0.5) / count)
        bands.append(SpendBand(names[i], low, high, middle))
    return tuple(bands)


def typical_order_value(spend: SpendFit | None, economics: Economics) -> float:
    """The policy's fixed order value, or the spend model's population mean."""
    if economics.order_value is not None:
        return economics.order_value
    if spend is None or not (spend.q > 1):
        raise InputError(NO_ORDER_VALUE)
    return float(spend.population_mean)
