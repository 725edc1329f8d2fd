"""The Examples sections of the time, orbit and clock modules run as doctests (STYLE.md 17)."""

from __future__ import annotations

import doctest
import importlib

import pytest

MODULES = ("pipeline.timescales", "pipeline.recording._time", "pipeline.recording._recording",
           "pipeline.recording._symbols", "pipeline.packets._timecodes", "pipeline.packets._obt",
           "pipeline.orbit._earth", "pipeline.orbit._tle", "pipeline.orbit._oem", "pipeline.orbit._predict",
           "pipeline.orbit._doppler", "pipeline.orbit._tdm", "pipeline.tools._clock")


@pytest.mark.parametrize("name", MODULES)
def test_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0
