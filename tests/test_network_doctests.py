"""The examples in the networks docstrings run as written (doctest, the examples' own outputs)."""

from __future__ import annotations

import doctest

import pytest

from propcalc.networks import description, propagate, sim_grid


@pytest.mark.parametrize("module", [description, propagate, sim_grid])
def test_docstring_examples(module):
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0
