"""Small builders for pure tests: header summaries and run records without files."""

from __future__ import annotations

from typing import Any

from slicetime.model import HeaderInfo, RunRecord
from slicetime.readers.record import assemble_record


def header_info(
    shape: tuple[int, ...] = (8, 8, 10, 20),
    *,
    tr: float | None = 2.0,
    time_unit: str = "s",
    slice_dim: int | None = 2,
    slice_code: int = 0,
    slice_start: int = 0,
    slice_end: int = 0,
    slice_duration: float = 0.0,
) -> HeaderInfo:
    scale = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "unknown": 1.0}[time_unit]
    raw_tr = (tr / scale) if tr else 0.0
    return HeaderInfo(
        version=1,
        shape=shape,
        pixdim=(3.0, 3.0, 3.0, raw_tr)[: len(shape)],
        datatype=4,
        bitpix=16,
        vox_offset=352,
        byte_order="<",
        time_unit=time_unit,  # type: ignore[arg-type]
        raw_pixdim4=raw_tr,
        repetition_time=tr if tr else None,
        freq_dim=None,
        phase_dim=None,
        slice_dim=slice_dim,
        slice_code=slice_code,
        slice_start=slice_start,
        slice_end=slice_end,
        raw_slice_duration=slice_duration / scale,
        slice_duration=slice_duration or None,
        scl_slope=1.0,
        scl_inter=0.0,
        compressed=True,
        file_size=10_000,
        data_bytes=2 * int(__import__("math").prod(shape)),
    )


def record(
    metadata: dict[str, Any],
    header: HeaderInfo | None = None,
    *,
    name: str = "sub-01/func/sub-01_task-x_bold.nii.gz",
    sidecar: str = "task-x_bold.json",
) -> RunRecord:
    """A run whose metadata all comes from one sidecar."""
    return assemble_record(
        display=name,
        abs_path="/nowhere/" + name,
        root="/nowhere",
        header=header if header is not None else header_info(),
        metadata=metadata,
        sources={k: sidecar for k in metadata},
        chain=(sidecar,),
    )
