"""The examples in the docstrings of the small core primitives run and give what they
say (each example is a hand computation: two-point transmissibilities, averages of a
2 x 2 x 1 grid, partitions)."""

import doctest

import pytest

from upscale.core import local_global, partition, patch_flows, rock_curves, static, two_point
from upscale.io import sector


@pytest.mark.parametrize("module", [partition, static, two_point, local_global, patch_flows, sector, rock_curves],
                         ids=lambda m: m.__name__)
def test_docstring_examples(module):
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 1, f"{module.__name__} has lost its examples"
    assert result.failed == 0
