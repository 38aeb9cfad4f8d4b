"""The worked examples in the statistics docstrings run and print what they say."""

import doctest
import importlib

import pytest

MODULES = ["monitor.stats.location", "monitor.stats.moments", "monitor.stats.normality", "monitor.stats.power",
           "monitor.stats.wilcoxon", "monitor.stats.wording", "monitor.stats.equivalence", "monitor.stats.heads"]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    """Every example in the module's numpydoc docstrings passes."""
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0
    assert result.failed == 0
