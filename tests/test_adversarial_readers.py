"""Hostile inputs for the readers: special files, headers readers disagree on, huge sidecars.

* Reads that block (issue 13, item 12): every reader (walker, sidecars, NIfTI
  headers, policy files, image data for ``correct``/``verify``) reads regular
  files only, opens without blocking and reads a bounded number of bytes. Each
  check runs under a deadline (a thread or a subprocess with a timeout), so a
  regression fails instead of hanging the suite.
* Headers that the audit passed but nibabel cannot open (item 16): for each
  hostile header built here, our verdict (audit and correction reader alike)
  must match whether nibabel (the reference library, REFERENCES.md) loads it
  cleanly and reads the same voxels.
* Large inherited sidecars (item 13): parsed values are shared between runs,
  and the memory for many runs stays bounded by the file, not by the run count.
"""

from __future__ import annotations

import dataclasses
import gzip
import hashlib
import json
import os
import socket
import stat
import struct
import subprocess
import sys
import threading
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import nibabel as nib
import numpy as np
import pytest

from slicetime.model import HeaderInfo
from slicetime.policy.loading import load_policy
from slicetime.policy.model import POLICY_FILENAME
from slicetime.readers import ReadError, load_sidecar, read_header
from slicetime.readers import errors as errors_module
from slicetime.readers.errors import open_regular, read_bounded
from slicetime.readers.volumes import VolumeReader, file_sha256
from slicetime.rules import RULES
from tests.helpers_bids import symlink, write_description, write_json, write_run

REPO = Path(__file__).resolve().parents[1]
DEADLINE = 20.0  # seconds; every check here finishes in well under one
FUNC = "sub-01/func/"
T = TypeVar("T")

pytestmark = pytest.mark.skipif(
    not hasattr(os, "mkfifo") or not os.path.exists("/dev/zero"),
    reason="needs FIFOs and /dev/zero (POSIX)",
)


def within(call: Callable[[], T], seconds: float = DEADLINE) -> T:
    """``call()`` in a daemon thread; fail (instead of hanging) when it does not return."""
    box: dict[str, Any] = {}

    def target() -> None:
        try:
            box["value"] = call()
        except BaseException as exc:  # handed to the test thread
            box["error"] = exc

    worker = threading.Thread(target=target, daemon=True)
    worker.start()
    worker.join(seconds)
    if worker.is_alive():
        pytest.fail(f"the read did not return within {seconds} s (it blocks)")
    if "error" in box:
        raise box["error"]
    return box["value"]


def special_files(folder: Path) -> dict[str, Path]:
    """A FIFO, a socket and links to character devices and to a /proc pseudo-file."""
    folder.mkdir(parents=True, exist_ok=True)
    out: dict[str, Path] = {}
    fifo = folder / "pipe"
    os.mkfifo(fifo)
    out["fifo"] = fifo
    out["zero"] = symlink(folder / "zero", "/dev/zero")
    if os.path.exists("/dev/urandom"):
        out["urandom"] = symlink(folder / "urandom", "/dev/urandom")
    sock_path = folder / "sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        sock.bind(str(sock_path))
        out["socket"] = sock_path
    except OSError:  # pragma: no cover - a path too long for AF_UNIX
        pass
    finally:
        sock.close()
    return out


# --- item 12: reads that block ---------------------------------------------------------------


def test_sidecar_readers_refuse_special_files_without_blocking(tmp_path: Path) -> None:
    for kind, path in special_files(tmp_path / "s").items():
        data, findings = within(lambda p=path, k=kind: load_sidecar(p, f"{k}.json"))
        assert data is None, kind
        assert [f.code for f in findings] == ["file/unreadable"], kind
        assert "not a regular file" in findings[0].message, kind


def test_header_reader_refuses_special_files_without_blocking(tmp_path: Path) -> None:
    for kind, path in special_files(tmp_path / "h").items():
        with pytest.raises(ReadError) as err:
            within(lambda p=path, k=kind: read_header(p, f"{k}.nii"))
        assert err.value.code == "file/unreadable", kind
        assert err.value.evidence["kind"] != "a regular file"


def test_policy_reader_refuses_special_files_without_blocking(tmp_path: Path) -> None:
    for kind, path in special_files(tmp_path / "p").items():
        with pytest.raises(ReadError) as err:
            within(lambda p=path: load_policy(p, RULES, display=POLICY_FILENAME))
        assert err.value.code == "file/unreadable", kind


def test_proc_pseudo_files_are_not_read(tmp_path: Path) -> None:
    # /proc files report size 0 and produce content only when read (some never end):
    # a size of 0 is never read (common practice (no source): procfs reports st_size 0)
    proc = Path("/proc/self/status")
    if not proc.exists() or os.stat(proc).st_size != 0:
        pytest.skip("no /proc pseudo-files of size 0 here")
    side = symlink(tmp_path / "sub-01_bold.json", str(proc))
    data, findings = within(lambda: load_sidecar(side, "sub-01_bold.json"))
    assert data is None and [f.code for f in findings] == ["sidecar/bad-json"]
    assert "0 bytes on disk" in findings[0].message
    image = symlink(tmp_path / "sub-01_bold.nii", str(proc))
    with pytest.raises(ReadError) as err:
        within(lambda: read_header(image, "sub-01_bold.nii"))
    assert err.value.code == "file/not-nifti" and "0 bytes" in err.value.message


def test_a_fifo_swapped_in_after_the_check_does_not_block_the_open(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # the race: the path is a regular file at stat time and a FIFO at open time. Opening a
    # FIFO for reading blocks until a writer comes; O_NONBLOCK and fstat catch it.
    fifo = tmp_path / "swapped.json"
    os.mkfifo(fifo)
    real = os.stat(REPO / "pyproject.toml")
    monkeypatch.setattr(errors_module, "check_regular_file", lambda *_a, **_k: real)
    with pytest.raises(ReadError) as err:
        within(lambda: open_regular(fifo, "swapped.json", what="sidecar"))
    assert err.value.code == "file/unreadable"
    assert "replaced while being opened" in err.value.message


class _Endless:
    """A file that never ends (like /dev/zero or a file that keeps growing)."""

    def __init__(self) -> None:
        self.requested = 0

    def read(self, size: int) -> bytes:
        assert size >= 0, "an unbounded read was asked for"
        self.requested += size
        return b"x" * size


def test_bounded_read_stops_at_the_limit_when_the_file_keeps_growing() -> None:
    source = _Endless()
    data = read_bounded(source, 10, 1000)  # type: ignore[arg-type]
    assert len(data) == 1001  # the caller sees "more than the limit"
    assert source.requested == 1001


def test_bounded_read_of_a_small_file_is_one_small_read(tmp_path: Path) -> None:
    path = write_json(tmp_path / "a.json", {"RepetitionTime": 2.0})
    fh, st = open_regular(path, "a.json")
    with fh:
        assert read_bounded(fh, st.st_size, 1 << 24) == path.read_bytes()


def test_volume_reader_refuses_a_fifo_swapped_in_after_the_audit(tmp_path: Path) -> None:
    run = write_run(tmp_path, "sub-01_bold.nii", shape=(3, 3, 2, 4))
    header, _ = read_header(run)
    run.unlink()
    os.mkfifo(run)  # the run became a FIFO between the audit and the correction

    def open_it() -> None:
        with VolumeReader(run, header, "sub-01_bold.nii"):
            pass

    with pytest.raises(ReadError) as err:
        within(open_it)
    assert err.value.code == "file/unreadable"
    with pytest.raises(OSError):  # what callers of file_sha256 handle
        within(lambda: file_sha256(run))
    with pytest.raises(FileNotFoundError):
        file_sha256(tmp_path / "missing.nii")


def test_volume_reader_reads_no_more_than_the_file_had_when_opened(tmp_path: Path) -> None:
    run = write_run(tmp_path, "sub-01_bold.nii", data=DATA_SMALL)
    header, _ = read_header(run)
    original = run.read_bytes()
    with VolumeReader(run, header, "sub-01_bold.nii") as reader:
        volumes = reader.read(4)
        with open(run, "ab") as fh:  # the file grows while it is being read
            fh.write(b"\0" * 100_000)
        digest = reader.sha256()
    # the checksum covers the bytes the file had when opened (hashlib, the reference)
    assert digest == hashlib.sha256(original).hexdigest()
    # the volumes read are the file's own (nibabel, the reference reader)
    assert np.array_equal(volumes.transpose(3, 2, 1, 0), DATA_SMALL)


DATA_SMALL = np.arange(3 * 3 * 2 * 4, dtype=np.int16).reshape(3, 3, 2, 4)


def _special_dataset(root: Path) -> dict[str, str]:
    """A dataset whose special entries each expect one finding (path -> code)."""
    write_description(root)
    timing = {"RepetitionTime": 2.0, "SliceTiming": [0.0, 1.0, 0.5, 1.5]}
    expected: dict[str, str] = {}
    write_run(root, FUNC + "sub-01_task-ok_bold.nii.gz", (4, 4, 4, 5), sidecar=timing)
    expected[FUNC + "sub-01_task-ok_bold.nii.gz"] = ""
    func = root / FUNC
    # images that are special files
    os.mkfifo(func / "sub-01_task-fifo_bold.nii.gz")
    symlink(func / "sub-01_task-zero_bold.nii.gz", "/dev/zero")
    symlink(func / "sub-01_task-random_bold.nii", "/dev/urandom")
    for name in ("fifo", "zero"):
        expected[FUNC + f"sub-01_task-{name}_bold.nii.gz"] = "file/unreadable"
    expected[FUNC + "sub-01_task-random_bold.nii"] = "file/unreadable"
    # own sidecars that are special files
    write_run(root, FUNC + "sub-01_task-pside_bold.nii.gz", (4, 4, 4, 5))
    os.mkfifo(func / "sub-01_task-pside_bold.json")
    write_run(root, FUNC + "sub-01_task-zside_bold.nii.gz", (4, 4, 4, 5))
    symlink(func / "sub-01_task-zside_bold.json", "/dev/zero")
    expected[FUNC + "sub-01_task-pside_bold.nii.gz"] = "file/unreadable"
    expected[FUNC + "sub-01_task-zside_bold.nii.gz"] = "file/unreadable"
    # an inherited sidecar that is a FIFO, and a policy file that is one
    write_run(root, "sub-02/func/sub-02_task-inh_bold.nii.gz", (4, 4, 4, 5))
    os.mkfifo(root / "task-inh_bold.json")
    expected["sub-02/func/sub-02_task-inh_bold.nii.gz"] = "file/unreadable"
    os.mkfifo(root / POLICY_FILENAME)
    # a non-run image-like FIFO whose own sidecar the walker would read: not a run
    os.mkfifo(func / "sub-01_notes.json")
    return expected


def test_the_audit_finishes_with_a_finding_for_every_special_file(tmp_path: Path) -> None:
    root = tmp_path / "ds"
    expected = _special_dataset(root)
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    try:
        proc = subprocess.run(
            [sys.executable, "-m", "slicetime", "audit", str(root), "--format", "json"],
            capture_output=True,
            timeout=60,
            env=env,
            check=False,
        )
    except subprocess.TimeoutExpired:
        pytest.fail("the audit blocked on a special file")
    stderr = proc.stderr.decode("utf-8", "replace")
    assert "Traceback" not in stderr
    assert proc.returncode == 1, stderr
    report = json.loads(proc.stdout)
    runs = {run["path"]: run for run in report["runs"]}
    assert set(runs) == set(expected)
    for path, code in expected.items():
        codes = {f["code"] for f in runs[path]["findings"]}
        if code:
            assert code in codes, (path, codes)
        else:
            assert not any(f["severity"] == "error" for f in runs[path]["findings"]), path
    policy_problems = [f for f in report["dataset_findings"] if f.get("file") == POLICY_FILENAME]
    assert [f["code"] for f in policy_problems] == ["file/unreadable"]


# --- item 16: headers that readers disagree on -------------------------------------------------

SHAPE = (4, 4, 3, 5)
DATA = np.arange(int(np.prod(SHAPE)), dtype=np.int16).reshape(SHAPE)


def _nifti_bytes(version: int, order: str) -> bytes:
    cls = nib.Nifti1Image if version == 1 else nib.Nifti2Image
    hdr_cls = nib.Nifti1Header if version == 1 else nib.Nifti2Header
    image = cls(DATA, np.eye(4), header=hdr_cls(endianness=order))
    image.header.set_xyzt_units("mm", "sec")
    return image.to_bytes()


def _hostile(
    version: int = 1,
    order: str = "<",
    vox_offset: int | None = None,
    esizes: tuple[int, ...] = (),
    flag: int | None = None,
) -> bytes:
    """A single-file image with the given vox_offset and extension sizes (payload 'a's).

    The voxels are placed at ``vox_offset`` when it lies after the header, else right
    after the header (where a writer that left vox_offset unset put them)."""
    raw = _nifti_bytes(version, order)
    size = 348 if version == 1 else 540
    data = raw[size + 4 :]
    body = b"".join(struct.pack(order + "ii", e, 6) + b"a" * max(e - 8, 0) for e in esizes)
    flag = (1 if esizes else 0) if flag is None else flag
    prefix = raw[:size] + bytes([flag, 0, 0, 0]) + body
    offset = vox_offset if vox_offset is not None else max(len(prefix), size + 4)
    if offset >= size + 4:
        prefix = prefix[:offset] + b"\0" * (offset - len(prefix))
    else:
        prefix = prefix[: size + 4]
    head = bytearray(prefix)
    if version == 1:
        struct.pack_into(order + "f", head, 108, float(offset))
    else:
        struct.pack_into(order + "q", head, 168, offset)
    return bytes(head) + data


#: hostile headers: (name, bytes). The expected verdicts are not written here: they come
#: from nibabel (below), and ours must match them.
CASES: list[tuple[str, bytes]] = [
    ("valid", _hostile()),
    ("valid-nifti2", _hostile(version=2)),
    ("vox0", _hostile(vox_offset=0)),
    ("vox0-nifti2", _hostile(version=2, vox_offset=0)),
    ("vox0-big-endian", _hostile(order=">", vox_offset=0)),
    ("vox100", _hostile(vox_offset=100)),
    ("vox348", _hostile(vox_offset=348)),
    ("vox351", _hostile(vox_offset=351)),
    ("vox540-nifti2", _hostile(version=2, vox_offset=540)),
    ("vox543-nifti2", _hostile(version=2, vox_offset=543)),
    ("ext16", _hostile(vox_offset=368, esizes=(16,))),
    ("ext32+16", _hostile(vox_offset=400, esizes=(32, 16))),
    ("ext-big-endian", _hostile(order=">", vox_offset=384, esizes=(32,))),
    ("ext-nifti2", _hostile(version=2, vox_offset=576, esizes=(32,))),
    ("ext-long", _hostile(vox_offset=352 + 4096, esizes=(4096,))),
    ("flag-no-room", _hostile(vox_offset=352, flag=1)),
    ("flag-room-below-16", _hostile(vox_offset=364, flag=1)),
    ("flag-garbage-chain", _hostile(vox_offset=400, flag=1)),
    ("esize24", _hostile(vox_offset=376, esizes=(24,))),
    ("esize8", _hostile(vox_offset=368, esizes=(8,))),
    ("esize4", _hostile(vox_offset=368, esizes=(4,))),
    ("esize0", _hostile(vox_offset=368, esizes=(0,))),
    ("esize-negative", _hostile(vox_offset=368, esizes=(-16,))),
    ("esize-past-vox", _hostile(vox_offset=368, esizes=(32,))),
    ("second-past-vox", _hostile(vox_offset=400, esizes=(32, 32))),
    ("ext-long-then-bad", _hostile(vox_offset=352 + 1024 + 32, esizes=(1024, 24))),
    ("esize20-nifti2", _hostile(version=2, vox_offset=576, esizes=(20,))),
    ("esize-past-vox-big-endian", _hostile(order=">", vox_offset=368, esizes=(48,))),
]


def _nibabel_verdict(path: Path) -> bool:
    """True when nibabel loads the file without an error or an extension warning and
    reads the voxels that were written (nibabel: the reference library)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            image = nib.load(path)
            voxels = np.asanyarray(image.dataobj)
        except Exception:
            return False
    if any("xtension" in str(w.message) for w in caught):
        return False  # nibabel flags the chain (esize not a multiple of 16) and guesses on
    return voxels.shape == SHAPE and np.array_equal(voxels, DATA)


def _our_header_verdict(path: Path) -> tuple[bool, str | None]:
    try:
        read_header(path, path.name)
    except ReadError as exc:
        return False, exc.code
    return True, None


def _our_volume_verdict(path: Path, template: HeaderInfo, vox_offset: int) -> bool:
    """The correction reader on the same file (header values as the audit read them)."""
    header = dataclasses.replace(template, vox_offset=vox_offset)
    try:
        with VolumeReader(path, header, path.name) as reader:
            volumes = reader.read(SHAPE[3])
    except ReadError:
        return False
    return bool(np.array_equal(volumes.transpose(3, 2, 1, 0), DATA))


def _vox_offset_of(content: bytes) -> int:
    for order in "<>":
        size = struct.unpack_from(order + "i", content)[0]
        if size == 348:
            return int(struct.unpack_from(order + "f", content, 108)[0])
        if size == 540:
            return int(struct.unpack_from(order + "q", content, 168)[0])
    raise AssertionError("not NIfTI")


@pytest.mark.parametrize("compressed", [False, True], ids=["nii", "nii.gz"])
@pytest.mark.parametrize(("name", "content"), CASES, ids=[c[0] for c in CASES])
def test_header_verdicts_match_nibabel(
    tmp_path: Path, name: str, content: bytes, compressed: bool
) -> None:
    path = tmp_path / ("x.nii.gz" if compressed else "x.nii")
    path.write_bytes(gzip.compress(content, mtime=0) if compressed else content)
    reference = _nibabel_verdict(path)
    ours, code = _our_header_verdict(path)
    assert ours == reference, (name, code)
    if not ours:
        assert code in ("file/bad-data-offset", "file/bad-extensions"), (name, code)
        assert code in RULES  # documented for `slicetime explain`
    # the correction reader agrees with the audit, on a header the audit read cleanly
    good = tmp_path / ("good.nii.gz" if compressed else "good.nii")
    version = 1 if struct.unpack_from("<i", content)[0] in (348,) or struct.unpack_from(
        ">i", content)[0] == 348 else 2
    order = "<" if struct.unpack_from("<i", content)[0] in (348, 540) else ">"
    clean = _nifti_bytes(version, order)
    good.write_bytes(gzip.compress(clean, mtime=0) if compressed else clean)
    template, _ = read_header(good)
    assert _our_volume_verdict(path, template, _vox_offset_of(content)) == reference, name


def test_correct_refuses_a_run_with_vox_offset_zero_even_when_forced(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from slicetime.interfaces.cli import cli

    root = tmp_path / "ds"
    write_description(root)
    run = root / FUNC / "sub-01_task-a_bold.nii"
    run.parent.mkdir(parents=True)
    run.write_bytes(_hostile(vox_offset=0))
    write_json(run.with_name("sub-01_task-a_bold.json"),
               {"RepetitionTime": 2.0, "SliceTiming": [0.0, 1.0, 0.5]})
    audit = CliRunner().invoke(cli, ["audit", str(root), "--format", "json"])
    codes = {f["code"] for r in json.loads(audit.stdout)["runs"] for f in r["findings"]}
    assert "file/bad-data-offset" in codes
    out = tmp_path / "out"
    result = CliRunner().invoke(cli, ["correct", str(root), "--out", str(out), "--force"])
    assert result.exit_code != 0
    assert not list(out.rglob("*_bold.nii*"))  # nothing written for the run
    assert stat.S_ISREG(os.stat(run).st_mode)


# --- item 13: one large inherited sidecar, many runs -------------------------------------------


def _big_inherited(root: Path, n_runs: int, n_values: int) -> tuple[Path, list[Path]]:
    write_description(root)
    values = [round(i * 1e-4, 4) for i in range(n_values)]
    top = write_json(root / "task-big_bold.json", {"RepetitionTime": 2.0, "SliceTiming": values})
    runs = [
        write_run(root, f"sub-{i:03d}/func/sub-{i:03d}_task-big_bold.nii.gz", (2, 2, 3, 3))
        for i in range(n_runs)
    ]
    return top, runs


def test_runs_share_one_parsed_inherited_value(tmp_path: Path) -> None:
    from slicetime.pipelines.audit import audit_paths

    _top, _runs = _big_inherited(tmp_path / "ds", 130, 5000)  # 130 runs: three chunks
    result = audit_paths([tmp_path / "ds"])
    values = [run.record.metadata["SliceTiming"] for run in result.runs]
    assert len(values) == 130
    assert all(v is values[0] for v in values)  # one object, across chunks too
    with pytest.raises(TypeError):
        values[0].append(1.0)  # shared values refuse changes


def test_memory_for_many_runs_is_bounded_by_the_file_not_the_run_count(tmp_path: Path) -> None:
    import gc
    import tracemalloc

    from slicetime.pipelines.audit import audit_paths

    top, _runs = _big_inherited(tmp_path / "ds", 200, 200_000)
    size = top.stat().st_size  # about 1.5 MB of JSON
    gc.collect()
    tracemalloc.start()
    result = audit_paths([tmp_path / "ds"])
    gc.collect()
    held, _peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert len(result.runs) == 200
    # one parsed copy: 8 bytes of list slot and at most one 24-byte float per value,
    # about 5x the file; plus what any run costs (well under 20 kB each). A copy of the
    # list per run would be 200 x 1.6 MB = 320 MB.
    parsed = 200_000 * (8 + 24)
    assert held < parsed + 200 * 20_000, (held, size)


def test_a_large_inherited_sidecar_over_the_walk_budget_is_a_finding(tmp_path: Path) -> None:
    from slicetime.readers.inheritance import LARGE_SIDECAR_BYTES, SidecarIndex, SidecarStore

    root = tmp_path / "ds"
    write_description(root)
    values = [round(i * 1e-4, 4) for i in range((LARGE_SIDECAR_BYTES // 8) + 10)]
    write_json(root / "task-a_bold.json", {"SliceTiming": values})
    write_json(root / "task-b_bold.json", {"SliceTiming": values})
    runs = [write_run(root, f"sub-01/func/sub-01_task-{t}_bold.nii.gz", (2, 2, 3, 3))
            for t in ("a", "b", "a", "b")]
    size = (root / "task-a_bold.json").stat().st_size
    assert size >= LARGE_SIDECAR_BYTES
    store = SidecarStore(budget=size + size // 2)  # room for one of the two
    resolved = [SidecarIndex(root, store=store).resolve(run) for run in runs]
    codes = [[f.code for f in r.findings] for r in resolved]
    assert codes[0] == [] and codes[2] == []
    assert codes[1] == ["sidecar/over-budget"] == codes[3]
    assert "SliceTiming" not in resolved[1].metadata
    assert store.parse_count == 1  # the one over budget is never parsed, nor tried again
    assert "sidecar/over-budget" in RULES


def test_a_store_sent_to_a_worker_is_that_workers_store_for_the_walk(tmp_path: Path) -> None:
    import pickle

    from slicetime.readers.inheritance import SidecarStore

    store = SidecarStore()
    copy_one = pickle.loads(pickle.dumps(store))
    assert copy_one is store  # in this process: the same store
    token = store.token
    del store, copy_one
    import gc

    gc.collect()
    # in a process without it (a worker), unpickling makes one store per walk and reuses it
    first = pickle.loads(pickle.dumps(SidecarStore(token=token + "x")))
    again = pickle.loads(pickle.dumps(first))
    assert again is first and first.token == token + "x"


def test_shared_values_survive_pickling_and_become_one_object_again() -> None:
    import pickle

    from slicetime.model import RunRecord
    from slicetime.readers.inheritance import ValueSharer
    from slicetime.readers.sidecar import parse_sidecar_bytes

    data, _ = parse_sidecar_bytes(json.dumps({"SliceTiming": list(range(100))}).encode(), "t")
    assert data is not None
    records = [
        RunRecord(path=f"r{i}", abs_path=f"/r{i}", root="/", metadata=dict(data),
                  metadata_sources={"SliceTiming": "task-x_bold.json"})
        for i in range(3)
    ]
    copies = [pickle.loads(pickle.dumps(r)) for r in records]  # as from worker processes
    assert copies[0].metadata["SliceTiming"] is not copies[1].metadata["SliceTiming"]
    assert type(copies[0].metadata["SliceTiming"]) is type(data["SliceTiming"])
    sharer = ValueSharer()
    for record in copies:
        sharer.add(record)
    assert copies[0].metadata["SliceTiming"] is copies[2].metadata["SliceTiming"]
    assert sharer.replaced == 2


def test_correct_reads_its_own_json_back_only_from_regular_files(tmp_path: Path) -> None:
    # the derivative description and sidecars that correct reads back go through the
    # bounded regular-file reader: a FIFO in their place reads as "none", never blocks
    from slicetime.pipelines.provenance import read_description, read_json_object

    fifo = tmp_path / "dataset_description.json"
    os.mkfifo(fifo)
    assert within(lambda: read_description(tmp_path)) == {}
    regular = tmp_path / "x.json"
    regular.write_text('{"Name": "quiet rooms"}')
    assert read_json_object(regular) == {"Name": "quiet rooms"}
