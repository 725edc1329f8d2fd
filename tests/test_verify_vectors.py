"""Every known-answer vector file becomes one test case (STYLE.md rule 10).

The cases come from the vectors ``downlink verify`` runs by default (the checkout's ``vectors/``,
else the copy bundled in ``pipeline/data/vectors``).  Each case names its own source (standard and
clause, reference library and version, or what it was computed from) in the file; the runner's
detail line says what was compared.  Small cases are marked ``kat`` (CI also runs them with
NUMBA_DISABLE_JIT=1); the whole-link cases decode a few frames through the full chain and are
marked ``slow`` instead.  A case that cannot find what it tests fails: nothing is skipped.
"""

from __future__ import annotations

import pytest

from pipeline.tools._verify import default_vectors_dir, load_cases, run_case

_CASES = load_cases(default_vectors_dir())


def _param(case):
    mark = pytest.mark.kat if case.kat else pytest.mark.slow
    return pytest.param(case, id=f"{case.stage}/{case.name}", marks=mark)


@pytest.mark.parametrize("case", [_param(c) for c in _CASES])
def test_vector(case):
    # source of each case: case.source (e.g. "computed with reedsolo 1.7.0 (PyPI) for ... CCSDS 131.0-B-2 ...")
    assert case.source, f"{case.path.name} names no source"
    result = run_case(case)
    assert result.passed, f"{case.name}: {result.detail} (source: {case.source})"
