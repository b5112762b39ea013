"""The control cell: its size against the closed form of the two-proportion sample size, the stratified draw,
the reading after the quarter, and a simulation of the whole loop (cell drawn, quarter run, rho read back)."""

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from builders import synthetic_values
from lapsewise.budget.control_cell import Z_95, cell_size, draw_control_cell, eligible_customers, proportional_allocation, ratio_half_width
from lapsewise.budget.control_reading import cell_counts, ratio_estimate, read_control_cell
from lapsewise.data.panel import Panel
from lapsewise.errors import InputError
from lapsewise.evaluate.simulator import StreamedUniforms, draw_traits, lapse_rule, run_process
from lapsewise.files.inputs import Loaded
from lapsewise.files.writing import write_csv
from lapsewise.model.process import Process

# ---------------------------------------------------------------- the size


def closed_form_size(r_m, rho, precision, eligible=None):
    """The smallest n_u from the closed form of the two-proportion variance (no search).

    The variance of the log of a ratio of two independent proportions is (1 - r_u) / (n_u r_u) + (1 - r_m) / (n_m r_m)
    (Katz, Baptista, Azen & Pike 1978, Biometrics 34, 469-474; from memory), so Var(rho_hat) ~= rho^2 times it.
    Setting z^2 Var = D^2 with A = (1 - r_u) / r_u, B = (1 - r_m) / r_m, c = D^2 / (z rho)^2 and n_m = N - n_u gives
    c n^2 - (c N + A - B) n + A N = 0, whose smaller root is the boundary; as N -> infinity it tends to A / c,
    that is n_u = z^2 rho^2 (1 - r_u) / (r_u D^2), the one-sample normal-approximation size for a proportion
    measured relative to itself.
    """
    r_u = rho * r_m
    a, b, c = (1 - r_u) / r_u, (1 - r_m) / r_m, precision**2 / (Z_95 * rho) ** 2
    if eligible is None:
        return int(np.ceil(a / c))
    s = c * eligible + a - b
    return int(np.ceil((s - np.sqrt(s * s - 4 * c * a * eligible)) / (2 * c)))


@pytest.mark.parametrize(
    "r_m, rho, precision, eligible",
    [(0.2, 0.6, 0.1, 50_000), (0.05, 0.3, 0.05, 400_000), (0.35, 0.9, 0.2, 5_000), (0.12, 0.5, 0.08, 100_000), (0.6, 0.2, 0.1, 20_000)],
)
def test_cell_size_is_the_closed_form_of_the_two_proportion_size(r_m, rho, precision, eligible):
    assert cell_size(rho, r_m, eligible, precision) == closed_form_size(r_m, rho, precision, eligible)


@pytest.mark.parametrize("r_m, rho, precision", [(0.2, 0.6, 0.1), (0.05, 0.3, 0.05), (0.35, 0.9, 0.2)])
def test_with_an_unlimited_mailed_group_the_size_is_the_one_sample_formula(r_m, rho, precision):
    # n_u = z^2 rho^2 (1 - r_u) / (r_u D^2) when n_m -> infinity (see closed_form_size). A base of 10^12 stands for
    # infinity: the mailed term then moves the boundary by less than one customer.
    limit = closed_form_size(r_m, rho, precision)
    assert cell_size(rho, r_m, 10**12, precision) in (limit, limit + 1)
    # Worked by hand for (0.2, 0.6, 0.1): r_u = 0.12, 1.96^2 * 0.36 * 0.88 / (0.12 * 0.01) = 1014.1 -> 1015.
    if (r_m, rho, precision) == (0.2, 0.6, 0.1):
        assert limit == 1015


def test_the_size_is_the_smallest_that_reaches_the_precision():
    held = cell_size(0.4, 0.15, 30_000, 0.07)
    assert ratio_half_width(0.4, 0.15, held, 30_000) <= 0.07 < ratio_half_width(0.4, 0.15, held - 1, 30_000)


def test_a_precision_half_the_base_cannot_reach_is_refused_with_the_best_one():
    # 1,000 eligible, half held: 1.96 * 0.5 * sqrt((1 - 0.05) / (500 * 0.05) + (1 - 0.1) / (500 * 0.1)) = 0.98 * sqrt(0.056) = 0.2319.
    with pytest.raises(InputError, match=r"500\).*\+-0\.232\b.*--precision 0\.232 "):
        cell_size(0.5, 0.1, 1_000, 0.05)


@pytest.mark.parametrize("precision", [0.0, -0.1, 1.0, 1.5, float("nan")])
def test_a_precision_outside_0_to_1_is_refused(precision):
    with pytest.raises(InputError, match="--precision"):
        cell_size(0.5, 0.2, 10_000, precision)


# ---------------------------------------------------------------- the draw


def test_allocation_is_proportional_and_meets_the_total():
    sizes = np.array([500, 300, 150, 50])
    # 137 * sizes / 1000 = 68.5, 41.1, 20.55, 6.85: whole parts 68 + 41 + 20 + 6 = 135, the two largest remainders
    # (0.85 of the fourth, 0.55 of the third) take one more each.
    assert proportional_allocation(sizes, 137).tolist() == [68, 41, 21, 7]
    assert proportional_allocation(sizes, 1000).tolist() == sizes.tolist()


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(1, 400), min_size=1, max_size=12), st.floats(0.0, 0.5))
def test_allocation_never_exceeds_a_segment_and_is_within_one_of_its_quota(sizes, share):
    sizes = np.array(sizes)
    total = int(share * sizes.sum())
    parts = proportional_allocation(sizes, total)
    assert parts.sum() == total
    assert (parts <= sizes).all()
    assert (np.abs(parts - total * sizes / sizes.sum()) < 1).all()


def values_for_cell(seed, customers=4_000, suppressed_share=0.0):
    """Synthetic customer values (builders.synthetic_values), about 60% of them worth mailing."""
    return synthetic_values(np.random.default_rng(seed), customers=customers, suppressed_share=suppressed_share)


def test_the_cell_is_stratified_in_proportion_and_holds_only_the_eligible():
    values = values_for_cell(1)
    cell = draw_control_cell(values, 0.25, 0.5, "test", seed=3)
    eligible = (values.values.max(axis=1) > 0) & ~values.suppressed
    assert cell.eligible == eligible.sum()
    held = np.isin(values.customer_ids, cell.customer_ids)
    assert not (held & ~eligible).any()
    assert cell.customers_in_cell == cell_size(0.5, values.p_buy[eligible].mean(), cell.eligible, 0.25)
    counts = pd.Series(values.segment[held]).value_counts()
    table = cell.segments.set_index("segment")
    assert (counts.reindex(table.index, fill_value=0) == table.held).all()
    assert table.held.sum() == cell.customers_in_cell
    quota = cell.customers_in_cell * table.eligible / table.eligible.sum()
    assert (np.abs(table.held - quota) < 1).all()
    # The value forgone is the held customers' best value of mailing, summed.
    assert cell.expected_value_forgone == pytest.approx(values.values[held].max(axis=1).sum())


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**32 - 1), st.floats(0.0, 0.6))
def test_suppressed_customers_are_never_in_the_cell(seed, share):
    # About 1,790 of the 3,000 are worth mailing; 60% suppressed leaves about 720, more than twice the 144 the cell needs.
    rng = np.random.default_rng(seed)
    values = values_for_cell(5, customers=3_000)
    values = replace(values, suppressed=rng.random(3_000) < share)
    cell = draw_control_cell(values, 0.3, 0.5, "test", seed=seed)
    assert cell.customers_in_cell > 0
    assert not np.isin(cell.customer_ids, values.customer_ids[values.suppressed]).any()


def test_the_same_seed_gives_the_same_file_and_another_seed_another_cell(tmp_path):
    values = values_for_cell(2)
    paths = []
    for name, seed in (("a", 11), ("b", 11), ("c", 12)):
        paths.append(tmp_path / f"{name}.csv")
        write_csv(paths[-1], draw_control_cell(values, 0.25, 0.5, "test", seed=seed).rows())
    assert paths[0].read_bytes() == paths[1].read_bytes()
    assert paths[0].read_bytes() != paths[2].read_bytes()


# ---------------------------------------------------------------- the reading


def test_the_ratio_estimate_of_one_segment_is_the_rate_ratio_with_the_sizing_variance():
    # One segment: rho = (30 / 200) / (500 / 2000) = 0.6; the delta-method variance with r_u = 0.6 * 0.25 = 0.15 is
    # 0.6^2 * ((1 - 0.15) / (200 * 0.15) + (1 - 0.25) / (2000 * 0.25)), the variance the cell is sized with.
    rho, se = ratio_estimate([200], [30], [2000], [500])
    assert rho == pytest.approx(0.6)
    assert se == pytest.approx(0.6 * np.sqrt(0.85 / 30 + 0.75 / 500))
    assert Z_95 * se == pytest.approx(ratio_half_width(0.6, 0.25, 200, 2200))


def test_segments_are_combined_with_the_cells_weights():
    # Cell 100 and 300 held, mailed rates 0.4 and 0.1: M = 0.25 * 0.4 + 0.75 * 0.1 = 0.175; 35 cell orders of 400.
    rho, _ = ratio_estimate([100, 300], [20, 15], [1000, 3000], [400, 300])
    assert rho == pytest.approx((35 / 400) / 0.175)


def panel_of(purchased, mailed, end=100):
    """A Panel from arrays aligned on quarter 0; each customer observed through their last column with data."""
    purchased, mailed = np.asarray(purchased, dtype=np.uint8), np.asarray(mailed, dtype=np.uint8)
    n = np.full(len(purchased), purchased.shape[1] - 1)
    return Panel(np.array([f"C{i:02d}" for i in range(len(purchased))]), end - n, end, purchased, purchased.astype(np.float32) * 20, mailed, True)


def cell_file(ids, segments):
    return Loaded("cell.csv", pd.DataFrame({"customer_id": ids, "segment": segments}))


def test_cell_counts_match_held_and_mailed_customers_by_their_state_before_the_quarter():
    # Five quarters (0..4); quarter 4 is the cell's. States before it (x, silent at n = 3):
    #   C00 (1, 1) held, ordered;  C01 (1, 1) mailed, ordered;  C02 (1, 1) mailed, no order;
    #   C03 (0, 3) held but mailed anyway;  C04 (0, 3) mailed;  C05 (2, 0) mailed, not a state the cell holds.
    purchased = [[1, 0, 1, 0, 1], [1, 0, 1, 0, 1], [1, 0, 1, 0, 0], [1, 0, 0, 0, 0], [1, 0, 0, 0, 1], [1, 1, 0, 1, 1]]
    mailed = [[0, 1, 1, 1, 0], [0, 1, 1, 1, 1], [0, 1, 1, 1, 1], [0, 1, 1, 1, 1], [0, 1, 1, 1, 1], [0, 1, 1, 1, 1]]
    counts = cell_counts(panel_of(purchased, mailed), cell_file(["C00", "C03", "ZZ"], ["1 repeat, 1 silent", "0 repeat, 2-3 silent"] + ["x"]))
    assert counts.segments == ("0 repeat, 2-3 silent", "1 repeat, 1 silent", "x")
    assert counts.cell_size.tolist() == [0, 1, 0] and counts.cell_orders.tolist() == [0, 1, 0]
    assert counts.mailed_count.tolist() == [0, 2, 0] and counts.mailed_orders.tolist() == [0, 1, 0]
    assert (counts.listed, counts.matched, counts.mailed_anyway, counts.joined) == (3, 2, 1, 0)
    reading = read_control_cell(counts, 0.3, 0.05)
    assert reading.rho_cell == pytest.approx(1 / 0.5) and reading.customers == 1


def test_a_piece_that_came_after_an_order_still_counts_as_sent_in_the_comparison():
    # C01 was sent a piece in quarter 4 that arrived after its order, so the panel does not count the quarter as
    # mailed (the model's timing); the randomised comparison is of sending against holding, so C01 is a mailed
    # comparison customer with an order, and C03, held in the file but sent a late piece, was mailed anyway.
    purchased = [[1, 0, 1, 0, 1], [1, 0, 1, 0, 1], [1, 0, 1, 0, 0], [1, 0, 1, 0, 1]]
    mailed = [[0, 1, 1, 1, 0], [0, 1, 1, 1, 0], [0, 1, 1, 1, 1], [0, 1, 1, 1, 0]]
    panel = replace(panel_of(purchased, mailed), late_pieces=np.array([1 * 5 + 4, 3 * 5 + 4]))
    counts = cell_counts(panel, cell_file(["C00", "C03"], ["1 repeat, 1 silent"] * 2))
    assert counts.cell_size.tolist() == [1] and counts.cell_orders.tolist() == [1]
    assert counts.mailed_count.tolist() == [2] and counts.mailed_orders.tolist() == [1]
    assert counts.mailed_anyway == 1


def test_a_cell_whose_comparison_group_never_ordered_is_refused():
    # C00 held, C01 mailed in the same state (1, 1) but without an order: no mailed rate to divide by.
    panel = panel_of([[1, 0, 1, 0, 1], [1, 0, 1, 0, 0]], [[0, 1, 1, 1, 0], [0, 1, 1, 1, 1]])
    with pytest.raises(InputError, match="placed no order"):
        read_control_cell(cell_counts(panel, cell_file(["C00"], ["1 repeat, 1 silent"])), 0.3, 0.05)


def test_a_cell_matching_no_customer_is_refused():
    panel = panel_of([[1, 0, 1]], [[0, 1, 0]])
    with pytest.raises(InputError, match="none of its 2 ids is a customer"):
        cell_counts(panel, cell_file(["Q1", "Q2"], ["a", "b"]))


def test_a_cell_without_mailings_is_refused():
    panel = replace(panel_of([[1, 0, 1]], [[0, 1, 1]]), mailing_history=False)
    with pytest.raises(InputError, match="--mailings"):
        cell_counts(panel, cell_file(["C00"], ["a"]))


# ---------------------------------------------------------------- the loop, simulated

TRUE = Process(alpha=1.2, beta=2.5, gamma=0.7, delta=4.0, rho=0.6)


def test_simulated_cells_cover_the_true_rho_at_the_nominal_rate():
    """A base drawn with the project's simulator (true rho 0.6) under a lapse rule; the policy mails everyone
    silent fewer than 6 quarters. The cell is sized for +-0.1 with the true mailed rate, drawn, and the next
    quarter is run 200 times with the cell held and the rest of the eligible mailed; rho is read back as
    ``fit --control`` reads it. A correct interval covers 0.6 in about 95% of the repetitions (binomial
    sd 1.5 points at 200), and its half-width averages about the 0.1 planned."""
    rng = np.random.default_rng(2024)
    customers, quarters, reps, precision = 14_000, 12, 200, 0.1
    first = rng.integers(0, quarters - 2, customers)
    traits = draw_traits(TRUE, customers, rng)
    base = run_process(TRUE, traits, quarters, lapse_rule(3, 0.3), StreamedUniforms(rng, customers), first=first, rng=rng)
    # The state when the cell is drawn, in the segments' measures: repeat purchases and silent quarters.
    columns = np.arange(quarters)
    x = base.purchased.sum(axis=1) - 1
    last = (base.purchased * columns).max(axis=1)
    silent = quarters - 1 - last
    eligible = np.flatnonzero(silent < 6)
    segment = np.array([f"{min(a, 2)} repeat, {min(b, 3)} silent" for a, b in zip(x, silent)], dtype=object)
    # P(order next quarter if mailed) = alive now x stays (1 - theta) x p: the true mailed rate.
    p_buy = base.alive * (1 - traits.theta) * traits.p
    values = synthetic_values(rng, customers=customers)
    values = replace(values, segment=segment, p_buy=p_buy, values=np.where(silent < 6, 1.0, -1.0)[:, None], suppressed=np.zeros(customers, dtype=bool))

    # The next quarter, 200 times: leave with theta, then buy with p mailed and 0.6 p held (the simulator's step).
    cells = [draw_control_cell(values, precision, TRUE.rho, "truth", seed=seed) for seed in range(reps)]
    held = np.zeros((reps, customers), dtype=bool)
    for r, cell in enumerate(cells):
        held[r, pd.Index(values.customer_ids).get_indexer(cell.customer_ids)] = True
    mailed = np.zeros((reps, customers), dtype=bool)
    mailed[:, eligible] = True
    mailed &= ~held
    stays = base.alive & (rng.random((reps, customers)) >= traits.theta)
    ordered = stays & (rng.random((reps, customers)) < traits.p * np.where(mailed, 1.0, TRUE.rho))

    # Read each repetition as fit --control does: the panel with the quarter added, the cell file's ids and segments.
    width = quarters + 1
    aligned_purchased = np.zeros((customers, width), dtype=np.uint8)
    aligned_mailed = np.zeros((customers, width), dtype=np.uint8)
    shift = (np.arange(width)[None, :] + first[:, None]).clip(max=quarters - 1)
    inside = np.arange(width)[None, :] <= (quarters - 1 - first)[:, None]
    aligned_purchased[:] = np.take_along_axis(base.purchased, shift, axis=1) * inside
    aligned_mailed[:] = np.take_along_axis(base.mailed, shift, axis=1) * inside
    n = quarters - first  # the new quarter is column n of each aligned row
    estimates = np.empty((reps, 2))
    for r, cell in enumerate(cells):
        purchased_r, mailed_r = aligned_purchased.copy(), aligned_mailed.copy()
        purchased_r[np.arange(customers), n] = ordered[r]
        mailed_r[np.arange(customers), n] = mailed[r]
        panel = Panel(values.customer_ids, 100 - n, 100, purchased_r, purchased_r.astype(np.float32), mailed_r, True)
        counts = cell_counts(panel, cell_file(cell.customer_ids, cell.segment))
        assert counts.mailed_anyway == 0 and counts.joined == 0 and counts.cell_size.sum() == cell.customers_in_cell
        estimates[r] = ratio_estimate(counts.cell_size, counts.cell_orders, counts.mailed_count, counts.mailed_orders)
    rho, se = estimates.T
    covered = np.abs(rho - TRUE.rho) <= Z_95 * se
    assert 0.90 <= covered.mean() <= 0.99, covered.mean()
    assert abs(np.mean(Z_95 * se) / precision - 1) < 0.15, np.mean(Z_95 * se)
    print(f"coverage {covered.mean():.3f}, mean half-width {np.mean(Z_95 * se):.4f}, mean rho {rho.mean():.4f}, cell {cells[0].customers_in_cell}")


def test_a_seasonal_model_sizes_the_cell_at_the_next_quarters_multiplier():
    # The values plan an average quarter; the cell is sized with the chance of an order next quarter if mailed, which
    # with seasons carries the next quarter's multiplier. small_panel's as-of quarter is 100, so the next is quarter
    # 101, the second of the year (multiplier 0.4 here, against a mean of 0.75): the planned rate is lower and the
    # cell larger than the average quarter would make it.
    from builders import MODEL, POLICY, small_panel
    from lapsewise.app import pipeline
    from lapsewise.data.histories import compress
    from lapsewise.model.posterior import posterior

    panel = small_panel(2_000, seed=5)
    seasonal = replace(MODEL, churn=replace(MODEL.churn, seasons=(1.0, 0.4, 0.9, 0.7)))
    inputs = pipeline.PlanInputs(seasonal, POLICY, panel, pipeline.value_customers(seasonal, panel, POLICY), None)
    cell = pipeline.control_cell(inputs, 0.25, seed=2)
    eligible = eligible_customers(inputs.values)
    histories = compress(panel, seasons=True)
    rho = MODEL.churn.rho if POLICY.economics.unmailed_response is None else POLICY.economics.unmailed_response
    p_buy = posterior(replace(seasonal.churn.process, rho=rho), histories).p_buy[histories.inverse]
    assert len(cell.customer_ids) == cell_size(rho, float(p_buy[eligible].mean()), int(eligible.sum()), 0.25)
    averaged = draw_control_cell(inputs.values, 0.25, rho, "test", seed=2)
    assert len(cell.customer_ids) > len(averaged.customer_ids)
