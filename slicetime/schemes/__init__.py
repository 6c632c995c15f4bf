"""Schemes layer: slice times to acquisition schemes and back (pure functions).

- :func:`infer_scheme` turns per-slice times into a :class:`~slicetime.model.Scheme`.
- :class:`Protocol`, :func:`array_times` and :func:`slice_timing` generate times
  from a protocol description.
- :func:`header_slice_times` and :func:`header_timing_for` map the NIfTI-1
  ``slice_code`` fields to times and back.
"""

from slicetime.schemes.generate import (
    Protocol,
    array_groups,
    array_times,
    base_order,
    resolve_start,
    slice_timing,
    validate_protocol,
)
from slicetime.schemes.infer import (
    DEFAULT_TOLERANCE,
    IRREGULAR,
    SIMULTANEOUS,
    SINGLE_SLICE,
    OrderDescription,
    describe_order,
    group_slices,
    grouping_threshold,
    infer_scheme,
)
from slicetime.schemes.niftcodes import (
    SLICE_CODE_NAMES,
    HeaderTiming,
    acquisition_order,
    header_slice_times,
    header_timing_for,
)

__all__ = [
    "DEFAULT_TOLERANCE",
    "IRREGULAR",
    "SIMULTANEOUS",
    "SINGLE_SLICE",
    "SLICE_CODE_NAMES",
    "HeaderTiming",
    "OrderDescription",
    "Protocol",
    "acquisition_order",
    "array_groups",
    "array_times",
    "base_order",
    "describe_order",
    "group_slices",
    "grouping_threshold",
    "header_slice_times",
    "header_timing_for",
    "infer_scheme",
    "resolve_start",
    "slice_timing",
    "validate_protocol",
]
