"""The audit's content memo (``pipelines/audit_memo.py``) gives every run exactly what
evaluating the run on its own gives: the same report with the memo as without it, on a
dataset whose planted defects repeat in runs of identical content at different places,
and findings that name each run's own files."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.pipelines import audit_memo
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.demo import build_demo_dataset
from slicetime.schemes.generate import Protocol, slice_timing
from tests.helpers_bids import write_description, write_json, write_run
from tests.test_golden import make_varied_dataset


def _report(root: Path, *, memo: bool, monkeypatch: pytest.MonkeyPatch) -> str:
    monkeypatch.setattr(audit_memo, "ENABLED", memo)
    result = CliRunner().invoke(cli, ["audit", str(root), "--format", "json", "--jobs", "1",
                                      "--no-progress", "--fail-on", "never"])
    assert result.exit_code == 0, result.output
    return result.output


def _memos(monkeypatch: pytest.MonkeyPatch) -> list[audit_memo.ContentMemo]:
    made: list[audit_memo.ContentMemo] = []
    real = audit_memo.memo_for

    def recording(store: Any) -> audit_memo.ContentMemo | None:
        memo = real(store)
        if memo is not None and memo not in made:
            made.append(memo)
        return memo

    monkeypatch.setattr(audit_memo, "memo_for", recording)
    monkeypatch.setattr("slicetime.pipelines.audit.memo_for", recording)
    return made


def test_the_memo_gives_the_report_of_the_cold_evaluation(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # the golden tests' varied dataset: every 97th run the same planted defect (own
    # sidecars byte for byte alike, at different places), a subject-level override, a
    # lab policy; the report is compared whole, every finding's file and message included
    root = tmp_path / "varied"
    make_varied_dataset(root, 700)
    memos = _memos(monkeypatch)
    warm = _report(root, memo=True, monkeypatch=monkeypatch)
    assert memos and sum(m.reused for m in memos) > 1000  # the memo was used...
    cold = _report(root, memo=False, monkeypatch=monkeypatch)
    assert warm == cold  # ...and changed nothing
    findings = [f for run in json.loads(warm)["runs"] for f in run["findings"]]
    assert len({f["file"] for f in findings}) > 20  # many runs' own files named


def test_the_memo_gives_the_demo_report_of_the_cold_evaluation(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    root = tmp_path / "demo"
    build_demo_dataset(root)
    assert _report(root, memo=True, monkeypatch=monkeypatch) == \
        _report(root, memo=False, monkeypatch=monkeypatch)


def test_runs_of_equal_content_name_their_own_sidecars(tmp_path: Path) -> None:
    """Three runs with the same header and the same SliceTiming, written in
    milliseconds: two in their own sidecars, one inherited from its subject's folder.
    BIDS inheritance principle (BIDS specification, "The Inheritance Principle"): the
    value comes from the sidecar that supplies it, so the finding about it names that
    file, a different one for each run."""
    write_description(tmp_path)
    ms = [round(t * 1000, 1) for t in slice_timing(
        Protocol(n_slices=10, order="interleaved", repetition_time=2.0, decimals=4))]
    write_json(tmp_path / "task-rest_bold.json", {"RepetitionTime": 2.0})
    for sub in ("01", "02"):
        write_run(tmp_path, f"sub-{sub}/func/sub-{sub}_task-rest_bold.nii.gz",
                  shape=(4, 4, 10, 6), sidecar={"SliceTiming": ms})
    write_run(tmp_path, "sub-03/func/sub-03_task-rest_bold.nii.gz", shape=(4, 4, 10, 6),
              sidecar={})
    write_json(tmp_path / "sub-03" / "sub-03_task-rest_bold.json", {"SliceTiming": ms})
    result = audit_paths([tmp_path])
    files = {run.record.path: {f.file for f in run.findings if f.code == "timing/units-ms"}
             for run in result.runs}
    assert files == {
        "sub-01/func/sub-01_task-rest_bold.nii.gz": {"sub-01/func/sub-01_task-rest_bold.json"},
        "sub-02/func/sub-02_task-rest_bold.nii.gz": {"sub-02/func/sub-02_task-rest_bold.json"},
        "sub-03/func/sub-03_task-rest_bold.nii.gz": {"sub-03/sub-03_task-rest_bold.json"},
    }
    sources = {run.record.path: run.record.schedule.sources["SliceTiming"].file
               for run in result.runs if run.record.schedule is not None}
    assert sources == {path: next(iter(f)) for path, f in files.items()}


def test_report_lines_filled_in_from_a_judged_content_equal_lines_made_in_full(
        tmp_path: Path) -> None:
    """Runs of one judged content get their report line from the content's line with
    their names put in (``report_source._templated``); it must be the text the contract's
    run object encodes to (``encode(run_object(run))``, Python's json module), names
    with quotes, backslashes, non-ASCII letters and JSON's own escapes included. Clean
    runs with own sidecars byte for byte alike, in folders of odd names."""
    from slicetime.interfaces.report_json import run_object
    from slicetime.interfaces.report_source import _templates, encode, run_line
    from slicetime.pipelines.audit import RunResult, audit_stream

    write_description(tmp_path)
    times = slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=2.0,
                                  decimals=4))
    labels = ["01", "02", "é3", "04"]
    folders = ["func", 'fu"nc', "fu\\nc", "f\tunc"]
    for label in labels:
        for folder in folders:
            write_run(tmp_path, f"sub-{label}/{folder}/sub-{label}_task-rest_bold.nii.gz",
                      shape=(4, 4, 10, 6),
                      sidecar={"SliceTiming": times, "RepetitionTime": 2.0})
    runs: list[RunResult] = []
    audit_stream([tmp_path], runs.append)
    assert len(runs) == len(labels) * len(folders)
    judged = [run for run in runs if run.content is not None and not run.findings]
    assert len({id(run.content) for run in judged}) < len(judged) // 2  # contents shared
    for run in runs:
        assert run_line(run) == encode(run_object(run)), run.record.path
    # and these runs' lines were filled in
    assert sum(_templates.get(run.content) is not None for run in judged) >= len(judged) // 2


def test_run_facts_of_a_judged_content_equal_facts_made_run_by_run(tmp_path: Path) -> None:
    # the facts interned once per content (RunFacts(content=...)) are those each run's own
    # record gives (the golden tests' varied dataset: shared and own sidecars, defects)
    from slicetime.model import Counts
    from slicetime.pipelines.audit import RunResult, audit_stream
    from slicetime.pipelines.audit_facts import Interner, RunFacts

    root = tmp_path / "varied"
    make_varied_dataset(root, 300)
    runs: list[RunResult] = []
    audit_stream([root], runs.append)
    assert sum(run.content is not None for run in runs) > 200
    fast, slow = Interner(), Interner()
    names = ("path", "root", "abs_path", "entities", "suffix", "datatype", "header", "timing",
             "scheme", "content_missing", "counts", "fold_roots", "metadata_sources")
    for run in runs:
        counts = Counts.of(run.findings)
        made = RunFacts(run.record, counts, fast, run.findings, run.content)
        plain = RunFacts(run.record, counts, slow, run.findings)
        assert {n: getattr(made, n) for n in names} == {n: getattr(plain, n) for n in names}
