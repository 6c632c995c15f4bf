"""Test helpers that write small BIDS layouts and NIfTI files (with nibabel) into tmp_path.

Everything written here is *input* for tests; expected values come from the
standards or reference libraries named beside each check.

    root = tmp_path / "ds"
    write_description(root)
    write_sidecar(root, "task-rest_bold.json", {"RepetitionTime": 2.0})
    run = write_run(root, "sub-01/func/sub-01_task-rest_bold.nii.gz", shape=(4, 4, 3, 6),
                    tr=2.0, sidecar={"SliceTiming": [0, 0.5, 1.0]})
    patch_header(run, dim=[9, 4, 4, 3, 6, 1, 1, 1])   # raw bytes, bypassing nibabel's checks
"""

from __future__ import annotations

import gzip
import hashlib
import json
import os
import zlib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

__all__ = [
    "TIME_FACTORS",
    "gzip_members",
    "gzip_zeros",
    "patch_header",
    "read_raw_header",
    "symlink",
    "write_description",
    "write_json",
    "write_run",
    "write_sidecar",
]

#: seconds per unit of each nibabel time-unit name (NIfTI-1 standard, nifti1.h, from memory)
TIME_FACTORS: dict[str, float] = {"sec": 1.0, "msec": 1e-3, "usec": 1e-6, "unknown": 1.0}


def write_json(path: Path, data: Any = None, *, raw: str | bytes | None = None) -> Path:
    """Write ``data`` as JSON (or ``raw`` text/bytes verbatim) to ``path``; make folders."""
    path.parent.mkdir(parents=True, exist_ok=True)
    if raw is not None:
        path.write_bytes(raw.encode("utf-8") if isinstance(raw, str) else raw)
    else:
        path.write_text(json.dumps(data, indent=2), encoding="utf-8")
    return path


def write_description(root: Path, name: str = "slicetime test dataset", **extra: Any) -> Path:
    """Write a minimal ``dataset_description.json`` (BIDS requires Name and BIDSVersion)."""
    return write_json(
        root / "dataset_description.json", {"Name": name, "BIDSVersion": "1.9.0", **extra}
    )


def write_sidecar(
    root: Path,
    relpath: str,
    data: Mapping[str, Any] | None = None,
    *,
    raw: str | bytes | None = None,
) -> Path:
    """Write a sidecar at ``root / relpath``."""
    return write_json(root / relpath, dict(data or {}), raw=raw)


def _sidecar_path(image: Path) -> Path:
    name = image.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return image.with_name(name[: -len(ext)] + ".json")
    return image.with_name(name + ".json")


def write_run(
    root: Path,
    relpath: str,
    shape: Sequence[int] = (4, 4, 3, 6),
    tr: float | None = 2.0,
    sidecar: Mapping[str, Any] | None = None,
    dtype: Any = np.int16,
    compress: bool | None = None,
    *,
    version: int = 1,
    byte_order: str = "<",
    time_unit: str = "sec",
    space_unit: str = "mm",
    dim_info: tuple[int | None, int | None, int | None] | None = (None, None, 2),
    slice_code: int = 0,
    slice_start: int | None = None,
    slice_end: int | None = None,
    slice_duration: float | None = None,
    scl_slope: float | None = None,
    scl_inter: float | None = None,
    data: np.ndarray | None = None,
    header: Mapping[str, Any] | None = None,
) -> Path:
    """Write a NIfTI run at ``root / relpath`` with nibabel (and its sidecar when given).

    ``tr`` and ``slice_duration`` are in seconds and stored in ``time_unit``
    (nibabel names: sec, msec, usec, unknown). ``compress`` defaults to the
    extension; ``compress=True`` with a ``.nii`` name writes gzip content
    under that name. ``header`` sets raw header fields before saving (nibabel
    may still fix some on save; use :func:`patch_header` for raw edits after).
    Returns the image path.
    """
    path = root / relpath
    path.parent.mkdir(parents=True, exist_ok=True)
    header_class = nib.Nifti1Header if version == 1 else nib.Nifti2Header
    image_class = nib.Nifti1Image if version == 1 else nib.Nifti2Image
    hdr = header_class(endianness=byte_order)
    hdr.set_data_dtype(np.dtype(dtype))
    array = data if data is not None else np.zeros(tuple(shape), dtype=dtype)
    hdr.set_data_shape(array.shape)
    factor = TIME_FACTORS[time_unit]
    hdr.set_xyzt_units(space_unit, time_unit)
    zooms = [1.0] * array.ndim
    if array.ndim >= 4 and tr is not None:
        zooms[3] = tr / factor
    hdr.set_zooms(zooms)
    if dim_info is not None:
        freq, phase, slc = dim_info
        hdr.set_dim_info(freq, phase, slc)
    hdr["slice_code"] = slice_code
    if slice_start is not None:
        hdr["slice_start"] = slice_start
    if slice_end is not None:
        hdr["slice_end"] = slice_end
    if slice_duration is not None:
        hdr["slice_duration"] = slice_duration / factor
    for key, value in (header or {}).items():
        hdr[key] = value
    image = image_class(array, np.eye(4), header=hdr)
    if scl_slope is not None or scl_inter is not None:
        image.header.set_slope_inter(
            scl_slope if scl_slope is not None else 1.0, scl_inter if scl_inter is not None else 0.0
        )
    gz_name = path.name.endswith(".gz")
    if compress is None or compress == gz_name:
        nib.save(image, path)
    else:
        content = image.to_bytes()  # content and name disagree: build the bytes in memory
        path.write_bytes(gzip.compress(content) if compress else content)
    if sidecar is not None:
        write_json(_sidecar_path(path), dict(sidecar))
    return path


def _header_dtype(raw: bytes) -> tuple[np.dtype, int]:
    for order in "<>":
        size = int(np.frombuffer(raw[:4], dtype=order + "i4")[0])
        if size == 348:
            return nib.nifti1.header_dtype.newbyteorder(order), 348
        if size == 540:
            return nib.nifti2.header_dtype.newbyteorder(order), 540
    raise ValueError("not a NIfTI header")


def _read_content(path: Path) -> tuple[bytes, bool]:
    content = path.read_bytes()
    if content[:2] == b"\x1f\x8b":
        return gzip.decompress(content), True
    return content, False


def read_raw_header(path: Path) -> np.ndarray:
    """The header of ``path`` as a numpy record with nibabel's header dtype."""
    content, _ = _read_content(path)
    dtype, size = _header_dtype(content)
    return np.frombuffer(content[:size], dtype=dtype).copy()


def patch_header(path: Path, **fields: Any) -> Path:
    """Overwrite raw header fields of an existing file (after nibabel wrote it).

    Keeps compression; writes exactly the values given (no consistency fixes).
    """
    content, compressed = _read_content(path)
    dtype, size = _header_dtype(content)
    record = np.frombuffer(content[:size], dtype=dtype).copy()
    for key, value in fields.items():
        record[key] = value
    content = record.tobytes() + content[size:]
    path.write_bytes(gzip.compress(content) if compressed else content)
    return path


def gzip_members(content: bytes, cuts: Sequence[int]) -> bytes:
    """gzip ``content`` as several members split at byte offsets ``cuts``."""
    out = bytearray()
    start = 0
    for cut in [*cuts, len(content)]:
        out += gzip.compress(content[start:cut])
        start = cut
    return bytes(out)


def gzip_zeros(path: Path, prefix: bytes, n_zeros: int) -> Path:
    """Write ``prefix`` followed by ``n_zeros`` zero bytes as one gzip member, streaming."""
    comp = zlib.compressobj(9, zlib.DEFLATED, 31)
    chunk = bytes(1 << 20)
    with open(path, "wb") as fh:
        fh.write(comp.compress(prefix))
        left = n_zeros
        while left > 0:
            n = min(left, len(chunk))
            fh.write(comp.compress(chunk[:n]))
            left -= n
        fh.write(comp.flush())
    return path


def symlink(link: Path, target: str | Path) -> Path:
    """Create ``link`` pointing at ``target`` (given verbatim); make folders."""
    link.parent.mkdir(parents=True, exist_ok=True)
    os.symlink(str(target), link)
    return link


def tree_hashes(*roots: Path) -> dict[str, str]:
    """Every file's SHA-256 under the roots (a link by its target, not followed), keyed
    by its path relative to its root (prefixed by the root when several are given): the
    byte-for-byte state that the safety tests compare before and after a command."""
    out: dict[str, str] = {}
    for root in roots:
        prefix = f"{os.fsdecode(root)}/" if len(roots) > 1 else ""
        for path in sorted(root.rglob("*")):
            rel = prefix + os.fsdecode(path.relative_to(root))
            if path.is_symlink():
                out[rel] = "link:" + os.readlink(path)
            elif path.is_file():
                out[rel] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out
