"""Header-only NIfTI reader, checked against nibabel and the NIfTI-1/NIfTI-2 standard."""

from __future__ import annotations

import gzip
import math
import os
import shutil
import sys
import time
import tracemalloc
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from slicetime.model import HeaderInfo, Severity
from slicetime.readers import ReadError, read_header
from slicetime.readers import errors as errors_module

sys.path.insert(0, str(Path(__file__).parent))
from helpers_bids import (
    TIME_FACTORS,
    gzip_members,
    gzip_zeros,
    patch_header,
    symlink,
    write_run,
)

# nibabel's names for the time units of xyzt_units -> ours
UNIT_NAMES = {"sec": "s", "msec": "ms", "usec": "us", "unknown": "unknown"}


def same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or a == b


def assert_matches_nibabel(info: HeaderInfo, path: Path, nib_path: Path | None = None) -> None:
    """Every HeaderInfo field against nibabel's reading of the same header (source: nibabel)."""
    img = nib.load(nib_path or path)
    with nib.openers.ImageOpener(nib_path or path) as fobj:
        # the header as stored: nibabel's image header resets offset and scaling after loading
        hdr = type(img.header).from_fileobj(fobj)
    shape = hdr.get_data_shape()
    assert info.version == (2 if isinstance(hdr, nib.Nifti2Header) else 1)  # source: nibabel
    assert info.shape == tuple(int(d) for d in shape)  # source: nibabel get_data_shape
    assert info.pixdim == tuple(float(z) for z in hdr.get_zooms())  # source: nibabel get_zooms
    assert info.datatype == int(hdr["datatype"])  # source: nibabel
    assert info.bitpix == int(hdr["bitpix"])  # source: nibabel
    assert info.vox_offset == int(hdr.get_data_offset()) == img.dataobj.offset  # source: nibabel
    assert info.byte_order == hdr.endianness  # source: nibabel endianness
    _space, t_unit = hdr.get_xyzt_units()
    assert info.time_unit == UNIT_NAMES[t_unit]  # source: nibabel get_xyzt_units
    factor = TIME_FACTORS[t_unit]  # s / ms / us (nifti1.h, from memory)
    raw4 = float(hdr["pixdim"][4])
    assert same(info.raw_pixdim4, raw4)  # source: nibabel
    if len(shape) >= 4 and raw4 != 0:
        assert info.repetition_time == pytest.approx(raw4 * factor)  # nibabel + nifti1.h units
    else:
        assert info.repetition_time is None  # 0 = unset (nifti1.h, from memory)
    assert (info.freq_dim, info.phase_dim, info.slice_dim) == hdr.get_dim_info()  # nibabel
    assert info.slice_code == int(hdr["slice_code"])  # source: nibabel
    assert info.slice_start == int(hdr["slice_start"])  # source: nibabel
    assert info.slice_end == int(hdr["slice_end"])  # source: nibabel
    raw_sd = float(hdr["slice_duration"])
    if hdr.get_dim_info()[2] is not None:
        assert same(info.raw_slice_duration, hdr.get_slice_duration())  # nibabel
    assert same(info.raw_slice_duration, raw_sd)  # source: nibabel
    if raw_sd:
        assert info.slice_duration == pytest.approx(raw_sd * factor)  # nibabel + nifti1.h units
    else:
        assert info.slice_duration is None
    assert same(info.scl_slope, float(hdr["scl_slope"]))  # source: nibabel
    assert same(info.scl_inter, float(hdr["scl_inter"]))  # source: nibabel
    itemsize = hdr.get_data_dtype().itemsize
    assert info.data_bytes == int(np.prod(shape)) * itemsize  # source: nibabel get_data_dtype
    assert info.file_size == path.stat().st_size  # common practice (no source): bytes on disk
    assert info.compressed == (path.read_bytes()[:2] == b"\x1f\x8b")  # gzip magic (RFC 1952)
    assert info.n_volumes == (shape[3] if len(shape) >= 4 else 1)


@pytest.mark.parametrize("version", [1, 2])
@pytest.mark.parametrize("ext", [".nii", ".nii.gz"])
@pytest.mark.parametrize("order", ["<", ">"])
@pytest.mark.parametrize("unit", ["sec", "msec", "usec"])
def test_header_fields_match_nibabel(
    tmp_path: Path, version: int, ext: str, order: str, unit: str
) -> None:
    path = write_run(
        tmp_path,
        f"sub-01_task-x_bold{ext}",
        shape=(5, 6, 7, 8),
        tr=1.5,
        version=version,
        byte_order=order,
        time_unit=unit,
        dim_info=(0, 1, 2),
        slice_code=3,
        slice_start=1,
        slice_end=5,
        slice_duration=0.125,
        scl_slope=2.0,
        scl_inter=-3.0,
        dtype=np.int16,
    )
    info, findings = read_header(path)
    assert findings == []
    assert nib.load(path).header.endianness == order  # the helper did write that byte order
    assert_matches_nibabel(info, path)
    assert info.repetition_time == pytest.approx(1.5)  # 1.5 s in any unit (nifti1.h units)
    assert info.slice_duration == pytest.approx(0.125)


@pytest.mark.parametrize(
    ("shape", "dim_info", "unit", "dtype"),
    [
        ((4, 4, 3), (None, None, None), "sec", np.uint8),  # 3-D: no TR
        ((4, 4, 3, 5), (2, 0, 1), "unknown", np.float32),  # unknown unit
        ((3, 3, 2, 4, 2), (1, 0, None), "msec", np.float64),  # 5-D
        ((4, 4, 3, 5), (None, None, 0), "usec", np.int32),
        ((7,), None, "sec", np.int16),  # 1-D
    ],
)
def test_header_variants_match_nibabel(
    tmp_path: Path,
    shape: tuple[int, ...],
    dim_info: tuple[int | None, ...] | None,
    unit: str,
    dtype: type,
) -> None:
    path = write_run(
        tmp_path, "x.nii", shape=shape, tr=2.0, dim_info=dim_info, time_unit=unit, dtype=dtype
    )
    info, _ = read_header(path)
    assert_matches_nibabel(info, path)
    if unit == "unknown":
        assert info.time_unit == "unknown"
        assert info.repetition_time == pytest.approx(2.0)  # read as seconds (common practice)


@pytest.mark.parametrize("code", range(7))
def test_slice_code_fields_match_nibabel(tmp_path: Path, code: int) -> None:
    path = write_run(
        tmp_path,
        "x.nii.gz",
        shape=(4, 4, 9, 3),
        slice_code=code,
        slice_start=0,
        slice_end=8,
        slice_duration=0.2,
    )
    info, _ = read_header(path)
    assert_matches_nibabel(info, path)
    assert info.slice_code == int(nib.load(path).header["slice_code"]) == code  # source: nibabel


def test_zero_tr_is_none(tmp_path: Path) -> None:
    path = write_run(tmp_path, "x.nii", shape=(4, 4, 3, 5), tr=0.0)
    info, _ = read_header(path)
    assert_matches_nibabel(info, path)
    assert info.repetition_time is None  # pixdim[4] = 0 means unset (nifti1.h, from memory)


def test_gzip_content_named_nii(tmp_path: Path) -> None:
    ref = write_run(tmp_path, "ref.nii.gz", shape=(4, 4, 3, 5), tr=2.5)
    odd = tmp_path / "odd.nii"
    shutil.copyfile(ref, odd)
    info, _ = read_header(odd)
    assert info.compressed
    assert_matches_nibabel(info, odd, nib_path=ref)  # nibabel reads the same bytes as .nii.gz


def test_multi_member_gzip_is_read_whole(tmp_path: Path) -> None:
    plain = write_run(
        tmp_path,
        "plain.nii",
        shape=(6, 6, 5, 7),
        dtype=np.int16,
        data=np.arange(6 * 6 * 5 * 7, dtype=np.int16).reshape(6, 6, 5, 7),
    )
    content = plain.read_bytes()
    multi = tmp_path / "multi.nii.gz"
    multi.write_bytes(gzip_members(content, [200, 1000]))
    # source: nibabel (Python's gzip) reads all members: the data is complete
    assert nib.load(multi).get_fdata().shape == (6, 6, 5, 7)
    info, findings = read_header(multi)
    assert findings == []
    assert_matches_nibabel(info, multi)
    with pytest.raises(ReadError) as err:
        read_header(multi, verify_stream=False)  # trailer describes the last member only
    assert err.value.code == "file/truncated"


def test_header_member_shorter_than_header(tmp_path: Path) -> None:
    plain = write_run(tmp_path, "plain.nii", shape=(4, 4, 3, 5))
    multi = tmp_path / "multi.nii.gz"
    multi.write_bytes(gzip_members(plain.read_bytes(), [10, 100, 347]))
    info, _ = read_header(multi)
    assert_matches_nibabel(info, multi)


def test_odd_file_names(tmp_path: Path) -> None:
    for name in ["with space_bold.nii.gz", "ünïcødé_bold.nii", "a'quote\"_bold.nii"]:
        path = write_run(tmp_path, name, shape=(3, 3, 2, 4))
        info, _ = read_header(path, display=name)
        assert_matches_nibabel(info, path)


# --- hostile and broken inputs ------------------------------------------------------------


def read_error(path: Path, display: str | None = "shown/name.nii") -> ReadError:
    with pytest.raises(ReadError) as err:
        read_header(path, display)
    exc = err.value
    finding = exc.to_finding()
    assert finding.severity is Severity.ERROR
    assert finding.code == exc.code
    assert "\n" not in finding.message
    if display is not None:
        assert display in finding.message and finding.file == display
    return exc


def test_empty_file(tmp_path: Path) -> None:
    path = tmp_path / "empty.nii"
    path.write_bytes(b"")
    assert read_error(path).code == "file/not-nifti"
    gz = tmp_path / "empty.nii.gz"
    gz.write_bytes(b"")
    assert read_error(gz).code == "file/not-nifti"


def test_random_bytes(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    path = tmp_path / "random.nii"
    path.write_bytes(rng.bytes(4096))
    assert read_error(path).code == "file/not-nifti"
    fake_gz = tmp_path / "random.nii.gz"
    fake_gz.write_bytes(b"\x1f\x8b\x08\x00" + rng.bytes(4096))  # gzip magic, corrupt stream
    assert read_error(fake_gz).code in ("file/not-nifti", "file/truncated")


def test_not_gzip_when_named_gz(tmp_path: Path) -> None:
    plain = write_run(tmp_path, "plain.nii", shape=(3, 3, 2, 4))
    named = tmp_path / "named.nii.gz"
    shutil.copyfile(plain, named)
    # source: nibabel opens .gz names with gzip and fails on plain content
    with pytest.raises(Exception):  # noqa: B017
        nib.load(named).get_fdata()
    assert read_error(named).code == "file/not-nifti"


@pytest.mark.parametrize("version", [1, 2])
def test_bad_sizeof_hdr_and_magic(tmp_path: Path, version: int) -> None:
    path = write_run(tmp_path, "x.nii", shape=(3, 3, 2, 4), version=version)
    patch_header(path, sizeof_hdr=349)
    exc = read_error(path)
    assert (exc.code, exc.field) == ("file/not-nifti", "sizeof_hdr")
    path = write_run(tmp_path, "y.nii", shape=(3, 3, 2, 4), version=version)
    patch_header(path, magic=b"abc\x00")
    exc = read_error(path)
    assert (exc.code, exc.field) == ("file/not-nifti", "magic")


def test_analyze_header_is_not_nifti(tmp_path: Path) -> None:
    img = nib.AnalyzeImage(np.zeros((3, 3, 2), np.int16), np.eye(4))
    nib.save(img, tmp_path / "a.hdr")
    # ANALYZE 7.5 shares sizeof_hdr 348 but has no NIfTI magic (nifti1.h, from memory)
    assert read_error(tmp_path / "a.hdr").code == "file/not-nifti"


def test_two_file_nifti(tmp_path: Path) -> None:
    img = nib.Nifti1Pair(np.zeros((3, 3, 2, 4), np.int16), np.eye(4))
    nib.save(img, tmp_path / "pair.hdr")
    info, _ = read_header(tmp_path / "pair.hdr")
    hdr = nib.load(tmp_path / "pair.hdr").header
    assert info.shape == hdr.get_data_shape()  # source: nibabel
    (tmp_path / "pair.img").write_bytes(b"\x00" * 10)
    assert read_error(tmp_path / "pair.hdr", None).code == "file/truncated"
    (tmp_path / "pair.img").unlink()
    assert read_error(tmp_path / "pair.hdr", None).code == "file/missing"


def test_truncated_uncompressed(tmp_path: Path) -> None:
    path = write_run(tmp_path, "x.nii", shape=(4, 4, 3, 10))
    img = nib.load(path)
    expected = img.dataobj.offset + int(np.prod(img.shape)) * 2  # source: nibabel
    path.write_bytes(path.read_bytes()[:-7])
    with pytest.raises(Exception):  # noqa: B017 - nibabel cannot load it either
        nib.load(path).get_fdata()
    exc = read_error(path)
    assert exc.code == "file/truncated"
    assert exc.evidence["expected_size"] == expected
    assert exc.evidence["file_size"] == expected - 7


def test_header_cut_short(tmp_path: Path) -> None:
    path = write_run(tmp_path, "x.nii", shape=(4, 4, 3, 10))
    path.write_bytes(path.read_bytes()[:200])
    assert read_error(path).code == "file/truncated"


@pytest.mark.parametrize("cut", [0.5, 0.9])
def test_truncated_gzip(tmp_path: Path, cut: float) -> None:
    rng = np.random.default_rng(1)
    data = rng.integers(-1000, 1000, size=(8, 8, 6, 20), dtype=np.int16)
    path = write_run(tmp_path, "x.nii.gz", shape=data.shape, data=data)
    content = path.read_bytes()
    path.write_bytes(content[: int(len(content) * cut)])
    with pytest.raises(Exception):  # noqa: B017 - source: nibabel fails to load it too
        nib.load(path).get_fdata()
    exc = read_error(path)
    assert exc.code == "file/truncated"


def test_gzip_cut_inside_header(tmp_path: Path) -> None:
    rng = np.random.default_rng(2)
    data = rng.integers(-1000, 1000, size=(8, 8, 6, 20), dtype=np.int16)
    path = write_run(tmp_path, "x.nii.gz", shape=data.shape, data=data)
    path.write_bytes(path.read_bytes()[:60])
    assert read_error(path).code == "file/truncated"


def test_gzip_trailer_mismatch(tmp_path: Path) -> None:
    # header says 10 volumes, gzip stream holds 5: the ISIZE trailer (RFC 1952) disagrees
    short = write_run(tmp_path, "short.nii", shape=(4, 4, 3, 5))
    patch_header(short, dim=[4, 4, 4, 3, 10, 1, 1, 1])
    gz = tmp_path / "short.nii.gz"
    gz.write_bytes(gzip.compress(short.read_bytes()))
    exc = read_error(gz)
    assert exc.code == "file/truncated"
    assert exc.evidence["expected_size"] == 352 + 4 * 4 * 3 * 10 * 2  # nifti1.h: vox_offset 352
    assert exc.evidence["decompressed_size"] == 352 + 4 * 4 * 3 * 5 * 2


@pytest.mark.parametrize("dim0", [0, 8, -1, 100])
def test_bad_dim0(tmp_path: Path, dim0: int) -> None:
    path = write_run(tmp_path, "x.nii", shape=(4, 4, 3, 5))
    patch_header(path, dim=[dim0, 4, 4, 3, 5, 1, 1, 1])
    exc = read_error(path)
    assert (exc.code, exc.field) == ("file/bad-dimensions", "dim")  # 1..7 (nifti1.h, from memory)


@pytest.mark.parametrize("bad", [0, -5])
def test_non_positive_dim(tmp_path: Path, bad: int) -> None:
    path = write_run(tmp_path, "x.nii.gz", shape=(4, 4, 3, 5))
    patch_header(path, dim=[4, 4, bad, 3, 5, 1, 1, 1])
    assert read_error(path).code == "file/bad-dimensions"


def test_unknown_datatype(tmp_path: Path) -> None:
    path = write_run(tmp_path, "x.nii", shape=(4, 4, 3, 5))
    patch_header(path, datatype=3)  # not a nifti1.h datatype code (from memory)
    with pytest.raises(Exception):  # noqa: B017 - source: nibabel rejects it too
        nib.load(path).get_fdata()
    exc = read_error(path)
    assert (exc.code, exc.field) == ("file/not-nifti", "datatype")


def test_nan_vox_offset(tmp_path: Path) -> None:
    path = write_run(tmp_path, "x.nii", shape=(4, 4, 3, 5))
    patch_header(path, vox_offset=np.nan)
    assert read_error(path).code == "file/not-nifti"


@pytest.mark.parametrize("compressed", [False, True])
def test_absurd_claim_is_bounded(tmp_path: Path, compressed: bool) -> None:
    ext = ".nii.gz" if compressed else ".nii"
    path = write_run(tmp_path, "x" + ext, shape=(4, 4, 3, 5), version=2)
    patch_header(path, dim=[4, 1 << 20, 1 << 20, 1 << 20, 1, 1, 1, 1])  # 2**61 bytes of int16
    tracemalloc.start()
    start = time.perf_counter()
    exc = read_error(path)
    elapsed = time.perf_counter() - start
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert exc.code == "file/bad-dimensions"
    assert elapsed < 1.0 and peak < 4 << 20


def test_claim_beyond_deflate_ratio(tmp_path: Path) -> None:
    path = write_run(tmp_path, "x.nii.gz", shape=(4, 4, 3, 5))
    size = path.stat().st_size
    # > 1032 x the compressed size: impossible for deflate (RFC 1951, from memory)
    patch_header(path, dim=[4, 64, 64, 40, 200, 1, 1, 1])
    assert 64 * 64 * 40 * 200 * 2 > 1032 * size
    exc = read_error(path)
    assert exc.code == "file/bad-dimensions"
    assert exc.evidence["max_ratio"] == 1032


def test_gzip_bomb_is_bounded(tmp_path: Path) -> None:
    small = write_run(tmp_path, "small.nii", shape=(4, 4, 3, 5))
    bomb = gzip_zeros(tmp_path / "bomb.nii.gz", small.read_bytes(), 96 << 20)
    assert bomb.stat().st_size < 200_000
    tracemalloc.start()
    start = time.perf_counter()
    info, _ = read_header(bomb)  # the data the header needs is there; the rest is ignored
    elapsed = time.perf_counter() - start
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert info.shape == (4, 4, 3, 5)
    assert elapsed < 1.0 and peak < 4 << 20


def test_directory_named_like_a_run(tmp_path: Path) -> None:
    folder = tmp_path / "sub-01_task-x_bold.nii.gz"
    folder.mkdir()
    assert read_error(folder).code == "file/unreadable"


def test_missing_and_links(tmp_path: Path) -> None:
    assert read_error(tmp_path / "nope.nii").code == "file/missing"
    broken = symlink(tmp_path / "broken.nii", tmp_path / "gone.nii")
    assert read_error(broken).code == "file/missing"
    annexed = symlink(
        tmp_path / "sub-01_bold.nii.gz", "../.git/annex/objects/Xx/Yy/KEY--abc.nii.gz/KEY.nii.gz"
    )
    exc = read_error(annexed)
    assert exc.code == "file/no-content"
    assert "not present locally" in exc.message
    a = tmp_path / "a.nii"
    b = tmp_path / "b.nii"
    symlink(a, b)
    symlink(b, a)
    assert read_error(a).code == "file/link-loop"


def test_annexed_link_with_content_reads(tmp_path: Path) -> None:
    obj = write_run(tmp_path, ".git/annex/objects/Xx/Yy/K/K.nii.gz", shape=(3, 3, 2, 4))
    link = symlink(tmp_path / "sub-01_bold.nii.gz", obj.relative_to(tmp_path))
    info, _ = read_header(link)
    assert_matches_nibabel(info, link)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no FIFOs here")
def test_fifo_is_refused_without_blocking(tmp_path: Path) -> None:
    fifo = tmp_path / "pipe.nii"
    os.mkfifo(fifo)
    assert read_error(fifo).code == "file/unreadable"


def test_permission_denied(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = write_run(tmp_path, "x.nii", shape=(3, 3, 2, 4))

    def refusing(*args: object, **kwargs: object) -> None:
        raise PermissionError(13, "Permission denied", str(path))

    # as for a chmod 000 file (readers open files with os.open, see readers/errors.py)
    monkeypatch.setattr(errors_module.os, "open", refusing)
    assert read_error(path).code == "file/unreadable"


def test_default_display_is_the_path(tmp_path: Path) -> None:
    exc = read_error(tmp_path / "nope.nii", None)
    assert str(tmp_path / "nope.nii") in exc.message


# --- fuzzing: any bytes give a header or a ReadError, nothing else -------------------------


@pytest.fixture(scope="module")
def valid_bytes(tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    root = tmp_path_factory.mktemp("fuzz")
    out = {}
    for version in (1, 2):
        path = write_run(root, f"v{version}.nii", shape=(4, 4, 3, 5), version=version)
        out[f"v{version}"] = path.read_bytes()
    return out


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    which=st.sampled_from(["v1", "v2"]),
    edits=st.lists(st.tuples(st.integers(0, 543), st.integers(0, 255)), min_size=1, max_size=8),
    cut=st.one_of(st.none(), st.integers(0, 1200)),
    compress=st.booleans(),
)
def test_fuzzed_headers_never_crash(
    tmp_path: Path,
    valid_bytes: dict[str, bytes],
    which: str,
    edits: list[tuple[int, int]],
    cut: int | None,
    compress: bool,
) -> None:
    content = bytearray(valid_bytes[which])
    for pos, value in edits:
        if pos < len(content):
            content[pos] = value
    plain = bytes(content[:cut] if cut is not None else content)
    blob = gzip.compress(plain) if compress else plain
    path = tmp_path / ("f.nii.gz" if compress else "f.nii")
    path.write_bytes(blob)
    try:
        info, _ = read_header(path)
    except ReadError as exc:
        assert exc.code.startswith("file/")
    else:
        header_size = 348 if info.version == 1 else 540  # nifti1.h / nifti2.h (from memory)
        assert max(info.vox_offset, header_size) + info.data_bytes <= len(plain)


@pytest.mark.parametrize(("version", "header_class"),
                         [(1, nib.Nifti1Header), (2, nib.Nifti2Header)])
def test_header_layout_matches_nibabel(version: int, header_class: Any) -> None:
    # one table of field offsets serves the reader and the output patching; nibabel's
    # header dtypes (an independent implementation of nifti1.h / nifti2.h) must agree
    import struct

    from slicetime.readers.nifti import HEADER_LAYOUT

    fields = header_class.template_dtype.fields
    for name, (offset, code) in HEADER_LAYOUT[version].items():
        dtype, nib_offset = fields[name][0], fields[name][1]
        size = dtype.itemsize
        if version == 2 and name == "magic":  # we read the magic with its 4 eol_check bytes
            size += fields["eol_check"][0].itemsize
            assert fields["eol_check"][1] == nib_offset + dtype.itemsize
        assert offset == nib_offset, name
        assert struct.calcsize("<" + code) == size, name
