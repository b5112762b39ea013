"""Segments of the budget plan: names from the policy's bands (and an attribute), and customers grouped by segment.

A segment is a frequency band x a silent-quarter band, optionally crossed with
the value of an attribute column, named like ``2-3 repeat, 1 silent`` (and
``, <value>``). Segments hold few distinct labels over many customers, so
everything here works on the distinct labels and integer codes, never on a
million strings.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from lapsewise.data.summary import CustomerSummary, band_labels, band_of
from lapsewise.files.policy_file import Segments


def segment_labels(summary: CustomerSummary, segments: Segments, attribute: np.ndarray | None = None) -> np.ndarray:
    """Segment names such as '2-3 repeat, 1 silent' (and ', <attribute>' when given), one per customer."""
    frequency_labels = band_labels(segments.frequency_bands)
    silent_labels = band_labels(segments.silent_bands)
    # Few distinct segments: name each (frequency band, silent band[, attribute]) once and index the names.
    code = band_of(summary.x, segments.frequency_bands) * len(silent_labels) + band_of(summary.silent_quarters, segments.silent_bands)
    names = [f"{f} repeat, {s} silent" for f in frequency_labels for s in silent_labels]
    if attribute is not None:
        attribute_code, attribute_names = pd.factorize(np.asarray(attribute, dtype=object))
        code = code * len(attribute_names) + attribute_code
        names = [f"{name}, {extra}" for name in names for extra in attribute_names]
    return np.asarray(names, dtype=object)[code]


def segment_codes(segment: np.ndarray, names) -> np.ndarray:
    """Each customer's position in ``names`` (-1 when not there).

    Factorizing the object array hashes each of the few distinct label objects once
    (Python caches a string's hash); an Index of a million labels would convert them all.
    """
    codes, labels = pd.factorize(np.asarray(segment, dtype=object))
    position = {name: i for i, name in enumerate(names)}
    lookup = np.array([position.get(label, -1) for label in labels] + [-1], dtype=np.int64)
    return lookup[codes]  # code -1 (a missing label) reads the final -1


def categorical(labels: np.ndarray) -> pd.Categorical:
    """A Categorical of an object array of few distinct labels, sorted, without converting every row to text."""
    names = sorted(pd.unique(np.asarray(labels, dtype=object)))
    return pd.Categorical.from_codes(segment_codes(labels, names), categories=names)


def grouped(codes: np.ndarray, groups: int) -> list[np.ndarray]:
    """Row indices of each code 0..groups-1, in their original order; rows coded -1 are left out.

    One stable sort of the codes, not a mask over every row per group.
    """
    rows = np.flatnonzero(codes >= 0)
    rows = rows[np.argsort(codes[rows], kind="stable")]
    bounds = np.searchsorted(codes[rows], np.arange(groups + 1))
    return [rows[bounds[g] : bounds[g + 1]] for g in range(groups)]
