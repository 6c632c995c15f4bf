"""slicetime fix: each repair, where it is written, safety, plans, undo."""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path
from typing import Any

import nibabel as nib
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.fix import JsonStyle
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import (
    symlink,
    tree_hashes,
    write_description,
    write_run,
    write_sidecar,
)

TR = 2.0
SHAPE = (4, 4, 10, 5)


def interleaved(n: int = 10, **kw: Any) -> list[float]:
    return list(slice_timing(Protocol(n_slices=n, order="interleaved", repetition_time=TR, **kw)))


def run_path(sub: str, task: str = "hum") -> str:
    return f"sub-{sub}/func/sub-{sub}_task-{task}_bold.nii.gz"


def sidecar_of(rel: str) -> str:
    return rel.replace(".nii.gz", ".json")


def fix(*args: object) -> Any:
    return CliRunner().invoke(cli, ["fix", *(str(a) for a in args)], catch_exceptions=False)




def codes_of(root: Path, rel: str) -> set[str]:
    result = audit_paths([root])
    return {f.code for r in result.runs if r.record.path == rel for f in r.findings}


def journal_in(output: str) -> Path:
    line = next(x for x in output.splitlines() if x.startswith("backups and journal: "))
    return Path(line.split(": ", 1)[1].split("  (undo")[0])


@pytest.fixture
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    return root


# --------------------------------------------------------------- the repairs


def test_milliseconds_become_seconds_in_the_shared_file(ds: Path) -> None:
    # BIDS: SliceTiming is in seconds; a converter's milliseconds are /1000
    seconds = interleaved()
    write_sidecar(ds, "task-hum_bold.json",
                  {"TaskName": "hum", "RepetitionTime": TR,
                   "SliceTiming": [t * 1000 for t in seconds]})
    for sub in ("01", "02", "03"):
        write_run(ds, run_path(sub), shape=SHAPE, tr=TR)
    assert "timing/units-ms" in codes_of(ds, run_path("01"))
    before = tree_hashes(ds)
    dry = fix(ds)
    assert dry.exit_code == 1  # changes are planned
    assert "task-hum_bold.json  (3 runs)" in dry.output
    assert tree_hashes(ds) == before  # a dry run changes no byte
    applied = fix(ds, "--apply")
    assert applied.exit_code == 0, applied.output
    assert "written   task-hum_bold.json" in applied.output
    assert "re-audit: the repaired runs are clean" in applied.output
    content = json.loads((ds / "task-hum_bold.json").read_text())
    assert content["SliceTiming"] == pytest.approx(seconds, abs=1e-6)
    # no per-run files were created: the value is resolved once, at the top
    assert not (ds / sidecar_of(run_path("01"))).exists()
    for sub in ("01", "02", "03"):
        assert "timing/units-ms" not in codes_of(ds, run_path(sub))
    again = fix(ds, "--apply")  # idempotent
    assert again.exit_code == 0 and "nothing to fix" in again.output


def mb_times(multiband: int, n: int = 12) -> list[float]:
    return list(slice_timing(Protocol(n_slices=n, order="interleaved", multiband=multiband,
                                      repetition_time=TR)))


def test_shared_file_serving_a_run_that_needs_no_change_gets_an_override(ds: Path) -> None:
    # the top-level times (groups of 2) lack their factor for sub-01; sub-02 states its
    # own: the fix must not write into the shared file, so sub-01 gets its own value
    shared = {"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": mb_times(2)}
    write_sidecar(ds, "task-hum_bold.json", shared)
    write_run(ds, run_path("01"), shape=(4, 4, 12, 5), tr=TR)
    write_run(ds, run_path("02"), shape=(4, 4, 12, 5), tr=TR,
              sidecar={"MultibandAccelerationFactor": 2})
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    assert "writing per-run overrides" in result.output
    assert json.loads((ds / "task-hum_bold.json").read_text()) == shared
    own = json.loads((ds / sidecar_of(run_path("01"))).read_text())
    assert own["MultibandAccelerationFactor"] == 2
    assert "scheme/multiband-undeclared" not in codes_of(ds, run_path("01"))
    assert json.loads((ds / sidecar_of(run_path("02"))).read_text()) == {
        "MultibandAccelerationFactor": 2}


def test_per_run_writes_overrides_and_leaves_the_shared_file(ds: Path) -> None:
    shared = {"TaskName": "hum", "RepetitionTime": TR,
              "SliceTiming": [t * 1000 for t in interleaved()]}
    write_sidecar(ds, "task-hum_bold.json", shared)
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR)
    result = fix(ds, "--apply", "--per-run")
    assert result.exit_code == 0, result.output
    assert json.loads((ds / "task-hum_bold.json").read_text()) == shared
    own = json.loads((ds / sidecar_of(run_path("01"))).read_text())
    assert own["SliceTiming"] == pytest.approx(interleaved(), abs=1e-6)
    assert "timing/units-ms" not in codes_of(ds, run_path("01"))


@pytest.mark.parametrize("code", [1, 3, 4, 5])
def test_missing_timing_rebuilt_from_the_header(ds: Path, code: int) -> None:
    # nibabel's get_slice_times is the reference for what the header encodes
    rel = run_path("01")
    path = write_run(ds, rel, shape=SHAPE, tr=TR, slice_code=code, slice_duration=0.2,
                     sidecar={"TaskName": "hum", "RepetitionTime": TR})
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    written = json.loads((ds / sidecar_of(rel)).read_text())
    expected = nib.load(path).header.get_slice_times()
    assert written["SliceTiming"] == pytest.approx(expected, abs=1e-6)
    assert "SliceEncodingDirection" not in written  # the header's slice axis is k
    assert {"timing/from-header", "timing/missing"}.isdisjoint(codes_of(ds, rel))


def test_header_rebuild_along_j_writes_the_direction(ds: Path) -> None:
    rel = run_path("01")
    path = write_run(ds, rel, shape=(4, 10, 4, 5), tr=TR, slice_code=1, slice_duration=0.2,
                     dim_info=(None, None, 1), sidecar={"TaskName": "hum",
                                                        "RepetitionTime": TR})
    assert fix(ds, "--apply").exit_code == 0
    written = json.loads((ds / sidecar_of(rel)).read_text())
    assert written["SliceEncodingDirection"] == "j"
    # nibabel as the reference
    assert written["SliceTiming"] == pytest.approx(nib.load(path).header.get_slice_times())


def test_missing_timing_from_the_lab_policy(ds: Path) -> None:
    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR, sidecar={"TaskName": "hum", "RepetitionTime": TR})
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n\n[[protocols]]\nmatch = { task = "hum" }\nrepetition_time = 2.0\n'
        'slices = 10\nscheme = "interleaved ascending from 1"\n'
    )
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    written = json.loads((ds / sidecar_of(rel)).read_text())
    # common practice (no source): odd-first interleaving of 10 slices over 2 s puts
    # slice 1 at 0 s and slice 0 half a TR later
    assert written["SliceTiming"] == pytest.approx(interleaved(start=1), abs=1e-6)
    assert written["SliceTiming"][1] == 0.0 and written["SliceTiming"][0] == pytest.approx(1.0)


def test_a_family_in_the_policy_does_not_settle_the_order(ds: Path) -> None:
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR})
    (ds / "slicetime-policy.toml").write_text(
        'version = 1\n\n[[protocols]]\nmatch = { task = "hum" }\nrepetition_time = 2.0\n'
        'slices = 10\nscheme = "interleaved"\n'
    )
    result = fix(ds)
    # issue 23: a fixable finding fix cannot settle is listed as not planned, exit 1
    assert result.exit_code == 1 and "0 files to change" in result.output
    assert "timing/missing not planned" in result.output


def test_missing_timing_from_agreeing_runs(ds: Path) -> None:
    for sub in ("01", "02", "03"):
        write_run(ds, run_path(sub), shape=SHAPE, tr=TR,
                  sidecar={"TaskName": "hum", "RepetitionTime": TR,
                           "SliceTiming": interleaved()})
    write_run(ds, run_path("04"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR})
    result = fix(ds / "sub-04", "--apply")  # only the run that needs it
    assert result.exit_code == 0, result.output
    written = json.loads((ds / sidecar_of(run_path("04"))).read_text())
    assert written["SliceTiming"] == interleaved()
    assert "timing/missing" not in codes_of(ds, run_path("04"))


def test_disagreeing_runs_settle_nothing(ds: Path) -> None:
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": interleaved()})
    sequential = [i * 0.2 for i in range(10)]
    write_run(ds, run_path("02"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": sequential})
    write_run(ds, run_path("03"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR})
    result = fix(ds)
    assert result.exit_code == 1  # issue 23: not planned is not success
    assert "timing/missing not planned" in result.output


def test_a_list_reversed_against_the_header_is_left_for_a_person(ds: Path) -> None:
    # NIfTI: slice_code 1 is sequential increasing along the slice axis (nibabel reads
    # the header's times below), so a decreasing SliceTiming along +k contradicts it;
    # which of the two is right only the acquisition can tell: fix takes no side
    rel = run_path("01")
    descending = [round((9 - i) * 0.2, 4) for i in range(10)]
    path = write_run(ds, rel, shape=SHAPE, tr=TR, slice_code=1, slice_duration=0.2,
                     sidecar={"TaskName": "hum", "RepetitionTime": TR,
                              "SliceTiming": descending})
    assert list(nib.load(path).header.get_slice_times()) == pytest.approx(descending[::-1])
    assert "header/slice-code-mismatch" in codes_of(ds, rel)
    before = (ds / sidecar_of(rel)).read_bytes()
    result = fix(ds, "--apply")
    assert result.exit_code == 1  # a fixable finding not planned
    assert (f"{rel}: header/slice-code-mismatch not planned: the timing is in doubt "
            "(header/slice-code-mismatch): a person must decide which source is right"
            in result.output)
    assert (ds / sidecar_of(rel)).read_bytes() == before
    assert "header/slice-code-mismatch" in codes_of(ds, rel)


def test_multiband_factor_from_the_groups(ds: Path) -> None:
    # common practice (no source): multiband factor m repeats each time m times
    sidecar: dict[str, Any] = {"TaskName": "hum", "RepetitionTime": TR,
                               "SliceTiming": mb_times(3)}
    rel = run_path("01")
    write_run(ds, rel, shape=(4, 4, 12, 5), tr=TR, sidecar=sidecar)
    result = fix(ds, "--apply")
    assert result.exit_code == 0, result.output
    written = json.loads((ds / sidecar_of(rel)).read_text())
    assert written["MultibandAccelerationFactor"] == 3
    assert "scheme/multiband-undeclared" not in codes_of(ds, rel)


def test_a_declared_factor_the_times_contradict_is_left_for_a_person(ds: Path) -> None:
    # groups of 3 in the times against a declared factor of 2: one of the two is wrong
    # and only the acquisition can tell which, so fix takes no side
    sidecar = {"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": mb_times(3),
               "MultibandAccelerationFactor": 2}
    rel = run_path("01")
    write_run(ds, rel, shape=(4, 4, 12, 5), tr=TR, sidecar=sidecar)
    result = fix(ds, "--apply")
    assert result.exit_code == 1, result.output
    assert "the timing is in doubt (scheme/multiband-mismatch)" in result.output
    assert json.loads((ds / sidecar_of(rel)).read_text())["MultibandAccelerationFactor"] == 2


# -------------------------------------------------------------- file safety


def test_style_and_key_order_are_kept(ds: Path) -> None:
    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR)
    text = ('{\n    "TaskName": "hum",\n    "SliceTiming": [' +
            ", ".join(str(t * 1000) for t in interleaved()) +
            '],\n    "RepetitionTime": 2.0,\n    "Note": "caf\\u00e9"\n}')  # no final newline
    (ds / sidecar_of(rel)).write_text(text)
    assert fix(ds, "--apply").exit_code == 0
    after = (ds / sidecar_of(rel)).read_text()
    assert list(json.loads(after)) == ["TaskName", "SliceTiming", "RepetitionTime", "Note"]
    assert after.startswith('{\n    "TaskName"') and not after.endswith("\n")
    assert "\\u00e9" in after  # escaped before, escaped after


def test_json_style_detection() -> None:
    assert JsonStyle.of('{\n\t"a": 1\n}\n').indent == "\t"
    assert JsonStyle.of('{"a":1}').separators == (",", ":")
    compact = JsonStyle.of('{"a": 1, "b": 2}')
    assert compact.indent is None and compact.separators == (", ", ": ")


def test_undo_restores_every_byte(ds: Path) -> None:
    write_sidecar(ds, "task-hum_bold.json",
                  {"TaskName": "hum", "RepetitionTime": TR,
                   "SliceTiming": [t * 1000 for t in interleaved()]})
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR)
    write_run(ds, run_path("02"), shape=(4, 4, 12, 5), tr=TR,
              sidecar={"SliceTiming": list(slice_timing(Protocol(
                  n_slices=12, order="interleaved", multiband=3, repetition_time=TR)))})
    before = tree_hashes(ds)
    applied = fix(ds, "--apply", "--backup-dir", ds.parent / "backups")
    assert applied.exit_code == 0, applied.output
    assert tree_hashes(ds) != before
    journal = journal_in(applied.output)
    assert journal.parent == ds.parent / "backups"
    undone = fix("--undo", journal)
    assert undone.exit_code == 0, undone.output
    assert tree_hashes(ds) == before


def test_undo_reads_and_hashes_each_backup_once(
        ds: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the backup checked against the journal's SHA-256 is the bytes written back: one
    # read per file (it was read and hashed twice: once to check, once to restore)
    import hashlib

    from slicetime.pipelines import journal as journal_module

    write_run(ds, run_path("01"), shape=SHAPE, tr=TR, sidecar={
        "RepetitionTime": TR, "SliceTiming": [t * 1000 for t in interleaved()]})
    own = ds / sidecar_of(run_path("01"))
    original = own.read_bytes()
    applied = fix(ds, "--apply", "--backup-dir", ds.parent / "backups")
    assert applied.exit_code == 0, applied.output
    hashed: list[bytes] = []
    real = journal_module.sha256_of

    def counting(data: bytes) -> str:
        hashed.append(bytes(data))
        return real(data)

    monkeypatch.setattr(journal_module, "sha256_of", counting)
    undone = fix("--undo", journal_in(applied.output))
    assert undone.exit_code == 0, undone.output
    assert own.read_bytes() == original
    assert hashed.count(original) == 1  # the backup: read and hashed once
    assert real(original) == hashlib.sha256(original).hexdigest()  # hashlib: SHA-256


def test_default_backups_live_beside_the_dataset(ds: Path) -> None:
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "SliceTiming": [t * 1000 for t in interleaved()]})
    applied = fix(ds, "--apply")
    journal = journal_in(applied.output)
    assert journal.parent.parent == ds.parent / "ds-slicetime-backups"
    assert not any("backups" in p.name for p in ds.rglob("*"))


def test_an_annexed_sidecar_is_refused_unless_links_may_be_replaced(ds: Path) -> None:
    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR)
    store = ds / ".git" / "annex" / "objects" / "Xy" / "KEY" / "KEY"
    store.parent.mkdir(parents=True)
    store.write_text(json.dumps({"TaskName": "hum", "RepetitionTime": TR,
                                 "SliceTiming": [t * 1000 for t in interleaved()]}))
    link = symlink(ds / sidecar_of(rel), os.path.relpath(store, (ds / rel).parent))
    object_bytes = store.read_bytes()
    refused = fix(ds, "--apply")
    assert refused.exit_code == 1
    assert "is an annexed file" in refused.output and "--replace-links" in refused.output
    assert store.read_bytes() == object_bytes and link.is_symlink()
    replaced = fix(ds, "--apply", "--replace-links")
    assert replaced.exit_code == 0, replaced.output
    assert not link.is_symlink()
    assert store.read_bytes() == object_bytes  # the annex object is never written
    assert json.loads(link.read_text())["SliceTiming"][1] < 2
    undone = fix("--undo", journal_in(replaced.output))
    assert undone.exit_code == 0 and link.is_symlink()


def test_a_read_only_sidecar_is_refused(ds: Path) -> None:
    # refused by its mode bits, so also when the tests run as root (who could write it)
    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "SliceTiming": [t * 1000 for t in interleaved()]})
    own = ds / sidecar_of(rel)
    own.chmod(stat.S_IRUSR)
    try:
        result = fix(ds, "--apply")
        assert result.exit_code == 1 and "is read-only" in result.output
    finally:
        own.chmod(stat.S_IRUSR | stat.S_IWUSR)


def test_read_only_check_without_root(ds: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the same refusal, made visible when tests run as root: os.access says no
    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "SliceTiming": [t * 1000 for t in interleaved()]})
    own = str(ds / sidecar_of(rel))
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode: False if str(p) == own and
                        mode == os.W_OK else real_access(p, mode))
    before = tree_hashes(ds)
    result = fix(ds, "--apply")
    assert result.exit_code == 1
    assert f"{sidecar_of(rel)}: is read-only" in result.output
    assert tree_hashes(ds) == before


def test_saved_plan_refuses_files_changed_since(ds: Path, tmp_path: Path) -> None:
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "SliceTiming": [t * 1000 for t in interleaved()]})
    write_run(ds, run_path("02"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "SliceTiming": [t * 1000 for t in interleaved()]})
    plan = tmp_path / "plan.json"
    saved = fix(ds, "--plan", plan)
    assert saved.exit_code == 1 and plan.exists()
    # someone edits one of the files after the plan was reviewed
    edited = ds / sidecar_of(run_path("02"))
    edited.write_text(edited.read_text().replace('"hum"', '"hum2"'))
    edited_bytes = edited.read_bytes()
    applied = fix("--apply", "--plan", plan)
    assert applied.exit_code == 1
    assert f"{sidecar_of(run_path('02'))}: changed since the plan was made" in applied.output
    assert edited.read_bytes() == edited_bytes
    # a plan applies all or nothing: the unchanged file is not written either
    assert json.loads((ds / sidecar_of(run_path("01"))).read_text())["SliceTiming"][1] > 2
    assert "nothing was written" in applied.output


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ([], "give the dataset or runs to repair"),
        (["--undo", "nowhere.json"], "cannot read the journal"),
    ],
)
def test_usage_errors(args: list[str], message: str) -> None:
    result = CliRunner().invoke(cli, ["fix", *args])
    assert result.exit_code == 2
    assert message in result.output


def test_nothing_to_fix_exits_zero(ds: Path) -> None:
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": interleaved()})
    result = fix(ds)
    assert result.exit_code == 0 and "nothing to fix" in result.output


# ------------------------------------------------------------ layout moves


def test_consolidate_and_spread_are_inverse(ds: Path) -> None:
    # BIDS inheritance principle: a value in task-hum_bold.json at the root applies to
    # every hum run that does not override it, so the resolved metadata is unchanged
    for sub in ("01", "02", "03"):
        write_run(ds, run_path(sub), shape=SHAPE, tr=TR,
                  sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": interleaved()})
    resolved = {r.record.path: dict(r.record.metadata) for r in audit_paths([ds]).runs}
    original = tree_hashes(ds)
    result = fix(ds, "--apply", "--consolidate", "SliceTiming", "--consolidate", "RepetitionTime")
    assert result.exit_code == 0, result.output
    top = json.loads((ds / "task-hum_bold.json").read_text())
    assert top == {"SliceTiming": interleaved(), "RepetitionTime": TR}
    for sub in ("01", "02", "03"):
        assert json.loads((ds / sidecar_of(run_path(sub))).read_text()) == {"TaskName": "hum"}
    after = {r.record.path: dict(r.record.metadata) for r in audit_paths([ds]).runs}
    assert after == resolved
    spread = fix(ds, "--apply", "--spread", "SliceTiming", "--spread", "RepetitionTime")
    assert spread.exit_code == 0, spread.output
    assert {r.record.path: dict(r.record.metadata) for r in audit_paths([ds]).runs} == resolved
    assert json.loads((ds / "task-hum_bold.json").read_text()) == {}
    assert tree_hashes(ds) != original  # key order may differ; the meaning does not


@pytest.mark.parametrize("option", ["--consolidate", "--spread"])
def test_a_layout_move_reads_each_file_it_edits_once(
        ds: Path, monkeypatch: pytest.MonkeyPatch, option: str) -> None:
    # the receiving file is read to see that it can be edited, and that text is the
    # one edited: one read per file (it was read twice for a move)
    from slicetime.pipelines import fix as fixing

    for sub in ("01", "02", "03"):
        write_run(ds, run_path(sub), shape=SHAPE, tr=TR, sidecar={
            "TaskName": "hum", "RepetitionTime": TR, "SliceTiming": interleaved()})
    if option == "--spread":
        assert fix(ds, "--apply", "--consolidate", "SliceTiming").exit_code == 0
    reads: list[str] = []
    real = fixing._load_for_edit

    def counting(path: Path, root: str) -> Any:
        reads.append(str(path))
        return real(path, root)

    monkeypatch.setattr(fixing, "_load_for_edit", counting)
    result = fix(ds, option, "SliceTiming")
    assert result.exit_code == 1 and "4 files to change" in result.output, result.output
    # the three own sidecars, and the top-level one when it exists (spread: it does)
    assert len(reads) == len(set(reads)) == (4 if option == "--spread" else 3)


def test_consolidate_refuses_differing_values(ds: Path) -> None:
    write_run(ds, run_path("01"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR, "SliceTiming": interleaved()})
    write_run(ds, run_path("02"), shape=SHAPE, tr=TR,
              sidecar={"TaskName": "hum", "RepetitionTime": TR,
                       "SliceTiming": [i * 0.2 for i in range(10)]})
    before = tree_hashes(ds)
    result = fix(ds, "--apply", "--consolidate", "SliceTiming")
    assert result.exit_code == 0
    assert "SliceTiming not consolidated" in result.output
    assert tree_hashes(ds) == before


def test_the_reaudit_after_apply_uses_the_commands_policy_and_source_map(
    ds: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
) -> None:
    # the re-audit that follows --apply must judge the runs as the plan did: with the
    # --policy given (a code it ignores must not come back as "still") and the
    # --source-map given (a series only the map names)
    from slicetime.pipelines import fix as fixing

    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": [t * 1000 for t in interleaved()]})
    policy = tmp_path / "lab.toml"
    policy.write_text("version = 1\n", encoding="utf-8")
    mapping = tmp_path / "map.tsv"
    mapping.write_text(f"run\tseries\n{rel}\t{tmp_path / 'nowhere'}\n", encoding="utf-8")
    seen: list[dict[str, Any]] = []
    real = fixing.audit_paths

    def spy(paths: Any, **kwargs: Any) -> Any:
        seen.append(kwargs)
        return real(paths, **kwargs)

    monkeypatch.setattr(fixing, "audit_paths", spy)
    result = fix(ds, "--apply", "--policy", policy, "--source-map", mapping,
                 "--backup-dir", tmp_path / "b")
    assert "written" in result.output, result.output
    assert len(seen) == 2  # the plan's audit, then the re-audit
    planned, again = seen
    assert again["policy_file"] == planned["policy_file"] == policy
    assert again["source"] == planned["source"]
    assert again["source"].mapping  # the map was read and passed on


def test_fix_of_one_run_leaves_the_other_runs_findings_out_of_its_summary(
        tmp_path: Path) -> None:
    # BIDS: SliceTiming in seconds (the ms list is the fixable finding); the other
    # run's negative time (timing/negative, not a sidecar repair) belongs to a run the
    # command was not asked about, so its plan does not count it
    root = tmp_path / "ds"
    write_description(root)
    given = run_path("01")
    write_run(root, given, SHAPE, tr=TR, sidecar={
        "RepetitionTime": TR, "SliceTiming": [t * 1000 for t in interleaved()]})
    other = interleaved()
    other[3] = -0.5
    write_run(root, run_path("02"), SHAPE, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": other})
    assert "timing/negative" in codes_of(root, run_path("02"))
    one = fix(root / given)
    assert one.exit_code == 1  # changes planned in a dry run
    assert "timing/units-ms" in one.output and "timing/negative" not in one.output
    everything = fix(root)
    assert "timing/negative ×1" in everything.output  # the whole dataset: counted


def test_milliseconds_judged_against_the_headers_tr_say_why_they_are_not_planned(
        tmp_path: Path) -> None:
    # BIDS: RepetitionTime is a sidecar field; without it the only TR is the NIfTI
    # header's pixdim[4], whose unit (xyzt_units) may be wrong, so the division by
    # 1000 is not planned, and the reason names that TR and what to do
    root = tmp_path / "ds"
    write_description(root)
    rel = run_path("01")
    write_run(root, rel, SHAPE, tr=TR,
              sidecar={"SliceTiming": [t * 1000 for t in interleaved()]})
    result = fix(root)
    assert result.exit_code == 1  # a fixable finding not planned
    line = next(x for x in result.output.splitlines() if "timing/units-ms not planned" in x)
    assert "header's pixdim[4]" in line and "add RepetitionTime to the sidecar" in line


def test_left_alone_findings_say_their_own_advice_not_the_catalogues(ds: Path) -> None:
    # BIDS: RepetitionTime is in seconds; 1e12 is no TR in seconds nor, divided by 1000,
    # in milliseconds (common practice (no source): TRs lie within seconds), so the
    # finding's own hint, not the catalogue's "divide by 1000", is what fix must repeat
    from slicetime.codes import RULES

    rel = run_path("01")
    write_run(ds, rel, SHAPE, tr=TR, sidecar={"RepetitionTime": 1e12,
                                              "SliceTiming": interleaved()})
    finding = next(f for r in audit_paths([ds]).runs for f in r.findings
                   if f.code == "tr/units-ms")
    assert finding.hint and finding.hint != RULES["tr/units-ms"].fix
    result = fix(ds)
    line = next(x for x in result.output.splitlines() if "tr/units-ms ×1" in x)
    assert finding.hint in line, result.output
    assert (RULES["tr/units-ms"].fix or "") not in result.output


def test_left_alone_findings_with_many_own_hints_are_summed_up(ds: Path) -> None:
    # NIfTI-1: pixdim[4] with xyzt_units seconds; a header TR a thousand times the
    # sidecar's gets a hint naming its own pixdim[4], so five runs with five values
    # give five hints: HINTS_SHOWN of them are printed, the rest summed in one line
    from slicetime.interfaces.terminal import HINTS_SHOWN

    for i in range(HINTS_SHOWN + 2):
        rel = run_path(f"0{i}")
        write_run(ds, rel, SHAPE, tr=(TR + i) * 1000,
                  sidecar={"RepetitionTime": TR + i, "SliceTiming": interleaved()})
    hints = {f.hint for r in audit_paths([ds]).runs for f in r.findings
             if f.code == "header/tr-disagrees"}
    assert len(hints) == HINTS_SHOWN + 2
    lines = [x for x in fix(ds).output.splitlines() if "header/tr-disagrees ×" in x]
    assert len(lines) == HINTS_SHOWN + 1
    assert "2 other hints" in lines[-1] and "header/tr-disagrees ×2" in lines[-1]


def test_a_planned_change_hashes_the_bytes_it_read_without_reading_the_file_again(
        ds: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the plan's sha256_before is the SHA-256 (hashlib, FIPS 180-4) of the sidecar's
    # bytes as planned, taken from the text already read for the edit; no file is
    # hashed again while planning (the transaction re-checks just before it writes)
    import hashlib

    from slicetime.pipelines import fix as fixing
    from slicetime.pipelines import journal

    rel = run_path("01")
    write_run(ds, rel, shape=SHAPE, tr=TR,
              sidecar={"RepetitionTime": TR, "SliceTiming": [t * 1000 for t in interleaved()]})
    hashed: list[str] = []
    real = journal.file_sha256

    def counting(path: Path) -> str:
        hashed.append(str(path))
        return real(path)

    monkeypatch.setattr(journal, "file_sha256", counting)
    plan = fixing.plan_fix([ds])
    sidecar = ds / sidecar_of(rel)
    changed = [c for c in plan.changes if c.file == sidecar_of(rel)]
    assert len(changed) == 1, [c.file for c in plan.changes]
    assert changed[0].sha256_before == hashlib.sha256(sidecar.read_bytes()).hexdigest()
    assert [h for h in hashed if h.endswith(".json") and "dataset_description" not in h] == []
