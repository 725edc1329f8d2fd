"""The Examples sections of pipeline.recording run as doctests (house style: runnable examples)."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ["_formats", "_integrity", "_recording", "_stream", "_writer"]


@pytest.mark.parametrize("name", MODULES)
def test_examples_run(name):
    module = importlib.import_module(f"pipeline.recording.{name}")
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0
