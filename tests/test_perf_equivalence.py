"""The audit's fast paths give the same answers as the plain code they stand in for.

Each shortcut taken for speed (a quick type check before jsonschema, a container
copy instead of ``copy.deepcopy``, string path arithmetic instead of pathlib,
one struct for the whole NIfTI header, one regular expression for a BIDS name)
is compared here with the general code, on generated values. Speed itself is
measured by ``benchmarks/bench_audit.py``.
"""

from __future__ import annotations

import copy
import json
import math
import os
import re
import struct
import sys
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from slicetime.readers import inheritance, nifti, sidecar
from slicetime.readers.entities import ParsedName, parse_name
from slicetime.readers.inheritance import fresh_copy, relative_posix
from slicetime.schemes.resolve import all_finite_numbers, is_number

json_scalars = (
    st.none()
    | st.booleans()
    | st.integers(min_value=-(10**6), max_value=10**6)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.sampled_from(["i", "j", "k-", "x", ""])
)
json_values = st.recursive(
    json_scalars,
    lambda inner: (
        st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=3), inner, max_size=4)
    ),
    max_leaves=12,
)
number_lists = st.lists(
    st.integers(min_value=-5, max_value=10**3) | st.floats(allow_nan=True, allow_infinity=True),
    max_size=8,
)


@settings(max_examples=300, deadline=None)
@given(key=st.sampled_from(sorted(sidecar.TIMING_FIELDS)), value=json_values | number_lists)
def test_quick_type_check_never_passes_what_jsonschema_rejects(key: str, value: Any) -> None:
    validator = sidecar._validators()[key]  # source: jsonschema, the reference validator
    if sidecar._quick_checks()[key](value):
        assert validator.is_valid(value), (key, value)


@pytest.mark.parametrize(
    ("key", "value"),
    [
        ("SliceTiming", [0.0, 0.5, 1, 1.5]),
        ("RepetitionTime", 2.0),
        ("EchoTime", 0.03),
        ("EchoTime", [0.01, 0.02]),
        ("SliceEncodingDirection", "k-"),
        ("VolumeTiming", [0, 2.0]),
        ("NumberOfVolumesDiscardedByScanner", 4),
        ("TaskName", "rest"),
    ],
)
def test_quick_type_check_passes_common_valid_values(key: str, value: Any) -> None:
    assert sidecar._quick_checks()[key](value)
    assert sidecar._validators()[key].is_valid(value)  # source: jsonschema


def test_check_types_reports_the_same_with_or_without_quick_checks(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    data = {
        "SliceTiming": [0.0, -1.0, "x"],
        "RepetitionTime": 0,
        "EchoTime": [0.01, True],
        "SliceEncodingDirection": "z",
        "VolumeTiming": [],
        "NumberOfVolumesDiscardedByUser": 1.5,
        "TaskName": "rest",
        "DelayTime": 0.5,
    }
    fast = sidecar.check_types(data, "a.json")
    monkeypatch.setattr(
        sidecar, "_quick_checks", lambda: dict.fromkeys(sidecar.TIMING_FIELDS, lambda _v: False)
    )
    assert sidecar.check_types(data, "a.json") == fast
    assert [f.field for f in fast] == [
        "EchoTime",
        "NumberOfVolumesDiscardedByUser",
        "RepetitionTime",
        "SliceEncodingDirection",
        "SliceTiming",
        "VolumeTiming",
    ]


@settings(max_examples=200, deadline=None)
@given(value=json_values)
def test_fresh_copy_is_a_deep_copy(value: Any) -> None:
    copied = fresh_copy(value)
    expected = copy.deepcopy(value)  # source: the standard library's deep copy
    assert repr(copied) == repr(expected)

    def containers(v: Any) -> list[int]:
        if isinstance(v, list):
            return [id(v), *(i for x in v for i in containers(x))]
        if isinstance(v, dict):
            return [id(v), *(i for x in v.values() for i in containers(x))]
        return []

    assert not set(containers(copied)) & set(containers(value))


@settings(max_examples=200, deadline=None)
@given(values=number_lists)
def test_all_finite_numbers_matches_the_entrywise_test(values: list[Any]) -> None:
    assert all_finite_numbers(values) == all(
        is_number(v) and math.isfinite(float(v)) for v in values
    )


def test_all_finite_numbers_edge_cases() -> None:
    assert not all_finite_numbers([1e308, 1e308, math.nan])
    assert all_finite_numbers([1e308, 1e308, -1e308])  # the sum overflows; each entry is finite
    assert not all_finite_numbers([0.0, True])
    assert all_finite_numbers([])


parts = st.lists(st.sampled_from(["a", "b", "sub-01", "func", "x y", ".."]), max_size=4)


@settings(max_examples=300, deadline=None)
@given(root_parts=parts, rest=parts, absolute=st.booleans(), other=parts)
def test_relative_posix_matches_pathlib(
    root_parts: list[str], rest: list[str], absolute: bool, other: list[str]
) -> None:
    lead = "/" if absolute else ""
    root = Path(lead + "/".join(root_parts)) if root_parts or absolute else Path(".")
    for path in (root.joinpath(*rest), Path(lead + "/".join(other or ["z"])), root):
        try:  # source: pathlib's relative_to
            expected = path.relative_to(root).as_posix()
        except ValueError:
            expected = path.as_posix()
        assert relative_posix(path, root) == expected, (path, root)


@pytest.mark.parametrize(
    ("folder", "root"),
    [
        ("/ds/sub-01/ses-1/func", "/ds"),
        ("/ds", "/ds"),
        ("/elsewhere/func", "/ds"),
        ("/ds2/func", "/ds"),
        ("/a/b", "/"),
        ("/ds/func", None),
    ],
)
def test_folder_chain_matches_pathlib(folder: str, root: str | None) -> None:
    # the construction the inheritance code used before, with pathlib
    f = PurePosixPath(folder)
    expected = [f]
    if root is not None and f != PurePosixPath(root) and f.is_relative_to(root):
        expected = [PurePosixPath(root)]
        for part in f.relative_to(root).parts:
            expected.append(expected[-1] / part)
    assert inheritance.folder_chain(folder, root) == tuple(str(p) for p in expected)
    # the sidecar index builds a chain from its parent's (_parent_within), the same folders
    by_parents = [folder]
    while (parent := inheritance._parent_within(by_parents[0], root)) is not None:
        by_parents.insert(0, parent)
    assert tuple(by_parents) == tuple(str(p) for p in expected)


@pytest.mark.parametrize("version", [1, 2])
@pytest.mark.parametrize("order", ["<", ">"])
def test_one_struct_header_decode_matches_field_by_field(version: int, order: str) -> None:
    fields = nifti._FIELDS_1 if version == 1 else nifti._FIELDS_2
    size = nifti.NIFTI1_SIZE if version == 1 else nifti.NIFTI2_SIZE
    buf = bytes((i * 37 + 11) % 256 for i in range(size))
    layout, places = nifti._LAYOUTS[version, order]
    values = layout.unpack_from(buf)
    for name, index, count in places:
        offset, fmt = fields[name]
        expected = struct.unpack_from(order + fmt, buf, offset)  # source: struct, per field
        got = values[index : index + count]
        assert [repr(v) for v in got] == [repr(v) for v in expected], name


def _parse_name_part_by_part(name: str) -> ParsedName | None:
    """The BIDS name rule written out part by part (the reference for the one-regex form)."""
    if not name or name.startswith(".") or "/" in name:
        return None
    stem, dot, rest = name.partition(".")
    parts = stem.split("_")
    alnum = re.compile(r"[A-Za-z0-9]+\Z")
    if not alnum.match(parts[-1]):
        return None
    entities: dict[str, str] = {}
    for part in parts[:-1]:
        key, dash, value = part.partition("-")
        if not dash or not alnum.match(key) or not alnum.match(value) or key in entities:
            return None
        entities[key] = value
    return ParsedName(entities=entities, suffix=parts[-1], extension=dot + rest)


@settings(max_examples=500, deadline=None)
@given(
    name=st.lists(
        st.sampled_from(["sub", "01", "-", "_", ".", "bold", "json", "é", "٣", " ", "\n", "a"]),
        max_size=10,
    ).map("".join)
)
def test_parse_name_matches_the_part_by_part_rule(name: str) -> None:
    assert repr(parse_name(name)) == repr(_parse_name_part_by_part(name))


@settings(max_examples=800, deadline=None)
@given(
    name=st.lists(
        st.sampled_from(["sub", "ses", "task", "-", "_", "01", "a", "bold", ".nii", ".gz",
                         ".NII", ".", "é", " ", "sub-01_", "_bold.nii.gz", "task-"]),
        max_size=10,
    ).map("".join)
)
def test_run_name_problem_fast_path_matches_the_part_by_part_rule(name: str) -> None:
    # the one pattern for a valid name gives the verdict the rule-by-rule code gives
    from slicetime.readers import entities

    fast = entities.run_name_problem.__wrapped__(name)
    real = entities._VALID_RUN
    try:
        entities._VALID_RUN = re.compile(r"(?!)")  # never matches: the general code only
        general = entities.run_name_problem.__wrapped__(name)
    finally:
        entities._VALID_RUN = real
    assert fast == general, name


# --- sidecar parsing fast paths: no float hook, no string cleaning --------------------------

def _general_parse(raw: bytes) -> tuple[Any, list[Any]]:
    """parse_sidecar_bytes with every hook and every string cleaned (the general code)."""
    real_cleaner = sidecar._Cleaner

    class AlwaysClean(real_cleaner):  # type: ignore[valid-type,misc]
        def __init__(self, *, strings: bool = True) -> None:
            super().__init__(strings=True)

    try:
        sidecar._FAST_FLOATS = False
        sidecar._Cleaner = AlwaysClean  # type: ignore[misc]
        return sidecar.parse_sidecar_bytes(raw, "x.json")
    finally:
        sidecar._FAST_FLOATS = True
        sidecar._Cleaner = real_cleaner  # type: ignore[misc]


def _dump(value: Any) -> str:
    return json.dumps(value, allow_nan=True)


number_literals = st.sampled_from([
    "1e308", "1.7976931348623157e308", "1.8e308", "1e309", "1E+400", "-1e400", "1e-400",
    "9" * 308 + ".0", "9" * 309, "1e0308", "0.5e308", "12e307", "NaN", "-Infinity", "2.5",
    '"\\ud800"', '"caf\\u00e9"', '"\\u00e9\\udfff"', "1e99",
])


@pytest.mark.parametrize("place", [
    '{"a": %s}', '{"a": [1, %s]}', '{"a": [1, "x", %s]}', '{"a": {"b": %s}}',
    '{"a": [{"b": [%s]}]}', '{"a": %s, "a": 1}', '{"a": {"b": %s, "b": 2}}',
    '{"a": "\\ud800", "b": %s}',
])
@pytest.mark.parametrize("literal", ["1e400", "1E+309", "-1e0400", "9" * 310 + ".5"])
def test_an_overflowing_literal_is_reported_wherever_it_is(place: str, literal: str) -> None:
    # the largest double is about 1.8e308 (IEEE 754 binary64; Python float), so each
    # literal overflows; RFC 8259 section 6 admits no infinite number: the first parse
    # (floats by the C scanner, no hook) must lead to the finding the hooked parse gives
    assert abs(float(literal)) == float("inf")
    raw = (place % literal).encode("utf-8")
    fast = sidecar.parse_sidecar_bytes(raw, "x.json")
    assert "sidecar/non-finite-number" in [f.code for f in fast[1]]
    assert repr(fast) == repr(_general_parse(raw))


@pytest.mark.parametrize("literal",
                         ["1e308", "1.7976931348623157e308", "-1e-400", "9" * 300 + ".5"])
def test_a_large_finite_literal_is_not_reported(literal: str) -> None:
    # 1.7976931348623157e308 is the largest finite double (IEEE 754 binary64); 1e-400
    # underflows to zero, which JSON (RFC 8259 section 6) leaves to the implementation
    data, findings = sidecar.parse_sidecar_bytes(f'{{"a": [{literal}]}}'.encode(), "x.json")
    assert findings == [] and data is not None and data["a"] == [float(literal)]


@settings(max_examples=300, deadline=None)
@given(value=json_values, literals=st.lists(number_literals, max_size=4))
def test_fast_sidecar_parse_equals_the_general_parse(value: Any, literals: list[str]) -> None:
    # the fast paths (C float parsing when no literal can overflow; strings copied as they
    # are when no \u escape and no non-finite literal occurs) give the same data and findings
    fields = ", ".join(f'"k{i}": {lit}' for i, lit in enumerate(literals))
    text = '{"v": ' + _dump(value) + (", " + fields if fields else "") + "}"
    raw = text.encode("utf-8", "surrogatepass")
    fast = sidecar.parse_sidecar_bytes(raw, "x.json")
    general = _general_parse(raw)
    assert repr(fast[0]) == repr(general[0])
    assert fast[1] == general[1]


def test_the_walks_listings_equal_the_sidecar_index_listing_its_own(tmp_path: Path) -> None:
    # the audit hands the walk's folder listings to the sidecar resolution instead of
    # listing every folder twice: what the resolution gets must be what it would list
    # itself (hidden names, folders named *.json, links, a description that is a folder)
    import os

    from slicetime.readers.dataset import _RootFinder, iter_runs
    from slicetime.readers.inheritance import SidecarIndex, SidecarStore

    root = tmp_path / "ds"
    func = root / "sub-01" / "ses-1" / "func"
    func.mkdir(parents=True)
    (root / "dataset_description.json").write_text('{"Name": "x"}')
    (root / "task-a_bold.json").write_text("{}")
    (root / ".hidden_bold.json").write_text("{}")
    (root / "sub-01" / "sub-01_task-a_bold.json").mkdir()  # a folder, not a sidecar
    (root / "sub-01" / "ses-1" / "dataset_description.json").mkdir()
    for name in ("sub-01_ses-1_task-a_bold", "sub-01_ses-1_task-b_bold"):
        (func / f"{name}.nii.gz").write_bytes(b"")
        (func / f"{name}.json").write_text("{}")
    os.symlink(func / "sub-01_ses-1_task-a_bold.json", func / "link_bold.json")
    os.symlink(func / "missing.json", func / "dangling_bold.json")
    listings: dict[str, tuple[str, ...]] = {}
    runs = list(iter_runs([root], listings=listings))
    assert runs == list(iter_runs([root]))  # the same runs, the same roots
    # every folder of the tree was listed by the walk (the two odd folders too)
    assert set(listings) == {str(root), *(str(p) for p in root.rglob("*") if p.is_dir())}
    for folder, names in listings.items():
        own = SidecarIndex(root).listing(folder)
        assert [n for n, _ in own.jsons] == list(names), folder
        walked = SidecarIndex(root, store=SidecarStore(listings=dict(listings)))
        assert walked.listing(folder).jsons == own.jsons
        # the root finder seeded by the walk answers as one that looks for itself
        assert _RootFinder().find_folder(folder) == root


def _sidecar_tree(root: Path, seed: int) -> list[Path]:
    """A dataset whose sidecars name varied entities at every level (ambiguous levels,
    suffixes that differ, the run's own sidecar, names that do not parse); the runs."""
    import random

    rng = random.Random(seed)
    tasks, accs = ("a", "b"), ("x", "y", None)
    folders = [root]
    runs: list[Path] = []
    (root / "dataset_description.json").parent.mkdir(parents=True, exist_ok=True)
    (root / "dataset_description.json").write_text('{"Name": "x"}')
    for sub in ("01", "02"):
        for ses in ("1", "2"):
            func = root / f"sub-{sub}" / f"ses-{ses}" / "func"
            func.mkdir(parents=True)
            folders += [func.parent.parent, func.parent, func]
            for task in tasks:
                for run in ("1", "2"):
                    acc = rng.choice(accs)
                    parts = [f"sub-{sub}", f"ses-{ses}", f"task-{task}",
                             *([f"acq-{acc}"] if acc else []), f"run-{run}"]
                    stem = "_".join([*parts, rng.choice(["bold", "bold", "cbv"])])
                    (func / f"{stem}.nii.gz").write_bytes(b"")
                    runs.append(func / f"{stem}.nii.gz")
                    if rng.random() < 0.7:
                        (func / f"{stem}.json").write_text(json.dumps({"EchoTime": 0.03}))
    for folder in folders:
        for _ in range(rng.randint(0, 4)):
            keys = rng.sample(["task-a", "task-b", "acq-x", "acq-y", "run-1", "run-2"],
                              rng.randint(0, 2))
            name = "_".join([*keys, rng.choice(["bold", "cbv", "sbref"])]) + ".json"
            value = rng.choice([1.5, 2.0, 2.5])
            (folder / name).write_text(json.dumps({"RepetitionTime": value, "TaskName": "t"}))
        if rng.random() < 0.2:
            (folder / "not a bids name.json").write_text("{}")
    return runs


@pytest.mark.parametrize("seed", range(6))
def test_remembered_level_choices_equal_the_choice_made_for_each_run(
    tmp_path: Path, seed: int
) -> None:
    # the inheritance principle (BIDS specification, "The Inheritance Principle"): one
    # index remembers, per folder, which sidecars applied to a run with the same suffix
    # and the same values of the entities the folder's sidecars name; the answer must be
    # the one an index that never saw another run gives
    from slicetime.readers.inheritance import SidecarIndex

    root = tmp_path / "ds"
    runs = _sidecar_tree(root, seed)
    shared = SidecarIndex(root)
    for run in runs * 2:  # the second pass is answered from what was remembered
        remembered, fresh = shared.resolve(run, root), SidecarIndex(root).resolve(run, root)
        assert remembered.chain == fresh.chain, run
        assert remembered.levels == fresh.levels
        assert remembered.metadata == fresh.metadata
        assert remembered.sources == fresh.sources
        assert [repr(f) for f in remembered.findings] == [repr(f) for f in fresh.findings]
        assert shared.applicable(run, root) == SidecarIndex(root).applicable(run, root)


entity_maps = st.dictionaries(st.sampled_from(["sub", "ses", "task", "acq", "run"]),
                              st.sampled_from(["01", "02", "a", "b", ""]) | st.none(),
                              max_size=4)


@settings(max_examples=400, deadline=None)
@given(mine=entity_maps, theirs=entity_maps, suffixes=st.sampled_from([("bold", "bold"),
                                                                     ("bold", "cbv")]))
def test_applies_to_equals_the_pair_by_pair_subset_test(
    mine: dict[str, str], theirs: dict[str, str], suffixes: tuple[str, str]
) -> None:
    # the inheritance principle (BIDS specification): a sidecar applies when its suffix
    # is the data file's and each of its entities has the same value in the data file
    sidecar_name = ParsedName(entities=mine, suffix=suffixes[0], extension=".json")
    data_name = ParsedName(entities=theirs, suffix=suffixes[1], extension=".nii.gz")
    general = suffixes[0] == suffixes[1] and all(theirs.get(k) == v for k, v in mine.items())
    assert sidecar_name.applies_to(data_name) == general


def _record_asking_first(root: Path, path: Path) -> Any:
    """``build_record`` as it was: ask ``content_missing`` before reading the header."""
    from slicetime.model import Finding
    from slicetime.readers.errors import ReadError
    from slicetime.readers.inheritance import SidecarIndex
    from slicetime.readers.nifti import read_header
    from slicetime.readers.record import assemble_record, content_missing, relative_display

    display = relative_display(path, root)
    findings: list[Finding] = []
    header = None
    missing = content_missing(path)
    if missing is None:
        try:
            header, more = read_header(path, display)
            findings.extend(more)
        except ReadError as exc:
            findings.append(exc.to_finding())
    resolution = SidecarIndex(root).resolve(path, root)
    findings.extend(resolution.findings)
    return assemble_record(display=display, abs_path=str(path), root=str(root),
                           header=header, metadata=resolution.metadata,
                           sources=resolution.sources, chain=resolution.chain,
                           findings=findings, overridden=resolution.overridden,
                           content_missing=missing)


def test_header_read_first_gives_the_record_of_asking_for_missing_content_first(
    tmp_path: Path,
) -> None:
    # build_record reads the header before it asks whether the content is absent (one
    # stat less per run): every kind of file gives the record the old order gave
    import gzip
    import os

    import nibabel as nib

    from slicetime.readers.record import build_record

    root = tmp_path / "ds"
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    img = nib.Nifti1Image(np.zeros((4, 4, 3, 5), np.int16), np.eye(4))  # source: nibabel
    img.header.set_zooms((3.0, 3.0, 3.0, 2.0))
    files = {
        "good": gzip.compress(img.to_bytes()),
        "empty": b"",
        "garbage": b"not an image at all" * 30,
        "short": gzip.compress(img.to_bytes())[:40],
    }
    for name, content in files.items():
        (func / f"sub-01_task-{name}_bold.nii.gz").write_bytes(content)
    annex = root / ".git" / "annex" / "objects" / "Xx" / "Yy" / "KEY" / "KEY"
    os.symlink(annex, func / "sub-01_task-annexed_bold.nii.gz")
    os.symlink(func / "gone", func / "sub-01_task-dangling_bold.nii.gz")
    (func / "sub-01_task-folder_bold.nii.gz").mkdir()
    (func / "sub-01_task-good_bold.json").write_text('{"SliceTiming": [0, 0.5, 1.0]}')
    for path in sorted(func.iterdir()):
        if path.name.endswith(".json"):
            continue
        new, old = build_record(root, path), _record_asking_first(root, path)
        assert repr(new) == repr(old), path.name


# --------------------------------------------------------------------------- correction
# The correction's time-axis engine (``engines.align.align_slice`` with
# ``interpolate.shift_columns``) stands in for the row engine (``interpolate.resample``,
# which detrends, mirrors and transforms each series on its own) and for
# ``scipy.interpolate.CubicSpline``; the I/O keeps its checksums while hashing in
# threads of its own.


def _slice_with_awkward_voxels(n: int, seed: int) -> np.ndarray:
    """(n volumes, 40 voxels): head-like series (level 300 to 1600, a drift, noise),
    a zero background, a non-zero constant, and series with non-finite samples."""
    rng = np.random.default_rng(seed)
    level = rng.uniform(300, 1600, 40)
    drift = np.linspace(0, 1, n)[:, None] * rng.uniform(-40, 40, 40)
    view = (level + drift + rng.normal(0, 15, (n, 40))).astype(np.float32)
    view[:, 0:5] = 0.0  # background
    view[:, 9] = 731.5  # constant
    view[n // 3, 12] = np.nan  # one bad sample
    view[:, 20] = np.nan  # nothing finite
    view[:, 21] = np.inf
    view[1:, 22] = np.nan  # one finite sample
    view[[0, n - 1], 23] = [np.inf, -np.inf]  # bad ends
    return view


class _Plan:
    """The two methods of a ResamplingPlan that ``align_slice`` uses."""

    def __init__(self, tr: float, n: int, reference: float) -> None:
        self.onsets = np.arange(n) * tr
        self.reference = reference

    def sample_times(self, group: Any) -> np.ndarray:
        return self.onsets + group.slice_time

    def target_times(self) -> np.ndarray:
        return self.onsets + self.reference


@pytest.mark.parametrize("method", ["fourier", "sinc", "cubic", "linear"])
@pytest.mark.parametrize("n", [3, 17, 49, 120, 333])
@pytest.mark.parametrize("slice_time", [0.05, 0.9, 1.95])
def test_time_axis_engine_equals_the_row_engine(method: str, n: int, slice_time: float) -> None:
    from slicetime.engines.align import align_slice
    from slicetime.engines.interpolate import ResampleStats, get_engine, resample
    from slicetime.engines.plan import ShiftGroup

    tr, reference = 2.0, 1.0
    view = _slice_with_awkward_voxels(n, seed=n)
    plan = _Plan(tr, n, reference)
    group = ShiftGroup((0,), slice_time, reference - slice_time)
    engine = get_engine(method)
    row_stats, column_stats = ResampleStats(), ResampleStats()
    expected = resample(engine, np.ascontiguousarray(view.T), plan.sample_times(group),
                        plan.target_times(), stats=row_stats).T
    got = view.copy()
    align_slice(got, plan, group, engine, stats=column_stats, rows_per_block=7)
    # the same non-finite samples, the same copies of constant series, bit for bit
    assert np.array_equal(np.isnan(got), np.isnan(expected))
    assert np.array_equal(got[~np.isfinite(got)], expected[~np.isfinite(expected)],
                          equal_nan=True)
    assert np.array_equal(got[:, [0, 1, 2, 3, 4, 9]], view[:, [0, 1, 2, 3, 4, 9]])
    assert not np.signbit(got[:, :5]).any()
    # and the same values to float32 rounding: a few units in the last place of the
    # run's largest value (float32 spacing: IEEE 754 binary32, 2**-23 relative)
    finite = np.isfinite(expected)
    scale = float(np.abs(view[np.isfinite(view)]).max())
    assert np.abs(got[finite] - expected[finite]).max() <= 8 * 2.0**-23 * scale
    assert (column_stats.constant, column_stats.partial_nonfinite,
            column_stats.all_nonfinite) == (row_stats.constant, row_stats.partial_nonfinite,
                                            row_stats.all_nonfinite)


@pytest.mark.parametrize("shift", [-0.97, -0.5, 0.31, 0.99])
def test_cubic_time_axis_engine_equals_scipy_cubic_spline(shift: float) -> None:
    # Reference library: scipy.interpolate.CubicSpline with not-a-knot ends, evaluated
    # at the targets (beyond the last sample: its end polynomial), in float64.
    from scipy.interpolate import CubicSpline

    from slicetime.engines.align import align_slice
    from slicetime.engines.interpolate import get_engine
    from slicetime.engines.plan import ShiftGroup

    n, tr = 260, 1.5
    rng = np.random.default_rng(4)
    view = (900 + np.cumsum(rng.normal(0, 4, (n, 30)), axis=0)).astype(np.float32)
    plan = _Plan(tr, n, 0.7)
    group = ShiftGroup((0,), 0.7 - shift * tr, shift * tr)
    expected = CubicSpline(plan.sample_times(group), view.astype(np.float64), axis=0,
                           bc_type="not-a-knot")(plan.target_times())
    got = view.copy()
    align_slice(got, plan, group, get_engine("cubic"))
    assert np.abs(got - expected).max() <= 8 * 2.0**-23 * float(np.abs(expected).max())


def test_the_transforms_equal_scipy_fft() -> None:
    # Reference library: scipy.fft.dct / idct / idst (type 2, unnormalised), float32
    # and float64, along axis 0; the engine may load scipy's compiled module directly.
    import scipy.fft

    from slicetime.engines.interpolate import transforms

    rng = np.random.default_rng(8)
    for dtype, tol in ((np.float32, 1e-4), (np.float64, 1e-10)):
        x = rng.normal(0, 10, (150, 7)).astype(dtype)
        for ours, theirs in ((transforms().dct, scipy.fft.dct), (transforms().idct, scipy.fft.idct),
                             (transforms().idst, scipy.fft.idst)):
            got = ours(x.copy(), True)
            assert got.dtype == dtype
            np.testing.assert_allclose(got, theirs(x, type=2, axis=0), rtol=tol, atol=tol)


@pytest.mark.parametrize("name", ["sub-01_bold.nii", "sub-01_bold.nii.gz"])
def test_checksums_hashed_in_threads_equal_hashlib(tmp_path: Path, name: str) -> None:
    # Reference: hashlib.sha256 of the whole file (FIPS 180-4), as read back from disk.
    import hashlib

    from helpers_bids import write_run

    from slicetime.readers.nifti import read_header
    from slicetime.readers.volumes import VolumeReader, VolumeWriter

    path = write_run(tmp_path, name, shape=(6, 5, 4, 30))
    header, _ = read_header(path)
    with VolumeReader(path, header, name, checksum=True) as reader:
        volumes = reader.read(30)
        read_sha = reader.sha256()
    assert read_sha == hashlib.sha256(path.read_bytes()).hexdigest()
    out = tmp_path / f"out-{name}"
    writer = VolumeWriter(out, reader.prefix, compress=name.endswith(".gz"))
    writer.write(volumes[:11])
    writer.write(volumes[11:])
    writer.close()
    assert writer.sha256() == hashlib.sha256(out.read_bytes()).hexdigest()


@pytest.mark.parametrize("name", ["sub-01_bold.nii", "sub-01_bold.nii.gz"])
def test_batches_written_from_two_arrays_in_turn_read_back_as_given(
    tmp_path: Path, name: str
) -> None:
    # Reference: nibabel reads the image back; hashlib.sha256 (FIPS 180-4) hashes the
    # file. The writer may still be writing a batch while the caller refills the other
    # array, and refills an array as soon as the next write() returns: a batch read
    # late by the writer's helper threads would hold the next values (a different
    # image and checksum).
    import hashlib

    import nibabel as nib
    from helpers_bids import write_run

    from slicetime.readers.nifti import read_header
    from slicetime.readers.volumes import VolumeReader, VolumeWriter

    values = np.arange(6 * 5 * 4 * 40, dtype=np.int16).reshape(6, 5, 4, 40)  # each voxel its own
    path = write_run(tmp_path, name, data=values)
    header, _ = read_header(path)
    with VolumeReader(path, header, name) as reader:
        volumes = reader.read(40)
    out = tmp_path / f"out-{name}"
    writer = VolumeWriter(out, reader.prefix, compress=name.endswith(".gz"))
    arrays = [np.empty((3, *volumes.shape[1:]), volumes.dtype) for _ in range(2)]
    for i, first in enumerate(range(0, 40, 3)):
        target = arrays[i % 2][: min(3, 40 - first)]
        target[...] = volumes[first : first + 3]
        writer.write(target)
    writer.close()
    for array in arrays:
        array.fill(-1)  # nothing may be read from them any more
    assert writer.sha256() == hashlib.sha256(out.read_bytes()).hexdigest()
    np.testing.assert_array_equal(np.asarray(nib.load(out).dataobj), values)


@pytest.mark.parametrize(("length", "shift"), [(4, 0.3), (7, -0.9), (60, 0.99), (160, -0.5)])
def test_spline_rows_equal_scipy_cubic_spline(length: int, shift: float) -> None:
    # Reference library: scipy.interpolate.CubicSpline (not-a-knot) of each unit sample,
    # evaluated at the shifted samples (beyond the ends: its end polynomial).
    from scipy.interpolate import CubicSpline

    from slicetime.engines.interpolate import spline_rows

    index = np.arange(length, dtype=np.float64)
    expected = CubicSpline(index, np.eye(length), axis=0, bc_type="not-a-knot")(index + shift)
    np.testing.assert_allclose(spline_rows(length, shift), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("cls", ["HeaderInfo", "RunRecord", "Resolution"])
def test_assembled_instance_equals_the_constructed_one(cls: str) -> None:
    # the dataclass constructor is the reference (Python documentation, dataclasses:
    # a frozen class's __init__ stores each field; equality compares the fields)
    import dataclasses

    from slicetime import model

    kind = getattr(model, cls, None) or getattr(inheritance, cls)
    values = {f.name: (i, f.name) for i, f in enumerate(dataclasses.fields(kind))}
    made = model.assembled(kind, dict(values))
    assert made == kind(**values)
    assert type(made) is kind
    assert {f.name: getattr(made, f.name) for f in dataclasses.fields(kind)} == values
    with pytest.raises(dataclasses.FrozenInstanceError):
        made.path = "x"
    with pytest.raises(TypeError):
        model.assembled(kind, dict(list(values.items())[:-1]))  # a field short


def test_the_walks_odd_names_are_the_entries_that_are_links_or_not_files(
        tmp_path: Path) -> None:
    # the audit opens a file of a listed folder without an lstat first unless the walk's
    # listing gave it as a link or not a regular file: that set must be what lstat
    # (POSIX: the link itself) says, for files, links to files, links out, dangling
    # links, folders and FIFOs
    import os
    import stat

    from slicetime.readers.dataset import iter_runs

    root = tmp_path / "ds"
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    (root / "dataset_description.json").write_text('{"Name": "x"}')
    (root / "task-a_bold.json").write_text("{}")
    for name in ("sub-01_task-a_bold", "sub-01_task-b_bold"):
        (func / f"{name}.nii.gz").write_bytes(b"")
        (func / f"{name}.json").write_text("{}")
    (tmp_path / "out.json").write_text("{}")
    os.symlink(func / "sub-01_task-a_bold.json", func / "sub-01_task-c_bold.json")
    os.symlink(tmp_path / "out.json", func / "sub-01_task-d_bold.json")
    os.symlink(func / "missing.json", func / "sub-01_task-e_bold.json")
    (func / "sub-01_task-f_bold.json").mkdir()
    if hasattr(os, "mkfifo"):
        os.mkfifo(func / "sub-01_task-g_bold.json")
    listings: dict[str, tuple[str, ...]] = {}
    not_plain: dict[str, frozenset[str]] = {}
    list(iter_runs([root], listings=listings, not_plain=not_plain))
    assert set(not_plain) == set(listings)
    for folder, names in not_plain.items():
        expected = {n for n in os.listdir(folder)
                    if not stat.S_ISREG(os.lstat(os.path.join(folder, n)).st_mode)}
        assert names == expected
    func_odd = not_plain[str(func)]
    assert "sub-01_task-a_bold.json" not in func_odd and "sub-01_task-c_bold.json" in func_odd


def _kernel_at_least(major: int, minor: int) -> bool:
    release = os.uname().release.split("-")[0].split(".")
    try:
        return (int(release[0]), int(release[1])) >= (major, minor)
    except (IndexError, ValueError):
        return False


@pytest.mark.skipif(not sys.platform.startswith("linux") or not _kernel_at_least(5, 14),
                    reason="MADV_POPULATE_WRITE needs Linux 5.14")
def test_a_fresh_buffer_is_faulted_in_by_its_helper_and_holds_what_is_written() -> None:
    # Reference: madvise(2), MADV_POPULATE_WRITE (Linux 5.14) "populate (prefault) page
    # tables writable, faulting-in all pages in the range"; proc(5), /proc/self/statm,
    # second field: resident pages. The helper, not the caller, faults the pages in.
    from slicetime.readers.scratch import PREFAULT_BYTES, fresh_float32

    def resident() -> int:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")

    shape = (3, PREFAULT_BYTES // 4096, 1024)  # 3 × the threshold
    before = resident()
    array, helper = fresh_float32(shape)
    assert helper is not None and array.shape == shape and array.dtype == np.float32
    helper.join()
    assert resident() - before >= 0.9 * array.nbytes  # faulted in, nothing written yet
    values = np.arange(array.size, dtype=np.float32).reshape(shape)
    array[...] = values
    assert np.array_equal(array, values)
    small, none = fresh_float32((4, 5))
    assert none is None and small.shape == (4, 5) and small.dtype == np.float32


@settings(max_examples=300, deadline=None)
@given(name=st.lists(st.sampled_from(["a", ".", "nii", "NII", "gz", "Gz", "İ", "x_bold"]),
                     max_size=6).map("".join))
def test_image_name_test_equals_the_any_extension_form(name: str) -> None:
    # the form the walk used before: some NIfTI extension ends the lower-cased name and
    # something stands before it (common practice (no source): .nii and .nii.gz, any case)
    from slicetime.readers.dataset import IMAGE_EXTENSIONS, is_image_name

    lower = name.lower()
    expected = lower.endswith(IMAGE_EXTENSIONS) and any(
        lower.endswith(ext) and len(name) > len(ext) for ext in IMAGE_EXTENSIONS)
    assert is_image_name(name) == expected


def test_headers_alike_byte_for_byte_are_decoded_once_and_read_as_when_decoded_alone(
        tmp_path: Path) -> None:
    # nibabel writes the files (the reference reader); a header met before (the decode
    # remembered by its bytes) reads as one decoded afresh, its size on disk its own,
    # and a broken header is decoded again for each file, so its error names that file
    import gzip as gz

    import nibabel as nib

    from slicetime.readers.errors import ReadError

    img = nib.Nifti1Image(np.zeros((4, 4, 3, 5), np.int16), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((2.0, 2.0, 3.0, 1.5))
    raw = img.to_bytes()
    paths = []
    for name, data in (("a.nii.gz", gz.compress(raw)), ("b.nii.gz", gz.compress(raw, 1)),
                       ("c.nii", raw)):
        paths.append(tmp_path / name)
        paths[-1].write_bytes(data)
    nifti._DECODED.clear()
    fresh = []
    for path in paths:
        fresh.append(nifti.read_header(path)[0])
        nifti._DECODED.clear()
    remembered = [nifti.read_header(path)[0] for path in paths]
    assert remembered == fresh
    assert [h.file_size for h in remembered] == [p.stat().st_size for p in paths]
    assert remembered[0].pixdim == tuple(float(z) for z in img.header.get_zooms())
    broken = bytearray(raw)
    broken[40:42] = (9).to_bytes(2, "little")  # dim[0] = 9: NIfTI allows 1 to 7
    for name in ("x.nii", "y.nii"):
        (tmp_path / name).write_bytes(bytes(broken))
        with pytest.raises(ReadError) as caught:
            nifti.read_header(tmp_path / name, name)
        assert caught.value.message.startswith(f"{name}: dim[0] is 9")


@settings(max_examples=500, deadline=None)
@given(path=st.lists(st.sampled_from(["/", "a", ".", "..", "b.c", "//", ".h"]), max_size=8)
       .map("".join))
def test_absolute_paths_equal_abspath(path: str) -> None:
    # the reference is os.path.abspath (Python documentation, os.path)
    if path:
        assert inheritance._absolute(path) == os.path.abspath(path)
        assert inheritance._absolute(Path(path)) == os.path.abspath(Path(path))
