"""slicetime: audit, repair and correct fMRI slice timing across BIDS-style datasets.

The public API (stable names; see the README's "Python API" section):

- ``correct_array(data, slice_timing, repetition_time, ...)`` and
  ``correct_image(img, ...)``: slice-timing correction of an array or a
  nibabel image, with the engines the ``correct`` command runs;
- ``reference_time(...)``: the time a correction aligns to (``StartTime``);
- ``slice_times(n_slices, repetition_time, ...)``: ``SliceTiming`` for a protocol;
- ``infer_scheme(slice_timing, ...)``: the acquisition scheme of a list of times;
- ``audit(paths, ...)``: every run under dataset folders with its findings;
- ``inspect(run, ...)``: one run with the findings the audit gives it;
- ``CorrectionRefused`` / ``TimingInDoubt``: what the corrections raise for a run
  the ``correct`` command would refuse.

The functions are imported on first use, so ``import slicetime`` stays cheap
for the command line.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

_API = ("CorrectionRefused", "TimingInDoubt", "audit", "correct_array", "correct_image",
        "infer_scheme", "inspect", "reference_time", "slice_times")

if TYPE_CHECKING:
    from slicetime.api import (  # noqa: F401
        CorrectionRefused,
        TimingInDoubt,
        audit,
        correct_array,
        correct_image,
        infer_scheme,
        inspect,
        reference_time,
        slice_times,
    )


def __getattr__(name: str) -> Any:
    if name in _API:
        from slicetime import api

        return getattr(api, name)
    raise AttributeError(f"module 'slicetime' has no attribute {name!r}")


def __dir__() -> list[str]:
    """The public names and the subpackages (PEP 562), not this module's typing imports."""
    hidden = {"Any", "TYPE_CHECKING", "annotations"}
    return sorted({*(n for n in globals() if n not in hidden), *_API})


__all__ = ["__version__", *_API]
