"""The mail list: its columns and decisions, and suppressed customers never mailed."""

import numpy as np

from builders import one_version_policy, synthetic_values
from lapsewise.budget.integer_program import make_plan
from lapsewise.budget.mail_list import mail_list


def test_suppressed_customers_are_never_mailed():
    rng = np.random.default_rng(4)
    values = synthetic_values(rng, customers=500, suppressed_share=0.2)
    plan = make_plan(values, one_version_policy(), budget=None)
    rows = mail_list(values, plan.assignment)
    assert (rows.loc[values.suppressed, "decision"] == "suppressed").all()
    assert not (plan.assignment[values.suppressed] >= 0).any()
    worth = (values.values[:, 0] > 0) & ~values.suppressed
    assert (rows.loc[worth, "decision"] == "mail").all()


def test_mail_list_columns_and_decisions():
    rng = np.random.default_rng(5)
    values = synthetic_values(rng, customers=300, suppressed_share=0.1)
    plan = make_plan(values, one_version_policy(piece_cost=0.5), budget=10.0)
    rows = mail_list(values, plan.assignment)
    assert list(rows.columns) == ["customer_id", "segment", "version", "p_alive", "p_buy", "value_of_mailing", "decision", "rule"]
    assert set(rows.decision) <= {"mail", "stop", "over-budget", "suppressed"}
    assert (rows.loc[rows.decision == "stop", "value_of_mailing"] <= 0).all()
    assert (rows.loc[rows.decision == "over-budget", "value_of_mailing"] > 0).all()
    assert (rows.decision == "mail").sum() == 20  # 10.0 / 0.5 pieces, all worth mailing in this draw
