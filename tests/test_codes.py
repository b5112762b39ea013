"""Integer codes by table lookup against numpy's unique."""

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from lapsewise.data.codes import integer_codes


@pytest.mark.parametrize("size", [1, 50, 10_000, 60_000_000])
def test_integer_codes_are_numpys_unique_with_inverse(size):
    # Reference: np.unique(keys, return_inverse=True). 60 million is past the table's limit, where np.unique itself is used.
    rng = np.random.default_rng(size)
    keys = rng.integers(0, size, 5_000)
    distinct, inverse = integer_codes(keys, size)
    expected, expected_inverse = np.unique(keys, return_inverse=True)
    assert_array_equal(distinct, expected)
    assert_array_equal(inverse, expected_inverse.ravel())
