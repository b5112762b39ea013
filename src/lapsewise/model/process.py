"""The hidden-churn process: the parameters every later stage reads, with their published names.

Customer i has a purchase probability ``p ~ Beta(alpha, beta)`` and a churn
probability ``theta ~ Beta(gamma, delta)``. Quarter 0 is the first purchase. At
the start of every later quarter an alive customer leaves, for good, with
probability ``theta``. An alive customer buys with probability ``s_q * p`` in a
mailed quarter and ``rho * s_q * p`` in an unmailed one, where ``s_q`` is the
multiplier of the quarter of the (fiscal) year, the largest 1 (``seasons``; None
when every quarter is alike). With every quarter mailed and no seasons this is
the BG/BB model of Fader, Hardie & Berger (2010), and ``rho`` is then ``None``:
the data say nothing about it.

The fit estimates a process (:class:`lapsewise.model.churn.ChurnFit`), the
posterior and the simulator read one, and the stop-rule program plans against
one whose rho is a number (the policy may set it).

References
----------
Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010). Customer-Base Analysis
with Discrete-Time Transaction Data. Marketing Science, 29(6), 1086-1108.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Process:
    """The parameters of the hidden-churn process.

    Attributes
    ----------
    alpha, beta : float
        Beta distribution of the purchase probability p.
    gamma, delta : float
        Beta distribution of the churn probability theta.
    rho : float or None
        Share of the purchase probability left in an unmailed quarter; None when
        every quarter counts as mailed (no mailing history).
    seasons : tuple of 4 floats or None
        Multipliers of the purchase probability in quarters 1-4 of the (fiscal)
        year (index ``q % 4`` of the absolute quarter q), the largest 1; None when
        every quarter is alike.
    """

    alpha: float
    beta: float
    gamma: float
    delta: float
    rho: float | None = None
    seasons: tuple[float, float, float, float] | None = None

    @property
    def seasonal(self) -> bool:
        """True when some quarter of the year has a multiplier other than 1."""
        return self.seasons is not None and any(s != 1.0 for s in self.seasons)

    @property
    def multipliers(self) -> np.ndarray:
        """The four multipliers by quarter of the year (all 1 without seasons)."""
        return np.asarray(self.seasons if self.seasons is not None else (1.0,) * 4, dtype=float)

    def season(self, quarter_of_year):
        """The multiplier of a quarter of the year (any integer, or an array of them: taken modulo 4)."""
        return self.multipliers[np.asarray(quarter_of_year) % 4]

    def without_seasons(self) -> "Process":
        """The same process with every quarter alike (multiplier 1)."""
        return Process(self.alpha, self.beta, self.gamma, self.delta, self.rho)

    @property
    def mailing_history(self) -> bool:
        return self.rho is not None

    @property
    def unmailed_response(self) -> float:
        """rho, or 1.0 when every quarter counts as mailed."""
        return 1.0 if self.rho is None else float(self.rho)

    @property
    def mean_p(self) -> float:
        return self.alpha / (self.alpha + self.beta)

    @property
    def mean_theta(self) -> float:
        return self.gamma / (self.gamma + self.delta)
