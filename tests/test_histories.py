"""Distinct histories: the fast packing against the plain quarter-by-quarter count and a pandas group-by."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

from conftest import THREE_CUSTOMERS, row_of
from lapsewise.data import reference
from lapsewise.data.histories import compress, compress_arrays, compress_both, history_arrays, season_quarters
from lapsewise.data.summary import summarize


def test_compress_groups_identical_histories(make_panel):
    # Quarters 0..5 are January-March 2023 .. April-June 2024.
    panel = make_panel(
        [
            "E5,2023-02-01,10",  # bought in quarters 0 and 3
            "E5,2023-10-10,20",
            "F6,2023-03-30,99",  # the same quarters as E5, other days and amounts
            "F6,2023-12-01,1",
            "G7,2023-01-15,5",  # quarter 0 only
            "H8,2024-04-01,7",  # starts in the as-of quarter: n = 0
        ],
        mailings=[
            "E5,2023-04-10",  # quarter 1
            "E5,2024-01-15",  # quarter 4
            "F6,2023-06-30",  # quarter 1, like E5
            "F6,2024-03-31",  # quarter 4, like E5
            "G7,2023-05-01",  # quarter 1
            "G7,2023-08-01",  # quarter 2
        ],
        as_of="2024-06-30",
    )
    histories = compress(panel)
    e5, f6, g7, h8 = (histories.inverse[row_of(panel, c)] for c in ("E5", "F6", "G7", "H8"))
    # E5 and F6 share one history; G7 and H8 have their own: three histories for four customers.
    assert e5 == f6
    assert len({e5, g7, h8}) == 3
    assert histories.size == 3
    assert sorted(histories.count.tolist()) == [1, 1, 2]
    assert histories.count.sum() == panel.customers
    # E5: one repeat purchase (quarter 3, unmailed), silent quarter 1 mailed and 2 unmailed before it,
    # then quarter 4 mailed and 5 not; the mail flags are padded to the longest silence (G7's 5 quarters).
    assert (histories.x[e5], histories.x_unmailed[e5], histories.t_x[e5], histories.n[e5]) == (1, 1, 3, 5)
    assert (histories.mailed_silent[e5], histories.unmailed_silent[e5]) == (1, 1)
    assert histories.after_last[e5].tolist() == [1, 0, 0, 0, 0]
    # G7: silent for all 5 quarters after quarter 0, mailed in the first two.
    assert histories.after_last[g7].tolist() == [1, 1, 0, 0, 0]
    assert histories.silent_quarters[g7] == 5
    # H8: nothing observed after quarter 0.
    assert (histories.n[h8], histories.after_last[h8].sum()) == (0, 0)


def test_compress_inverse_maps_each_customer_back_to_its_own_history(make_panel):
    panel = make_panel(THREE_CUSTOMERS + ["D4,2023-01-05,9", "D4,2023-07-30,9"], as_of="2023-12-31")
    summary, histories = summarize(panel), compress(panel)
    # C3 and D4 both bought in quarters 0 and 2 of four, all mailed: one shared history, four customers in all.
    assert histories.size == 3
    assert histories.count.sum() == 4
    for name in ("x", "t_x", "n", "silent_quarters"):
        assert_array_equal(getattr(histories, name)[histories.inverse], getattr(summary, name), err_msg=name)


@pytest.mark.parametrize("width", [6, 41, 75])
def test_history_statistics_and_their_grouping_match_a_quarter_by_quarter_count(width):
    # Reference: the definitions counted row by row, and numpy's np.unique over whole rows for the grouping.
    # 75 quarters need two 64-bit words of mail flags, so both ways of combining words into one key are used.
    rng = np.random.default_rng(7)
    rows = 400
    purchased = (rng.random((rows, width)) < 0.15).astype(np.uint8)
    mailed = (rng.random((rows, width)) < 0.5).astype(np.uint8)
    purchased[rows // 2 :] = purchased[: rows // 2]  # repeated rows, so that histories are shared
    mailed[rows // 2 :] = mailed[: rows // 2]
    n = rng.integers(0, width, size=rows)
    n[rows // 2 :] = n[: rows // 2]
    # Rows with the same mail flags after one last-purchase quarter and different counts before it:
    # the flags' word is then the same and only the counts tell the histories apart.
    last = min(4, width - 2)
    purchased[:40, 1 : last + 1] = rng.random((40, last)) < 0.5
    purchased[:40, last] = 1
    purchased[:40, last + 1 :] = 0
    mailed[:40] = 1
    n[:40] = width - 1
    arrays = history_arrays(purchased, mailed, n)
    for row in range(rows):
        expected = reference.history_statistics(purchased[row], mailed[row], int(n[row]))
        flags = expected.pop("after_last")
        assert {name: int(arrays[name][row]) for name in expected} == expected, row
        assert arrays["after_last"][row, : len(flags)].tolist() == flags and not arrays["after_last"][row, len(flags) :].any(), row
    histories = compress_arrays(arrays)
    scalars = ["x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent"]
    table = np.column_stack([arrays[name] for name in scalars] + [arrays["after_last"]])
    distinct, inverse, counts = np.unique(table, axis=0, return_inverse=True, return_counts=True)
    assert histories.size == len(distinct)
    # The same partition of the rows: each history pairs with one np.unique row and each row with one history.
    assert len(set(zip(histories.inverse.tolist(), inverse.ravel().tolist()))) == histories.size
    assert sorted(histories.count.tolist()) == sorted(counts.tolist())
    table_of_history = np.column_stack([getattr(histories, name) for name in scalars] + [histories.after_last])
    assert_array_equal(table_of_history[histories.inverse], table)


@pytest.mark.parametrize("seed", range(4))
def test_compression_equals_the_plain_group_by(seed):
    # The fast packing into 64-bit words against reference.grouped_histories: the statistics counted quarter by
    # quarter, one customer at a time, and grouped by a pandas group-by. Same distinct histories, same counts.
    rng = np.random.default_rng(100 + seed)
    rows, width = 300, [5, 12, 70, 130][seed]
    purchased = (rng.random((rows, width)) < 0.3).astype(np.uint8)
    mailed = (rng.random((rows, width)) < 0.6).astype(np.uint8)
    n = rng.integers(0, width, size=rows)
    for array in (purchased, mailed, n):  # the last third repeats the first: shared histories
        array[-100:] = array[:100]
    histories = compress_arrays(history_arrays(purchased, mailed, n))
    silent = histories.silent_quarters
    fast = pd.DataFrame({name: getattr(histories, name) for name in reference.SCALARS})
    fast["after_last"] = ["".join(str(int(flag)) for flag in flags[:length]) for flags, length in zip(histories.after_last, silent)]
    fast["count"] = histories.count
    fast = fast.sort_values(list(fast.columns[:-1])).reset_index(drop=True)
    plain = reference.grouped_histories(purchased, mailed, n)
    pd.testing.assert_frame_equal(fast, plain, check_dtype=False)
    assert histories.count.sum() == rows and (histories.count[histories.inverse[-100:]] >= 2).all()


@pytest.mark.parametrize("seed", range(3))
def test_seasonal_compression_equals_the_plain_group_by(seed):
    # With seasons: the fast statistics by quarter of the year against reference.grouped_histories counting them
    # quarter by quarter from the definitions (quarter j of a customer is in quarter of the year (phase + j) % 4).
    rng = np.random.default_rng(200 + seed)
    rows, width = 300, [6, 23, 70][seed]
    purchased = (rng.random((rows, width)) < 0.3).astype(np.uint8)
    mailed = (rng.random((rows, width)) < 0.6).astype(np.uint8)
    n = rng.integers(0, width, size=rows)
    phase = rng.integers(0, 4, size=rows)
    for array in (purchased, mailed, n, phase):
        array[-100:] = array[:100]
    histories = compress_arrays(history_arrays(purchased, mailed, n, phase))
    silent = histories.silent_quarters
    columns = {name: getattr(histories, name) for name in reference.SCALARS}
    columns["phase"] = histories.phase
    columns.update({f"season_x_{q}": histories.season_x[:, q] for q in range(4)})
    columns.update({f"season_mailed_silent_{q}": histories.season_mailed_silent[:, q] for q in range(4)})
    fast = pd.DataFrame(columns)
    fast["after_last"] = ["".join(str(int(flag)) for flag in flags[:length]) for flags, length in zip(histories.after_last, silent)]
    fast["count"] = histories.count
    fast = fast.sort_values(list(fast.columns[:-1])).reset_index(drop=True)
    plain = reference.grouped_histories(purchased, mailed, n, phase)
    pd.testing.assert_frame_equal(fast, plain, check_dtype=False)


def test_season_quarters_counts_the_calendar():
    # By hand: quarter 0 in quarter of the year 2 (phase 2); quarters 1..6 fall in 3, 0, 1, 2, 3, 0.
    assert season_quarters(np.array([2]), np.array([6])).tolist() == [[2, 1, 1, 2]]
    assert season_quarters(np.array([0]), np.array([0])).tolist() == [[0, 0, 0, 0]]


def test_compress_both_equals_the_two_compressions():
    # compress_both counts the statistics once: it must give exactly compress(panel) and compress(panel, seasons=True).
    from builders import seasonal_panel

    panel = seasonal_panel(2_000, seed=4)
    plain, seasonal = compress_both(panel)
    for got, expected in ((plain, compress(panel)), (seasonal, compress(panel, seasons=True))):
        for name in ("x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent", "after_last", "count", "inverse"):
            assert_array_equal(getattr(got, name), getattr(expected, name), err_msg=name)
    assert plain.phase is None and seasonal.seasonal
    assert_array_equal(seasonal.season_x, compress(panel, seasons=True).season_x)
