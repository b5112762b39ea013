"""Plain versions of the data stage's fast kernels, for the tests to compare them with.

:func:`lapsewise.data.histories.history_arrays` derives most statistics from
identities over whole arrays, and :func:`lapsewise.data.histories.compress_arrays`
groups customers by packing their statistics into 64-bit words. Here the same
statistics are counted quarter by quarter from their definitions, one customer
at a time, and grouped with a pandas group-by over the plain columns. These are
slow (a Python loop per customer) and are not used by any command.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

SCALARS = ("x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent")


def history_statistics(purchased: np.ndarray, mailed: np.ndarray, n: int, phase: int | None = None) -> dict:
    """One customer's statistics, counted from the definitions.

    ``purchased`` and ``mailed`` are the customer's flags from quarter 0; ``n`` the
    last quarter observed. x counts purchases in quarters 1..n and t_x is the last of
    them (0 when none); the silent quarters 1..t_x are split into mailed and not
    mailed, and ``after_last`` lists the mail flags of the quarters t_x + 1 .. n.
    With ``phase`` (the quarter of the year of quarter 0) also ``phase``, and per
    quarter of the year q the purchases ``season_x_q`` and the mailed silent
    quarters up to t_x ``season_mailed_silent_q``.
    """
    bought = [q for q in range(1, n + 1) if purchased[q]]
    t_x = max(bought, default=0)
    silent_before = [q for q in range(1, t_x + 1) if not purchased[q]]
    statistics = {
        "x": len(bought),
        "x_unmailed": sum(1 for q in bought if not mailed[q]),
        "t_x": t_x,
        "n": n,
        "mailed_silent": sum(1 for q in silent_before if mailed[q]),
        "unmailed_silent": sum(1 for q in silent_before if not mailed[q]),
        "after_last": [int(mailed[q]) for q in range(t_x + 1, n + 1)],
    }
    if phase is not None:
        statistics["phase"] = phase % 4
        for season in range(4):
            statistics[f"season_x_{season}"] = sum(1 for q in bought if (phase + q) % 4 == season)
            statistics[f"season_mailed_silent_{season}"] = sum(1 for q in silent_before if mailed[q] and (phase + q) % 4 == season)
    return statistics


SEASONAL_SCALARS = ("phase",) + tuple(f"season_x_{q}" for q in range(4)) + tuple(f"season_mailed_silent_{q}" for q in range(4))


def grouped_histories(purchased: np.ndarray, mailed: np.ndarray, n: np.ndarray, phase: np.ndarray | None = None) -> pd.DataFrame:
    """Every customer's statistics and the distinct histories they form, by a pandas group-by.

    Returns one row per distinct history: the statistics, ``after_last`` as a
    string of 0s and 1s, and ``count``, the number of customers who share it;
    sorted by the statistics, so two groupings can be compared row by row.
    """
    rows = []
    for row in range(len(n)):
        statistics = history_statistics(purchased[row], mailed[row], int(n[row]), None if phase is None else int(phase[row]))
        statistics["after_last"] = "".join(str(flag) for flag in statistics["after_last"])
        rows.append(statistics)
    frame = pd.DataFrame(rows, columns=[*SCALARS, *(SEASONAL_SCALARS if phase is not None else ()), "after_last"])
    grouped = frame.groupby(list(frame.columns), sort=True).size().rename("count").reset_index()
    return grouped
