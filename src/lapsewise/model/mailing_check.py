"""How was mailing decided? How far the mailings file can be predicted from what the firm saw.

rho, the share of the purchase probability left in a quarter without a piece, is
estimated from the quarters in which the firm happened not to mail, taking the
mail flags as given. That is sound when the flags were set by chance. When the
firm mailed by its own rules (mail recent buyers, drop the silent), the unmailed
quarters are the ones of customers the firm already thought were gone, and rho
can be badly biased. This module measures how far the mail/hold decision of each
customer-quarter follows from what the firm could see at the start of it:

* **recency**: quarters since the customer's last purchase before the quarter
  (1 = bought in the quarter before), capped at :data:`RECENCY_CAP`;
* **frequency**: purchases in quarters ``1 .. j - 1`` (repeat purchases so far),
  capped at :data:`FREQUENCY_CAP`;
* **quarter of the year**: ``(first_quarter + j) % 4``, 0 the fiscal year's first.

Every observed customer-quarter ``j = 1 .. n`` is one observation, its outcome
mailed or not. The observations fall into the 8 x 5 x 4 = 160 cells of the three
predictors, and every figure follows from the cell counts:

* ``base_rate_accuracy``: the share of the more common decision, the accuracy of
  always guessing it;
* ``rule_accuracy``: the accuracy of the cell-majority rule, each customer-quarter
  predicted from the *other* customer-quarters of its cell (leave one out; a tie
  or an empty rest goes to the more common decision overall). Leaving the quarter
  itself out keeps a cell of a few quarters from scoring its own noise: with
  mailing at random the rule cannot beat the base rate on average, however small
  the file;
* ``explained_share``: the share of the mail/hold variance the cells explain,
  ``1 - within-cell variance / total variance``, both variances taken with their
  degrees of freedom (the within-cell sum of squares over ``N - K``, the total
  over ``N - 1``, for ``N`` customer-quarters in ``K`` occupied cells) so that its
  expectation under random mailing is 0 (the adjusted R^2 of the cell means);
  negative values are shown as 0. The same share for each predictor alone names
  the ``strongest_predictor``.

Mailing **followed the firm's own rules** when ``explained_share >=``
:data:`EXPLAINED_SHARE_THRESHOLD` (0.10) or ``rule_accuracy - base_rate_accuracy
>=`` :data:`ACCURACY_GAIN_THRESHOLD` (0.05). Why these values: under random
mailing both figures are 0 in expectation (by the corrections above), and their
chance spread is small (the adjusted share's standard deviation is about
``sqrt(2 K) / N``, under 0.01 from 2,000 customer-quarters on); a mailing rule
that looks at recency moves them far past the thresholds. In the tests'
simulations (4,000 customers, 8 to 16 quarters each, about 48,000
customer-quarters) mailing at random at 70% explains at most 0.0004 of the
variance and gains no accuracy, while "mail while silent for 3 quarters or
fewer, 5% of the rest at random" explains 0.92 and gains 38 points; milder rules
("silent under 4 quarters, half of the rest", "under 6, 70% of the rest") still
explain 0.37 and 0.23. A tenth of the variance, or five points of accuracy, is
where the choice of who was held visibly tracks the firm's own view of the
customer; both are rules of thumb (common practice, no source), set well clear
of the chance spread on one side and of such rules on the other. The accuracy gain
catches a rule when one decision is rare (the variance is then small and the
share moves little); the share catches it when the base rate is high.

With no unmailed quarter at all, rho cannot be estimated (``rho_estimable`` is
False); with every quarter unmailed there is no mailed response to compare with.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

RECENCY_CAP = 8
"""Recency 8 stands for 8 quarters or more: two years of silence; a rule rarely tells 9 from 12 quarters apart."""
FREQUENCY_CAP = 4
"""Frequency 4 stands for 4 repeat purchases or more, the few steady customers."""
SEASONS = 4
PREDICTORS = ("recency", "frequency", "quarter_of_year")
EXPLAINED_SHARE_THRESHOLD = 0.10
"""Mailing followed rules when the cells explain at least this share of the mail/hold variance (see the module docstring)."""
ACCURACY_GAIN_THRESHOLD = 0.05
"""... or when the cell-majority rule beats the base rate by at least this much (five points of accuracy)."""


@dataclass(frozen=True)
class MailingCells:
    """Customer-quarters per (recency, frequency, quarter of the year) cell, and how many of them were mailed.

    ``total[r - 1, f, s]`` counts the quarters at recency r (1 .. RECENCY_CAP), frequency f
    (0 .. FREQUENCY_CAP) and quarter of the year s (0 .. 3); ``mailed`` is laid out alike.
    """

    total: np.ndarray
    mailed: np.ndarray


@dataclass(frozen=True)
class MailingCheck:
    """How far the mailing can be predicted from recency, frequency and the quarter of the year.

    Attributes
    ----------
    customer_quarters : int
        Observed customer-quarters after each customer's first purchase.
    unmailed_quarters : int
        Those without a piece.
    base_rate_accuracy : float
        Share of the more common decision (mail or hold).
    rule_accuracy : float
        Accuracy of the cell-majority rule, each quarter predicted from the rest of its cell.
    explained_share : float or None
        Share of the mail/hold variance explained by the cells (adjusted for the cells' number);
        None when every quarter had the same decision.
    explained_share_by_predictor : dict
        The same share for each predictor alone.
    """

    customer_quarters: int
    unmailed_quarters: int
    base_rate_accuracy: float
    rule_accuracy: float
    explained_share: float | None
    explained_share_by_predictor: dict[str, float | None]

    @property
    def unmailed_share(self) -> float:
        return self.unmailed_quarters / self.customer_quarters if self.customer_quarters else 0.0

    @property
    def rho_estimable(self) -> bool:
        """False when no customer-quarter was left unmailed: nothing shows how a held customer orders."""
        return self.unmailed_quarters > 0

    @property
    def accuracy_gain(self) -> float:
        return self.rule_accuracy - self.base_rate_accuracy

    @property
    def strongest_predictor(self) -> str | None:
        """The predictor that alone explains the largest share (the first in :data:`PREDICTORS` on a tie); None when none explains any."""
        shares = {name: share for name, share in self.explained_share_by_predictor.items() if share}
        return max(shares, key=lambda name: (shares[name], -PREDICTORS.index(name))) if shares else None

    @property
    def followed_rules(self) -> bool:
        """True when the mailing followed the firm's own view of the customer (thresholds in the module docstring)."""
        if self.explained_share is None:
            return False
        return bool(self.explained_share >= EXPLAINED_SHARE_THRESHOLD or self.accuracy_gain >= ACCURACY_GAIN_THRESHOLD)

    def to_dict(self) -> dict:
        def rounded(value: float | None) -> float | None:
            return None if value is None else round(float(value), 6)

        return {
            "customer_quarters": self.customer_quarters,
            "unmailed_quarters": self.unmailed_quarters,
            "unmailed_share": rounded(self.unmailed_share),
            "base_rate_accuracy": rounded(self.base_rate_accuracy),
            "rule_accuracy": rounded(self.rule_accuracy),
            "explained_share": rounded(self.explained_share),
            "explained_share_by_predictor": {name: rounded(self.explained_share_by_predictor.get(name)) for name in PREDICTORS},
            "strongest_predictor": self.strongest_predictor,
            "followed_rules": self.followed_rules,
        }

    @classmethod
    def from_dict(cls, data: dict) -> "MailingCheck":
        """The check as written by :meth:`to_dict` (the derived keys are derived again)."""
        shares = data.get("explained_share_by_predictor") or {}
        return cls(
            customer_quarters=int(data["customer_quarters"]),
            unmailed_quarters=int(data["unmailed_quarters"]),
            base_rate_accuracy=float(data["base_rate_accuracy"]),
            rule_accuracy=float(data["rule_accuracy"]),
            explained_share=None if data.get("explained_share") is None else float(data["explained_share"]),
            explained_share_by_predictor={name: None if shares.get(name) is None else float(shares[name]) for name in PREDICTORS},
        )


def mailing_cells(purchased: np.ndarray, mailed: np.ndarray, n: np.ndarray, first_quarter: np.ndarray) -> MailingCells:
    """Count every observed customer-quarter ``j = 1 .. n`` into its (recency, frequency, quarter of the year) cell.

    ``purchased`` and ``mailed`` are the panel's dense customer x quarter arrays aligned on
    quarter 0 (a purchase in quarter 0 for everyone), ``n`` the quarters observed after it and
    ``first_quarter`` the absolute quarter of quarter 0. The loop runs over quarters; within a
    quarter every customer is one numpy operation. Each customer's cell is a small state
    (:func:`_next_cell`, one byte) that a table moves on after each quarter: recency back to 1
    and frequency up by one after a purchase, recency up by one after silence, the season on by
    one; after the customer's last observed quarter the state is :data:`_UNOBSERVED`, never counted.
    """
    n = np.asarray(n, dtype=np.int64)
    last_quarter = min(purchased.shape[1] - 1, int(n.max())) if len(n) and purchased.ndim == 2 else 0
    counts = np.zeros(2 * (_UNOBSERVED + 1), dtype=np.int64)  # cell * 2 + mailed
    if last_quarter >= 1:
        seasons = ((np.asarray(first_quarter, dtype=np.int64) + 1) % SEASONS).astype(np.uint8)
        cell = np.where(n >= 1, seasons, _UNOBSERVED).astype(np.uint8)  # recency 1, frequency 0 in quarter 1
        by_n = np.argsort(n, kind="stable")
        ends = np.searchsorted(n[by_n], np.arange(last_quarter + 2))  # customers observed through exactly quarter j: by_n[ends[j]:ends[j + 1]]
        for quarter in range(1, last_quarter + 1):
            twice = 2 * cell.astype(np.uint16)
            counts += np.bincount(twice + (mailed[:, quarter] != 0), minlength=len(counts))
            cell = _NEXT_CELL[twice + (purchased[:, quarter] != 0)]
            cell[by_n[ends[quarter] : ends[quarter + 1]]] = _UNOBSERVED
    by_flag = counts[: 2 * _UNOBSERVED].reshape(_UNOBSERVED, 2)
    shape = (RECENCY_CAP, FREQUENCY_CAP + 1, SEASONS)
    return MailingCells(total=by_flag.sum(axis=1).reshape(shape), mailed=by_flag[:, 1].reshape(shape))


_UNOBSERVED = RECENCY_CAP * (FREQUENCY_CAP + 1) * SEASONS
"""The state after a customer's last observed quarter (cells are 0 .. 159: ((recency - 1) * 5 + frequency) * 4 + season)."""


def _next_cell() -> np.ndarray:
    """``table[2 * cell + bought]``: the cell of the next quarter, from this quarter's cell and whether the customer bought."""
    recency, frequency, season = np.unravel_index(np.arange(_UNOBSERVED), (RECENCY_CAP, FREQUENCY_CAP + 1, SEASONS))
    recency = recency + 1
    shape = (RECENCY_CAP, FREQUENCY_CAP + 1, SEASONS)
    silent = np.ravel_multi_index((np.minimum(recency + 1, RECENCY_CAP) - 1, frequency, (season + 1) % SEASONS), shape)
    bought = np.ravel_multi_index((np.zeros_like(recency), np.minimum(frequency + 1, FREQUENCY_CAP), (season + 1) % SEASONS), shape)
    table = np.full(2 * (_UNOBSERVED + 1), _UNOBSERVED, dtype=np.uint8)
    table[0 : 2 * _UNOBSERVED : 2] = silent
    table[1 : 2 * _UNOBSERVED : 2] = bought
    return table


_NEXT_CELL = _next_cell()


def check_mailing(purchased: np.ndarray, mailed: np.ndarray, n: np.ndarray, first_quarter: np.ndarray) -> MailingCheck:
    """How far the mailing can be predicted from recency, frequency and the quarter of the year (module docstring)."""
    return check_cells(mailing_cells(purchased, mailed, n, first_quarter))


def check_cells(cells: MailingCells) -> MailingCheck:
    """The check's figures from the cell counts."""
    total, mailed = cells.total.astype(np.int64), cells.mailed.astype(np.int64)
    quarters, mailed_quarters = int(total.sum()), int(mailed.sum())
    held_quarters = quarters - mailed_quarters
    if quarters == 0:
        return MailingCheck(0, 0, 0.0, 0.0, None, {name: None for name in PREDICTORS})
    by_predictor = {}
    for axis, name in enumerate(PREDICTORS):
        others = tuple(a for a in range(len(PREDICTORS)) if a != axis)
        by_predictor[name] = explained_share(total.sum(axis=others), mailed.sum(axis=others))
    return MailingCheck(
        customer_quarters=quarters,
        unmailed_quarters=held_quarters,
        base_rate_accuracy=max(mailed_quarters, held_quarters) / quarters,
        rule_accuracy=leave_one_out_accuracy(total, mailed),
        explained_share=explained_share(total, mailed),
        explained_share_by_predictor=by_predictor,
    )


def leave_one_out_accuracy(total: np.ndarray, mailed: np.ndarray) -> float:
    """Accuracy of the cell-majority rule when each observation is predicted from the rest of its cell.

    In a cell of m mailed and u unmailed quarters, a mailed quarter is predicted from
    m - 1 mailed against u unmailed, an unmailed one from m against u - 1; a tie (an
    empty rest included) goes to the more common decision overall (mail on an overall tie).
    """
    total, mailed = np.asarray(total, dtype=np.int64).ravel(), np.asarray(mailed, dtype=np.int64).ravel()
    held = total - mailed
    quarters = int(total.sum())
    if quarters == 0:
        return 0.0
    mail_overall = 2 * int(mailed.sum()) >= quarters
    mailed_right = (mailed - 1 > held) | ((mailed - 1 == held) & mail_overall)
    held_right = (held - 1 > mailed) | ((held - 1 == mailed) & (not mail_overall))
    return float((mailed * mailed_right).sum() + (held * held_right).sum()) / quarters


def explained_share(total: np.ndarray, mailed: np.ndarray) -> float | None:
    """``1 - within-cell variance / total variance`` of the 0/1 mail flag, each variance over its degrees of freedom.

    With N observations in K occupied cells, m_c mailed of n_c in cell c and M mailed in all:
    total sum of squares ``M - M^2 / N`` over ``N - 1``, within ``sum_c (m_c - m_c^2 / n_c)``
    over ``N - K``. None when the flag does not vary or no degree of freedom is left; at least 0.
    """
    total, mailed = np.asarray(total, dtype=np.float64).ravel(), np.asarray(mailed, dtype=np.float64).ravel()
    occupied = total > 0
    quarters, cells = total.sum(), int(occupied.sum())
    mailed_all = mailed.sum()
    total_squares = mailed_all - mailed_all**2 / quarters if quarters else 0.0
    if total_squares <= 1e-12 * max(quarters, 1.0) or quarters - cells <= 0:
        return None
    within_squares = float((mailed[occupied] - mailed[occupied] ** 2 / total[occupied]).sum())
    share = 1.0 - (within_squares / (quarters - cells)) / (total_squares / (quarters - 1))
    return max(share, 0.0)
