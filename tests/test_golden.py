"""Golden reports: the restructuring of issue 14 must not change what users read.

The machine-readable reports (``audit --format json``, ``--format junit`` and
``show --format json``) of the demo study and of a generated 2,000-run dataset are
compared with the files under ``tests/golden/``. They are compared as
*content* (JSON parsed and dumped with sorted keys, XML canonicalised with
whitespace-only text dropped), so a change of layout alone (indentation,
streaming, attribute order) passes, and any changed value fails.

Only what legitimately varies between machines is normalised: the temporary
folder the data lives in (``<TMP>``) and the tool's version (``<VERSION>``).

Regenerating: ``SLICETIME_UPDATE_GOLDEN=1 .venv/bin/python -m pytest
tests/test_golden.py`` rewrites the files (the tests then skip). Do this only
for a report change another issue asks for, and name that issue in the commit
message; a restructuring never regenerates them.
"""

from __future__ import annotations

import gzip
import json
import os
import re
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pytest
from click.testing import CliRunner

from slicetime import __version__
from slicetime.interfaces.cli import cli
from slicetime.pipelines.demo import build_demo_dataset
from slicetime.schemes.generate import Protocol, slice_timing

GOLDEN = Path(__file__).parent / "golden"
UPDATE = os.environ.get("SLICETIME_UPDATE_GOLDEN") == "1"
N_RUNS = 2000


# --------------------------------------------------------------------------- normalising


def _normaliser(tmp: Path) -> Any:
    places = sorted({str(tmp), os.path.realpath(tmp)}, key=len, reverse=True)
    pattern = re.compile("|".join(re.escape(p) for p in places))
    # file URIs quote the path; the temporary folder has no character that needs it
    return lambda text: pattern.sub("<TMP>", text)


def _normalise_json(value: Any, sub: Any) -> Any:
    if isinstance(value, str):
        return sub(value)
    if isinstance(value, dict):
        return {sub(k): _normalise_json(v, sub) for k, v in value.items()}
    if isinstance(value, list):
        return [_normalise_json(v, sub) for v in value]
    return value


def canonical_json(text: str, tmp: Path) -> str:
    value = json.loads(text)
    if isinstance(value, dict) and isinstance(value.get("tool"), dict):
        value["tool"]["version"] = "<VERSION>"
    value = _normalise_json(value, _normaliser(tmp))
    return json.dumps(value, indent=1, sort_keys=True, ensure_ascii=False) + "\n"


def canonical_xml(text: str, tmp: Path) -> str:
    body = text.split("?>", 1)[1] if text.startswith("<?xml") else text
    root = ET.fromstring(body)
    for prop in root.iter("property"):
        if prop.get("name") == "slicetime_version":
            prop.set("value", "<VERSION>")
    canonical = ET.canonicalize(ET.tostring(root, encoding="unicode"), strip_text=True)
    # one element per line, so a failure shows a readable difference
    return _normaliser(tmp)(canonical.replace("><", ">\n<")) + "\n"


# --------------------------------------------------------------------------- comparing


def _first_difference(expected: str, actual: str) -> str:
    old, new = expected.splitlines(), actual.splitlines()
    for number, (a, b) in enumerate(zip(old, new, strict=False), start=1):
        if a != b:
            return f"line {number}:\n  golden: {a[:300]}\n  now:    {b[:300]}"
    return f"lengths differ: golden {len(old)} lines, now {len(new)} lines"


def check_golden(name: str, actual: str) -> None:
    path = GOLDEN / f"{name}.gz"
    if UPDATE:
        GOLDEN.mkdir(exist_ok=True)
        path.write_bytes(gzip.compress(actual.encode("utf-8"), compresslevel=9, mtime=0))
        pytest.skip(f"rewrote {path.name}")
    assert path.exists(), f"{path} is missing; see this module's docstring to create it"
    expected = gzip.decompress(path.read_bytes()).decode("utf-8")
    if expected != actual:
        pytest.fail(f"{name} differs from tests/golden/{path.name}: "
                    + _first_difference(expected, actual), pytrace=False)


def _invoke(args: list[str]) -> str:
    result = CliRunner().invoke(cli, args, catch_exceptions=False)
    assert result.exit_code in (0, 1), result.output  # 1: findings at --fail-on
    return result.stdout


# --------------------------------------------------------------------------- datasets


@pytest.fixture(scope="module")
def demo_root(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("golden-demo") / "quiet-rooms"
    build_demo_dataset(root)
    return root


def _own_sidecar(func: Path, stem: str, content: dict[str, Any]) -> None:
    (func / f"{stem}.json").write_text(json.dumps({"EchoTime": 0.03, **content}))


def _header_bytes(zooms: tuple[float, ...], unit: str = "sec") -> bytes:
    img = nib.Nifti1Image(np.zeros((8, 8, 40, 4), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", unit)
    img.header.set_zooms(zooms)
    img.header.set_dim_info(slice=2)
    return gzip.compress(img.to_bytes(), compresslevel=1, mtime=0)


def _runs(root: Path) -> Iterator[tuple[int, Path, str]]:
    index = 0
    for func in sorted(root.glob("sub-*/ses-*/func")):
        for image in sorted(func.glob("*_bold.nii.gz")):
            yield index, func, image.name[: -len(".nii.gz")]
            index += 1


def make_dataset(root: Path, n_runs: int) -> None:
    """The golden dataset's base: n_runs BOLD runs (subjects × 2 sessions × 2 tasks),
    timing in top-level sidecars, each run's own sidecar one key. Kept here, not
    borrowed from a benchmark, so the golden data never change with a benchmark."""
    root.mkdir(parents=True)
    (root / "dataset_description.json").write_text(
        json.dumps({"Name": "bench", "BIDSVersion": "1.10.0"}))
    st = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                               decimals=4))
    for task in ("a", "b"):
        (root / f"task-{task}_bold.json").write_text(
            json.dumps({"RepetitionTime": 2.0, "SliceTiming": st, "TaskName": task}))
    img = nib.Nifti1Image(np.zeros((8, 8, 40, 4), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    img.header.set_dim_info(slice=2)
    payload = gzip.compress(img.to_bytes(), compresslevel=1, mtime=0)
    per_subject = 4  # 2 sessions × 2 tasks
    for i in range((n_runs + per_subject - 1) // per_subject):
        for ses in ("1", "2"):
            func = root / f"sub-{i:05d}" / f"ses-{ses}" / "func"
            func.mkdir(parents=True)
            for task in ("a", "b"):
                if i * per_subject >= n_runs:
                    break
                stem = f"sub-{i:05d}_ses-{ses}_task-{task}_bold"
                (func / f"{stem}.nii.gz").write_bytes(payload)
                (func / f"{stem}.json").write_text(json.dumps({"EchoTime": 0.03}))


def make_varied_dataset(root: Path, n_runs: int) -> None:
    """The benchmark's dataset (top-level timing, own sidecars) with a planted defect
    every few dozen runs, so the report exercises many rules and the policy."""
    make_dataset(root, n_runs)
    interleaved = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                                        decimals=4))
    descending = slice_timing(Protocol(n_slices=40, order="sequential", ascending=False,
                                       repetition_time=2.0, decimals=4))
    multiband = slice_timing(Protocol(n_slices=40, order="interleaved", multiband=2,
                                      repetition_time=2.0, decimals=4))
    other_tr = _header_bytes((3.0, 3.0, 3.0, 2500.0), unit="msec")
    wrong_tr = _header_bytes((3.0, 3.0, 3.0, 2.5))
    (root / "slicetime-policy.toml").write_text(
        "version = 1\n\n"
        "[[protocols]]\nmatch = { task = \"a\" }\nrepetition_time = 2.0\nslices = 40\n"
        "scheme = \"interleaved\"\n\n"
        "[[protocols]]\nmatch = { task = \"b\", sub = \"00007\" }\nrepetition_time = 2.5\n\n"
        "[levels]\n\"inherit/timing-override\" = \"warning\"\n\n"
        "[[waive]]\nruns = [\"sub-0001*/**\"]\nfindings = [\"header/*\"]\n"
        "reason = \"an invented pilot group\"\n"
    )
    # a subject whose folder overrides the inherited timing of task b
    (root / "sub-00003" / "sub-00003_task-b_bold.json").write_text(
        json.dumps({"SliceTiming": descending}))
    for index, func, stem in _runs(root):
        image = func / f"{stem}.nii.gz"
        kind = index % 97
        if kind == 7:
            _own_sidecar(func, stem, {"SliceTiming": [round(t * 1000, 1) for t in interleaved]})
        elif kind == 11:
            _own_sidecar(func, stem, {"SliceTiming": interleaved[:-1]})
        elif kind == 13:
            _own_sidecar(func, stem, {"RepetitionTime": 2.5})
        elif kind == 17:
            image.write_bytes(image.read_bytes()[:60])  # inside the header
        elif kind == 19:
            (func / f"{stem}.json").write_text('{"EchoTime": 0.03,')
        elif kind == 23:
            _own_sidecar(func, stem, {"SliceTiming": [*interleaved[:-1], 2.4]})
        elif kind == 29:
            _own_sidecar(func, stem, {"MultibandAccelerationFactor": 2})
        elif kind == 31:
            _own_sidecar(func, stem, {"SliceTiming": multiband})
        elif kind == 37:
            image.write_bytes(wrong_tr)
        elif kind == 41:
            image.write_bytes(other_tr)
        elif kind == 43:
            _own_sidecar(func, stem, {"SliceTiming": interleaved, "DelayTime": 0.5,
                                      "SliceEncodingDirection": "k-"})
        elif kind == 47:
            _own_sidecar(func, stem, {"RepetitionTime": "2", "TaskName": 3})
        elif kind == 53:
            _own_sidecar(func, stem, {"SliceTiming": [*interleaved[:-2], interleaved[-3],
                                                      interleaved[-1]]})
        elif kind == 59:
            (func / f"{stem}.json").unlink()
            (func / f"{stem}_extra.json").write_text("{}")
        elif kind == 61:
            _own_sidecar(func, stem, {"AcquisitionDuration": 1.5, "RepetitionTime": 2.0})


@pytest.fixture(scope="module")
def large_root(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("golden-large") / "generated"
    make_varied_dataset(root, N_RUNS)
    return root


# --------------------------------------------------------------------------- the pins

DEMO_SHOWN = (
    "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz",
    "sub-03/ses-1/func/sub-03_ses-1_task-hum_bold.nii.gz",
    "sub-02/ses-2/func/sub-02_ses-2_task-chirp_bold.nii.gz",
    "sub-01/ses-2/func/sub-01_ses-2_task-tone_bold.nii.gz",
)


@pytest.mark.parametrize("fmt", ["json", "junit"])
def test_demo_audit_report_is_unchanged(demo_root: Path, fmt: str) -> None:
    text = _invoke(["audit", str(demo_root), "--format", fmt])
    canonical = canonical_json if fmt == "json" else canonical_xml
    check_golden(f"demo-audit.{fmt}", canonical(text, demo_root.parent))


def test_demo_show_reports_are_unchanged(demo_root: Path) -> None:
    shown = [canonical_json(_invoke(["show", str(demo_root / rel), "--format", "json"]),
                            demo_root.parent)
             for rel in DEMO_SHOWN]
    check_golden("demo-show.json", "".join(shown))


@pytest.mark.parametrize("fmt", ["json", "junit"])
def test_large_audit_report_is_unchanged(large_root: Path, fmt: str) -> None:
    text = _invoke(["audit", str(large_root), "--format", fmt])
    canonical = canonical_json if fmt == "json" else canonical_xml
    check_golden(f"large-audit.{fmt}", canonical(text, large_root.parent))


def test_large_show_reports_are_unchanged(large_root: Path) -> None:
    picked = [stem for index, _func, stem in _runs(large_root) if index in (7, 13, 43, 61, 100)]
    shown = []
    for stem in picked:
        sub, ses = stem.split("_")[:2]
        image = large_root / sub / ses / "func" / f"{stem}.nii.gz"
        shown.append(canonical_json(_invoke(["show", str(image), "--format", "json"]),
                                    large_root.parent))
    check_golden("large-show.json", "".join(shown))


def test_the_golden_reports_cover_many_rules() -> None:
    """The pins mean something only if the reports hold many kinds of finding."""
    if UPDATE:
        pytest.skip("rewriting")
    codes: set[str] = set()
    for name in ("demo-audit.json", "large-audit.json"):
        report = json.loads(gzip.decompress((GOLDEN / f"{name}.gz").read_bytes()))
        for run in report["runs"]:
            codes |= {f["code"] for f in run["findings"]}
        codes |= {f["code"] for f in report["dataset_findings"]}
    assert len(report["runs"]) >= N_RUNS - 1  # the sidecar-less run still counts
    areas = {code.split("/")[0] for code in codes}
    assert len(codes) >= 15, sorted(codes)
    assert {"timing", "header", "policy", "dataset", "inherit", "file"} <= areas, sorted(areas)
    assert __version__ not in json.dumps(report["tool"])
