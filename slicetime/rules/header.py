"""Checks that compare the NIfTI header with the sidecar metadata."""

from __future__ import annotations

import math
from collections.abc import Iterator

from slicetime.model import AXES, RunRecord
from slicetime.numbers import as_written, plain, secs
from slicetime.rules.registry import RULES, Hit
from slicetime.schemes.infer import infer_scheme
from slicetime.schemes.niftcodes import SLICE_CODE_NAMES, header_slice_times
from slicetime.schemes.resolve import parse_direction, positive_number

#: header and sidecar TR may differ by less than 1 ms (BIDS RepetitionTimeMismatch check)
TR_ABS_TOL = 1e-3


def series_shape(record: RunRecord) -> Iterator[Hit]:
    header = record.header
    if header is None or record.suffix not in ("bold", "cbv", "asl"):
        return
    if len(header.shape) < 4 or header.shape[3] < 2:
        yield Hit(
            f"the image has shape {list(header.shape)}: not a time series",
            "dim", {"shape": list(header.shape)}, file=record.path,
        )
    elif not header.is_four_d:
        yield Hit(
            f"the image has shape {list(header.shape)}: more than four dimensions",
            "dim", {"shape": list(header.shape)}, file=record.path,
        )




def tr_mismatch(record: RunRecord) -> Iterator[Hit]:
    header = record.header
    tr = positive_number(record.metadata.get("RepetitionTime"))
    if header is None or tr is None or not header.repetition_time:
        return
    htr = header.repetition_time
    if abs(htr - tr) < TR_ABS_TOL:
        return
    hint = None
    ratio = htr / tr
    stated = secs(htr)
    if math.isclose(ratio, 1000, rel_tol=1e-3):
        # milliseconds are never called seconds, even when the header labels them so
        stated = f"{as_written(htr)} (labelled seconds, milliseconds by its size)"
        hint = (f"pixdim[4] is {plain(header.raw_pixdim4)} with time unit {header.time_unit}: the "
                "header unit is probably wrong (the value is in milliseconds).")
    elif math.isclose(ratio, 1e-3, rel_tol=1e-3):
        hint = ("The header TR is a thousandth of the sidecar's: the header unit is probably "
                "wrong (microseconds or milliseconds labelled as seconds).")
    yield Hit(
        f"header pixdim[4] gives a TR of {stated}, the sidecar RepetitionTime {secs(tr)}",
        "RepetitionTime",
        {"header_tr": htr, "raw_pixdim4": header.raw_pixdim4,
         "time_unit": header.time_unit, "sidecar_tr": tr},
        hint=hint,
    )


def tr_unset(record: RunRecord) -> Iterator[Hit]:
    header = record.header
    tr = positive_number(record.metadata.get("RepetitionTime"))
    if header is None or tr is None or len(header.shape) < 4:
        return
    if header.raw_pixdim4 == 0:
        yield Hit(
            f"pixdim[4] is 0 while RepetitionTime is {secs(tr)}",
            "pixdim[4]", {"sidecar_tr": tr}, file=record.path,
        )


def time_units(record: RunRecord) -> Iterator[Hit]:
    header = record.header
    if header is not None and header.time_unit == "unknown" and header.raw_pixdim4 > 0 \
            and len(header.shape) >= 4:
        yield Hit(
            f"xyzt_units has no time unit; pixdim[4] = {plain(header.raw_pixdim4)} read as seconds",
            "xyzt_units", {"raw_pixdim4": header.raw_pixdim4}, file=record.path,
        )


def dim_info_mismatch(record: RunRecord) -> Iterator[Hit]:
    header = record.header
    if header is None or header.slice_dim is None or header.slice_dim > 2:
        return
    if "SliceTiming" not in record.metadata:
        return
    sed = record.metadata.get("SliceEncodingDirection")
    parsed = parse_direction(sed) if sed is not None else ("k", "+")
    if parsed is None:
        return
    header_axis = AXES[header.slice_dim]
    if parsed[0] != header_axis:
        said = f"SliceEncodingDirection {sed}" if sed is not None else \
            "SliceEncodingDirection is absent (k)"
        yield Hit(
            f"{said}, but dim_info gives slice axis {header_axis}",
            "SliceEncodingDirection",
            {"sidecar_axis": parsed[0], "dim_info_axis": header_axis},
            file=record.metadata_sources.get("SliceEncodingDirection", record.path),
        )


def slice_code_mismatch(record: RunRecord) -> Iterator[Hit]:
    header = record.header
    scheme = record.scheme
    if header is None or scheme is None or record.timing_origin != "sidecar":
        return
    if header.slice_code <= 0 or not header.slice_duration or header.slice_dim is None:
        return
    if record.schedule is None or AXES.index(record.schedule.axis) != header.slice_dim:
        return
    n = len(record.schedule.times)
    try:
        raw = header_slice_times(header.slice_code, header.slice_start, header.slice_end,
                                 header.slice_duration, n)
    except ValueError:
        return
    if any(t is None for t in raw):
        return
    header_scheme = infer_scheme([float(t) for t in raw if t is not None])
    if header_scheme.groups != scheme.groups:
        yield Hit(
            f"header slice_code {header.slice_code} ({SLICE_CODE_NAMES.get(header.slice_code)}) "
            f"describes '{header_scheme.label}', SliceTiming describes '{scheme.label}'",
            "slice_code",
            {"slice_code": header.slice_code, "header_scheme": header_scheme.label,
             "sidecar_scheme": scheme.label},
            file=record.path,
        )


#: checks outside this module that need the image's header
_ALSO_HEADER = ("timing/count-mismatch", "timing/missing")
_MISSING_WHY = {
    "annex": ("the image links into an annex object store that lacks it",
              "git annex get {path}"),
    "placeholder": ("the image is a 0-byte placeholder", "copy the real file over it"),
}


def header_checks() -> list[str]:
    """The run checks a run without its image's header cannot have: this module's, the
    source cross-check's, and the sidecar checks that compare with the header."""
    from slicetime.rules.bindings import RUN_CHECKS  # the table that binds this module

    mine = [code for code, check in RUN_CHECKS
            if getattr(check, "__module__", None) == __name__ and code != "file/not-retrieved"]
    source = [code for code, rule in RULES.items() if rule.checked == "source"]
    return sorted({*mine, *source, *_ALSO_HEADER})


def not_retrieved(record: RunRecord) -> Iterator[Hit]:
    if record.content_missing is None:
        return
    why, how = _MISSING_WHY.get(record.content_missing, _MISSING_WHY["placeholder"])
    skipped = header_checks()
    yield Hit(f"content not retrieved ({why}): audited from its sidecars only, "
              f"{len(skipped)} header checks not done ({how.format(path=record.path)})",
              evidence={"reason": record.content_missing, "not_checked": skipped})
