"""Segments: names from the policy's bands (and an attribute), codes of labels, customers grouped by code."""

import numpy as np

from lapsewise.budget.segments import categorical, grouped, segment_codes, segment_labels
from lapsewise.data.summary import CustomerSummary
from lapsewise.files.policy_file import Segments


def summary_of(x, silent):
    x, silent = np.asarray(x), np.asarray(silent)
    zeros = np.zeros(len(x))
    return CustomerSummary(x=x, t_x=x, n=x + silent, silent_quarters=silent, mean_repeat_value=zeros, mean_order_value=zeros, mailed_since_last=zeros)


def test_segment_names_follow_the_bands():
    # Bands [0, 1, 2, 4, 8]: 0, 1, 2-3, 4-7, 8+ (lower bounds, as the policy file documents them).
    summary = summary_of([0, 1, 3, 9, 5], [0, 2, 1, 12, 4])
    labels = segment_labels(summary, Segments())
    assert labels.tolist() == ["0 repeat, 0 silent", "1 repeat, 2-3 silent", "2-3 repeat, 1 silent", "8+ repeat, 8+ silent", "4-7 repeat, 4-7 silent"]


def test_an_attribute_is_appended_to_the_name():
    labels = segment_labels(summary_of([0, 0], [0, 0]), Segments(), np.array(["north", "south"], dtype=object))
    assert labels.tolist() == ["0 repeat, 0 silent, north", "0 repeat, 0 silent, south"]


def test_codes_and_groups_of_labels():
    labels = np.array(["b", "a", "c", "b", None], dtype=object)
    codes = segment_codes(labels, ["a", "b"])
    assert codes.tolist() == [1, 0, -1, 1, -1]  # not in the list, or missing: -1
    assert [group.tolist() for group in grouped(codes, 2)] == [[1], [0, 3]]
    assert categorical(np.array(["b", "a", "b"], dtype=object)).tolist() == ["b", "a", "b"]
    assert list(categorical(np.array(["b", "a", "b"], dtype=object)).categories) == ["a", "b"]
