"""The parts the correction pipeline is composed of (issue 14): the process-wide
allocator settings a run uses are restored after it, and the planning of
outputs names every run that would collide."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import click
import nibabel as nib
import numpy as np
import pytest

from slicetime.pipelines import memory
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.correct import CorrectOptions, correct_run
from slicetime.pipelines.outputs import clashing_runs, output_path
from slicetime.readers.entities import sidecar_name, sidecar_path
from slicetime.schemes.generate import Protocol, slice_timing


class _FakeLibc:
    """Records mallopt calls; glibc's mallopt returns 1 on success."""

    def __init__(self) -> None:
        self.calls: list[tuple[int, int]] = []
        self.trims = 0

    def mallopt(self, param: int, value: int) -> int:
        self.calls.append((param, value))
        return 1

    def malloc_trim(self, pad: int) -> int:
        self.trims += 1
        return 1

    def current(self) -> dict[int, int]:
        return dict(self.calls)


@pytest.fixture
def libc(monkeypatch: pytest.MonkeyPatch) -> _FakeLibc:
    fake = _FakeLibc()
    monkeypatch.setattr(memory, "_libc", lambda: fake)
    monkeypatch.setattr(memory, "_changed", {})
    return fake


def test_allocator_settings_are_restored_after_a_run(libc: _FakeLibc) -> None:
    with memory.allocator_tuning(keep_freed=True):
        # inside: freed blocks up to 64 MiB are kept (mallopt(3): M_MMAP_THRESHOLD -3,
        # M_TRIM_THRESHOLD -1)
        assert libc.current() == {-3: 64 << 20, -1: 128 << 20}
        assert memory.allocator_settings() == memory.KEEP_FREED
    # after: glibc's documented defaults again (mallopt(3): 128 KiB both), nothing
    # left changed for the next task of a long-lived worker
    assert libc.current() == {-3: 128 << 10, -1: 128 << 10}
    assert memory.allocator_settings() == {}


def test_allocator_settings_are_restored_when_the_run_fails(libc: _FakeLibc) -> None:
    with pytest.raises(RuntimeError), memory.allocator_tuning(keep_freed=True):
        raise RuntimeError("the engine failed")
    assert libc.current() == {-3: 128 << 10, -1: 128 << 10}
    assert memory.allocator_settings() == {}


def test_a_capped_run_changes_no_setting_and_nested_runs_restore_their_own(
    libc: _FakeLibc,
) -> None:
    with memory.allocator_tuning(keep_freed=False):
        assert libc.calls == []
    with memory.allocator_tuning(keep_freed=True):
        with memory.allocator_tuning(keep_freed=True):
            pass
        # the inner block changed nothing, so it restores nothing
        assert libc.current() == {-3: 64 << 20, -1: 128 << 20}
    assert libc.current() == {-3: 128 << 10, -1: 128 << 10}


def _dataset(root: Path) -> Path:
    root.mkdir()
    (root / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.10.0"}')
    times = slice_timing(Protocol(n_slices=6, order="interleaved", repetition_time=2.0))
    func = root / "sub-01" / "func"
    func.mkdir(parents=True)
    data = np.random.default_rng(3).normal(100, 5, (4, 4, 6, 12)).astype(np.float32)
    img = nib.Nifti1Image(data, np.eye(4))
    img.header.set_zooms((2.0, 2.0, 2.0, 2.0))
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, func / "sub-01_task-x_bold.nii.gz")
    (func / "sub-01_task-x_bold.json").write_text(
        json.dumps({"RepetitionTime": 2.0, "TaskName": "x", "SliceTiming": times}))
    return root


@pytest.mark.parametrize("cap", [None, 8 << 20])
def test_correct_run_leaves_the_allocator_as_it_found_it(
    tmp_path: Path, libc: _FakeLibc, cap: Any
) -> None:
    root = _dataset(tmp_path / "ds")
    run = audit_paths([root]).runs[0]
    outcome = correct_run(run, CorrectOptions(out=tmp_path / "out", max_memory=cap))
    assert outcome.status == "corrected", outcome.reason
    assert memory.allocator_settings() == {}
    # the buffer fits in memory either way: tuned during the run, then back to the
    # defaults (a run whose buffer goes to a scratch file is never tuned: above)
    assert libc.calls and libc.current() == {-3: 128 << 10, -1: 128 << 10}


def test_sidecar_names_have_one_rule() -> None:
    # BIDS: a data file's own sidecar shares its stem (inheritance principle)
    assert sidecar_name("sub-01_task-x_bold.nii.gz") == "sub-01_task-x_bold.json"
    assert sidecar_name("sub-01_task-x_bold.NII") == "sub-01_task-x_bold.json"
    assert sidecar_path("sub-01/func/sub-01_bold.nii") == "sub-01/func/sub-01_bold.json"
    assert sidecar_path("sub-01_bold.nii.gz") == "sub-01_bold.json"


def test_clashing_outputs_are_named_together(tmp_path: Path) -> None:
    root = _dataset(tmp_path / "ds")
    func = root / "sub-01" / "func"
    # a desc-only twin and a .nii twin map onto the same output sidecar
    twin = func / "sub-01_task-x_desc-a_bold.nii.gz"
    twin.write_bytes((func / "sub-01_task-x_bold.nii.gz").read_bytes())
    records = [r.record for r in audit_paths([root]).runs]
    found = clashing_runs(records, "timealigned")
    assert len(found) == 2
    for finding in found.values():
        assert finding.code == "correct/output-clash"
        assert finding.evidence["output"] == "sub-01/func/sub-01_task-x_desc-timealigned_bold.json"
    assert output_path("../x_bold.nii.gz", "d") is None


def test_the_method_choice_comes_from_the_engine_registry(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Adding an engine is one entry in ENGINES (plus its test): --method follows."""
    import dataclasses

    from slicetime.engines import interpolate
    from slicetime.interfaces.commands.correct import _engine_names
    from slicetime.interfaces.commands.shared import RegistryChoice

    extra = dataclasses.replace(interpolate.ENGINES["linear"], name="linear2")
    monkeypatch.setitem(interpolate.ENGINES, "linear2", extra)
    choice = RegistryChoice(_engine_names)
    assert "linear2" in choice.choices
    assert choice.convert("linear2", None, None) == "linear2"
    with pytest.raises(click.BadParameter):
        choice.convert("nope", None, None)


def test_the_command_line_starts_without_the_engines() -> None:
    """The lazy choice keeps numpy and the engines out of start-up (an audit never
    needs them)."""
    code = ("import sys; from slicetime.interfaces import cli; "
            "cli.cli.get_command(None, 'correct'); "
            "print(sorted(m for m in ('numpy', 'slicetime.engines.interpolate') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "[]"
