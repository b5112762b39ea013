"""This quarter's mail list: one row per customer with the version and the decision.

Decisions: ``mail``; ``stop`` (the stop rule says no: no version is worth
mailing); ``over-budget`` (worth mailing, but the budget ran out);
``suppressed`` (on the suppression list: never mailed, whatever their value).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from lapsewise.budget.integer_program import RULES
from lapsewise.budget.segments import categorical
from lapsewise.budget.values import CustomerValues

DECISIONS = ("mail", "stop", "over-budget", "suppressed")


def mail_list(values: CustomerValues, assignment: np.ndarray, rule: np.ndarray | None = None) -> pd.DataFrame:
    """One row per customer: customer_id, segment, version, p_alive, p_buy, value_of_mailing, decision, rule.

    With values averaged over draws of the parameters, ``value_of_mailing`` is their
    mean and three columns follow it: ``value_low`` and ``value_high``, the 5th and
    95th percentiles over the draws, and ``may_flip``, True where the range spans 0
    (the sign of the value, so the mail-or-stop decision, turns within it).

    The version shown is the one assigned, or for customers not mailed the version
    with the highest value. ``stop``: no version is worth mailing; ``over-budget``:
    worth mailing but the budget ran out; ``suppressed``: on the suppression list.
    ``rule`` is empty, or names the policy rule that puts the customer out of value
    order within their version (:data:`lapsewise.budget.integer_program.RULES`): a
    mailed customer forced in by ``min_share``, or an over-budget one worth more than
    a mailed customer of the same version but kept out by ``max_share`` or by ``one
    version per segment``.
    """
    best = values.values.argmax(axis=1)
    version_index = np.where(assignment >= 0, assignment, best)
    value = values.values[np.arange(len(version_index)), version_index]
    decision = np.select(
        [values.suppressed, assignment >= 0, value > 0],
        [DECISIONS.index("suppressed"), DECISIONS.index("mail"), DECISIONS.index("over-budget")],
        DECISIONS.index("stop"),
    )
    columns = {
        "customer_id": values.customer_ids,
        "segment": categorical(values.segment),
        "version": pd.Categorical.from_codes(version_index, categories=list(values.versions)),
        "p_alive": values.p_alive,
        "p_buy": values.p_buy * values.responses[version_index],
        "value_of_mailing": value,
    }
    if values.draws:
        low, high = values.value_range(version_index)
        columns.update(value_low=low, value_high=high, may_flip=(low < 0) & (high > 0))
    columns.update(
        decision=pd.Categorical.from_codes(decision, categories=list(DECISIONS)),
        rule=pd.Categorical.from_codes(np.zeros(len(decision), dtype=np.int64) if rule is None else rule, categories=list(RULES)),
    )
    return pd.DataFrame(columns)


def decision_counts(rows: pd.DataFrame) -> dict[str, int]:
    """Customers per decision, every decision listed (0 when none)."""
    counts = rows["decision"].value_counts()
    return {decision: int(counts.get(decision, 0)) for decision in DECISIONS}
