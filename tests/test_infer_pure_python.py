"""Scheme inference runs without numpy (so a one-run audit starts fast): its
order statistics must equal numpy's, which served before (numpy.quantile's
default linear method and numpy.median are the reference)."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from slicetime.schemes.infer import _quantile, grouping_threshold, median

FLOATS = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, allow_infinity=False)


@given(st.lists(FLOATS, min_size=1, max_size=60), st.sampled_from([0.0, 0.25, 0.5, 0.75, 1.0]))
def test_quantile_and_median_equal_numpy(values: list[float], q: float) -> None:
    ordered = sorted(values)
    assert _quantile(ordered, q) == float(np.quantile(np.asarray(values), q))
    assert median(values) == float(np.median(np.asarray(values)))


@given(st.lists(st.floats(min_value=0, max_value=3, allow_nan=False), min_size=1, max_size=80))
def test_grouping_threshold_equals_the_numpy_formula(times: list[float]) -> None:
    values = np.sort(np.asarray(times, dtype=float))
    diffs = np.diff(values)
    big = diffs[diffs > 0.0005]  # MIN_SEPARATION
    expected = 0.003 if big.size == 0 else min(0.003, 0.5 * float(np.quantile(big, 0.75)))
    assert grouping_threshold(times) == expected


def test_the_audit_path_does_not_import_numpy() -> None:
    code = ("import sys, slicetime.pipelines.audit, slicetime.interfaces.report_stream, "
            "slicetime.interfaces.cli; print('numpy' in sys.modules, 'rich' in sys.modules, "
            "'matplotlib' in sys.modules, 'scipy' in sys.modules, 'nibabel' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False"] * 5
