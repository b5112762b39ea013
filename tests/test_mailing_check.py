"""The mailing check: hand-built panels whose figures are computed by hand, a plain per-customer twin of the cell
counts, and simulations (fixed seeds) of random and of recency-targeted mailing."""

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from lapsewise.evaluate.simulator import MailingRule, SoFar, StreamedUniforms, draw_traits, lapse_rule, run_process
from lapsewise.model.mailing_check import (
    FREQUENCY_CAP,
    RECENCY_CAP,
    MailingCheck,
    check_mailing,
    explained_share,
    leave_one_out_accuracy,
    mailing_cells,
)
from lapsewise.model.process import Process


def arrays(purchase_quarters: list[list[int]], mail_quarters: list[list[int]], n: int):
    """Dense purchased and mailed arrays (width n + 1) from each customer's purchase and mail quarters."""
    customers = len(purchase_quarters)
    purchased = np.zeros((customers, n + 1), dtype=np.uint8)
    mailed = np.zeros((customers, n + 1), dtype=np.uint8)
    for row, (buys, mails) in enumerate(zip(purchase_quarters, mail_quarters)):
        purchased[row, [0, *buys]] = 1
        mailed[row, mails] = 1
    return purchased, mailed, np.full(customers, n), np.zeros(customers, dtype=np.int64)


def test_mailing_exactly_recency_up_to_two_is_predicted_without_error():
    # Two copies each of two customers observed in quarters 1..4 (first quarter 0, so quarter of the year = j % 4),
    # mailed exactly when recency (j - last purchase before j) <= 2:
    #   A buys only in quarter 0: recency 1, 2, 3, 4 -> mail, mail, hold, hold (frequency 0 throughout);
    #   B buys in 0 and 2:        recency 1, 2, 1, 2 -> mail in every quarter (frequency 1 in quarters 3 and 4).
    # Cells (recency, frequency, season): (1,0,1) 4 of 4 mailed, (2,0,2) 4/4, (3,0,3) 0/2, (4,0,0) 0/2, (1,1,3) 2/2, (2,1,0) 2/2.
    # Every cell is pure with two quarters or more, so the rest of each quarter's cell holds its decision: accuracy 1.
    # N = 16, M = 12: base rate 12/16 = 0.75; no within-cell variance: explained share 1.
    # Frequency alone: f=0 holds 12 quarters, 8 mailed; f=1 holds 4, all mailed. Total sum of squares 12 - 144/16 = 3,
    # within 8 - 64/12 = 8/3: share 1 - (8/3 / 14) / (3 / 15) = 1/21.
    # Season alone: seasons 1 and 2 hold 4 of 4 mailed, seasons 3 and 0 hold 2 of 4: within 1 + 1 = 2, share 1 - (2/12)/(3/15) = 1/6.
    a = ([], [1, 2])
    b = ([2], [1, 2, 3, 4])
    customers = [a, a, b, b]
    purchased, mailed, n, first = arrays([c[0] for c in customers], [c[1] for c in customers], 4)
    check = check_mailing(purchased, mailed, n, first)
    assert (check.customer_quarters, check.unmailed_quarters) == (16, 4)
    assert check.base_rate_accuracy == 0.75
    assert check.rule_accuracy == 1.0
    assert_allclose(check.explained_share, 1.0)
    assert_allclose(check.explained_share_by_predictor["recency"], 1.0)
    assert_allclose(check.explained_share_by_predictor["frequency"], 1 / 21)
    assert_allclose(check.explained_share_by_predictor["quarter_of_year"], 1 / 6)
    assert check.strongest_predictor == "recency"
    assert check.followed_rules and check.rho_estimable


def test_mailing_independent_of_recency_explains_nothing():
    # Four customers who buy only in quarter 0, observed in quarters 1..4; each is mailed in two quarters,
    # and every quarter has two of the four mailed: (1, 2), (3, 4), (1, 3), (2, 4).
    # Each quarter is one cell (recency j, frequency 0, season j % 4) with 2 of 4 mailed, the overall share:
    # within sum of squares = total = 8 - 64/16 = 4, so the unadjusted share is 0 and the adjusted one,
    # 1 - (4/12)/(4/15) = -0.25, is shown as 0. Left one out, each quarter's cell rest has 1 of its decision
    # against 2 of the other, so the rule is always wrong: accuracy 0 against a base rate of 0.5.
    purchased, mailed, n, first = arrays([[], [], [], []], [[1, 2], [3, 4], [1, 3], [2, 4]], 4)
    check = check_mailing(purchased, mailed, n, first)
    assert check.explained_share == 0.0
    assert check.base_rate_accuracy == 0.5
    assert check.rule_accuracy == 0.0
    assert check.strongest_predictor is None
    assert not check.followed_rules


def test_every_quarter_mailed_leaves_rho_not_estimable():
    # Three customers mailed in every quarter 1..5: 15 customer-quarters, none unmailed; the flag never varies.
    purchased, mailed, n, first = arrays([[2], [], [1, 3]], [[1, 2, 3, 4, 5]] * 3, 5)
    check = check_mailing(purchased, mailed, n, first)
    assert (check.customer_quarters, check.unmailed_quarters, check.unmailed_share) == (15, 0, 0.0)
    assert check.explained_share is None and check.rule_accuracy == 1.0 and check.base_rate_accuracy == 1.0
    assert not check.rho_estimable and not check.followed_rules


def test_leave_one_out_ties_go_to_the_more_common_decision():
    # Cell 1: 2 mailed, 1 held. A mailed quarter sees 1 against 1 (a tie: the overall majority, mail, is right);
    # the held one sees 2 mailed against 0 (wrong). Cell 2: 1 mailed alone: its rest is empty, a tie, mail: right.
    # 3 mailed of 4 overall; right 2 + 1 = 3 of 4.
    assert leave_one_out_accuracy(np.array([3, 1]), np.array([2, 1])) == 0.75
    # The same cells with the decisions swapped (held is now the majority): the held quarters of cell 1 see a tie
    # and are right (2), the mailed one sees 2 held (wrong); cell 2's held quarter is right: 3 of 4.
    assert leave_one_out_accuracy(np.array([3, 1]), np.array([1, 0])) == 0.75


def test_explained_share_of_two_cells_by_hand():
    # Cells of 10 quarters, 9 and 1 mailed: N = 20, K = 2, M = 10. Total sum of squares 10 - 100/20 = 5;
    # within (9 - 8.1) + (1 - 0.1) = 1.8. Share 1 - (1.8/18) / (5/19) = 1 - 0.1 * 3.8 = 0.62.
    assert_allclose(explained_share(np.array([10, 10]), np.array([9, 1])), 0.62)
    # A single occupied cell leaves no variance to explain beyond the mean: nothing is explained.
    assert explained_share(np.array([10, 0]), np.array([4, 0])) == 0.0


def plain_cells(purchased, mailed, n, first_quarter):
    """The cell counts customer by customer and quarter by quarter, the way the module docstring defines them."""
    total = np.zeros((RECENCY_CAP, FREQUENCY_CAP + 1, 4), dtype=np.int64)
    mailed_count = np.zeros_like(total)
    for row in range(len(n)):
        for j in range(1, int(n[row]) + 1):
            before = np.flatnonzero(purchased[row, :j])
            recency = min(j - before.max(), RECENCY_CAP)
            frequency = min(int(purchased[row, 1:j].sum()), FREQUENCY_CAP)
            season = (int(first_quarter[row]) + j) % 4
            total[recency - 1, frequency, season] += 1
            mailed_count[recency - 1, frequency, season] += int(mailed[row, j])
    return total, mailed_count


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_cell_counts_match_the_plain_count(seed):
    # Random panels: purchases at 30%, mailing at 60%, n from 0 to 20, first quarters anywhere; columns after n are 0
    # as in a Panel. Recency and frequency pass their caps (8 and 4) in the long histories.
    rng = np.random.default_rng(seed)
    customers, width = 300, 21
    n = rng.integers(0, width, customers)
    observed = np.arange(width)[None, :] <= n[:, None]
    purchased = ((rng.random((customers, width)) < 0.3) & observed).astype(np.uint8)
    purchased[:, 0] = 1
    mailed = ((rng.random((customers, width)) < 0.6) & observed).astype(np.uint8)
    mailed[:, 0] = 0
    first = rng.integers(8000, 8100, customers)
    cells = mailing_cells(purchased, mailed, n, first)
    total, mailed_count = plain_cells(purchased, mailed, n, first)
    assert_array_equal(cells.total, total)
    assert_array_equal(cells.mailed, mailed_count)
    assert cells.total.sum() == n.sum()  # every observed quarter after quarter 0, once
    assert cells.total[RECENCY_CAP - 1].sum() > 0 and cells.total[:, FREQUENCY_CAP].sum() > 0


def test_to_dict_round_trips_and_keeps_its_keys():
    purchased, mailed, n, first = arrays([[], [2]], [[1, 2], [1, 3, 4]], 4)
    check = check_mailing(purchased, mailed, n, first)
    data = check.to_dict()
    # The stable keys fit --json and the model file promise (issue 13, item 3).
    assert set(data) == {
        "customer_quarters",
        "unmailed_quarters",
        "unmailed_share",
        "base_rate_accuracy",
        "rule_accuracy",
        "explained_share",
        "explained_share_by_predictor",
        "strongest_predictor",
        "followed_rules",
    }
    assert MailingCheck.from_dict(data).to_dict() == data


# ---------------------------------------------------------------- simulations

TRUE_PROCESS = Process(alpha=1.2, beta=2.5, gamma=0.7, delta=4.0, rho=0.6)


def random_mailing(share: float) -> MailingRule:
    """Mail each customer in play with probability ``share``, whatever the firm has seen."""

    def rule(seen: SoFar) -> np.ndarray:
        return seen.in_play & (seen.rng.random(len(seen.in_play)) < share)

    return rule


def simulated_check(rule: MailingRule, seed: int, customers: int = 4_000) -> MailingCheck:
    rng = np.random.default_rng(seed)
    n = rng.integers(8, 17, size=customers)
    traits = draw_traits(TRUE_PROCESS, customers, rng)
    result = run_process(TRUE_PROCESS, traits, int(n.max()) + 1, rule, StreamedUniforms(rng, customers), last=n, rng=rng)
    return check_mailing(result.purchased, result.mailed, n, rng.integers(8000, 8004, customers))


@pytest.mark.parametrize("seed", [3, 4])
def test_random_mailing_does_not_follow_rules(seed):
    # About 48,000 customer-quarters mailed at random at 70%: the adjusted share is 0 in expectation with a spread
    # of about sqrt(2 * 160) / 48,000 < 0.001, and the left-one-out rule cannot beat the base rate in expectation.
    check = simulated_check(random_mailing(0.7), seed)
    assert_allclose(check.unmailed_share, 0.30, atol=0.01)
    assert check.explained_share < 0.01
    assert abs(check.accuracy_gain) < 0.01
    assert not check.followed_rules


@pytest.mark.parametrize("seed", [3, 4])
def test_mailing_targeted_on_recency_follows_rules(seed):
    # Mail while silent for 3 quarters or fewer, 5% of the rest at random: recency alone nearly decides the mailing
    # (about 0.9 of the variance explained at these settings), far above the 0.10 threshold.
    check = simulated_check(lapse_rule(4, 0.05), seed)
    assert check.followed_rules
    assert check.strongest_predictor == "recency"
    assert check.explained_share > 0.5
    assert check.explained_share_by_predictor["recency"] > 5 * check.explained_share_by_predictor["frequency"]
