"""The Examples sections of the public core modules run and give what they show."""

from __future__ import annotations

import doctest
import importlib

import pytest

CORE = ["dspeq", "dspeq.curves", "dspeq.catalog", "dspeq.spec", "dspeq.design", "dspeq.check",
        "dspeq.stream", "dspeq.expr"]


@pytest.mark.parametrize("name", CORE)
def test_module_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0
