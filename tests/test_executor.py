"""Executors: identical results serially, in processes and on a real Dask cluster;
lost workers, per-run failures, Ctrl-C and progress."""

from __future__ import annotations

import json
import os
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.report_json import audit_object, dumps
from slicetime.pipelines import audit as audit_module
from slicetime.pipelines.audit import audit_paths
from slicetime.pipelines.correct import CorrectOptions
from slicetime.pipelines.correct_batch import correct_paths
from slicetime.pipelines.executor import (
    DaskExecutor,
    Executor,
    Interrupted,
    ProcessExecutor,
    make_executor,
    map_chunks,
)
from tests.helpers_bids import write_description, write_sidecar
from tests.test_correct import build_run, interleaved


def make_dataset(root: Path, n_subjects: int = 6) -> Path:
    write_description(root)
    write_sidecar(root, "task-hum_bold.json", {"RepetitionTime": 2.0, "TaskName": "hum"})
    for i in range(1, n_subjects + 1):
        rel = f"sub-{i:02d}/func/sub-{i:02d}_task-hum_bold.nii.gz"
        times = interleaved(8) if i != 3 else [t * 1000 for t in interleaved(8)]  # one in ms
        build_run(root, rel, times, shape=(4, 4, 8, 24))
    if n_subjects >= 5:
        (root / "sub-05/func/sub-05_task-hum_bold.nii.gz").write_bytes(b"not an image")
    return root


def report(result: audit_module.AuditResult, root: Path) -> str:
    return dumps(audit_object(result, str(root)))


# ------------------------------------------------------------- identical results


def test_processes_and_serial_give_the_same_report(tmp_path: Path) -> None:
    root = make_dataset(tmp_path / "ds")
    serial = audit_paths([root], executor=Executor())
    pooled = audit_paths([root], executor=ProcessExecutor(2))
    assert report(serial, root) == report(pooled, root)
    assert [r.record.path for r in serial.runs] == sorted(r.record.path for r in serial.runs)


@pytest.fixture(scope="module")
def dask_cluster() -> Iterator[object]:
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=None,
        silence_logs=40,
    )
    try:
        yield cluster
    finally:
        cluster.close()


def test_dask_audit_equals_a_local_audit_and_runs_on_the_workers(
    tmp_path: Path, dask_cluster: object
) -> None:
    root = make_dataset(tmp_path / "ds", n_subjects=8)
    local = audit_paths([root], executor=Executor())
    executor = DaskExecutor(dask_cluster.scheduler_address)  # type: ignore[attr-defined]
    try:
        remote = audit_paths([root], executor=executor)
    finally:
        executor.close()
    assert report(remote, root) == report(local, root)
    workers = set(dask_cluster.scheduler_info["workers"])  # type: ignore[attr-defined]
    assert executor.stats.workers and executor.stats.workers <= workers


def test_dask_correction_equals_a_local_one(tmp_path: Path, dask_cluster: object) -> None:
    import nibabel as nib

    root = tmp_path / "ds"
    write_description(root)
    rels = [f"sub-0{i}/func/sub-0{i}_task-hum_bold.nii.gz" for i in (1, 2, 3)]
    for rel in rels:
        build_run(root, rel, interleaved(8), shape=(6, 5, 8, 40))
    local_out, dask_out = tmp_path / "local", tmp_path / "dask"
    local = correct_paths([root], CorrectOptions(out=local_out), executor=Executor())
    executor = DaskExecutor(dask_cluster.scheduler_address)  # type: ignore[attr-defined]
    try:
        remote = correct_paths([root], CorrectOptions(out=dask_out, threads=0),
                               executor=executor)
    finally:
        executor.close()
    assert [r.status for r in local.runs] == [r.status for r in remote.runs] == ["corrected"] * 3
    assert executor.stats.workers  # the files were written by the workers
    for run in local.runs:
        assert run.output is not None
        a = np.asarray(nib.load(local_out / run.output).dataobj)
        b = np.asarray(nib.load(dask_out / run.output).dataobj)
        assert np.array_equal(a, b)
        side_a = json.loads((local_out / run.output).with_suffix("").with_suffix(".json")
                            .read_text())
        side_b = json.loads((dask_out / run.output).with_suffix("").with_suffix(".json")
                            .read_text())
        for side in (side_a, side_b):
            side["SliceTimeAlignment"].pop("Output")  # gzip bytes may differ by thread count
        assert side_a == side_b


def test_unreachable_scheduler_is_a_usage_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("SLICETIME_CONNECT_TIMEOUT", "1")
    root = make_dataset(tmp_path / "ds", n_subjects=1)
    result = CliRunner().invoke(cli, ["audit", str(root), "--scheduler", "tcp://127.0.0.1:9"])
    assert result.exit_code == 2
    assert "cannot reach a Dask scheduler at tcp://127.0.0.1:9" in result.output


# --------------------------------------------------------------- failures


def crash_once(items: Sequence[str]) -> list[str]:
    """Kill the worker process the first time it sees an item named in a marker file."""
    out = []
    for item in items:
        marker = Path(item)
        if marker.exists() and marker.read_text() == "crash":
            marker.write_text("crashed")
            os._exit(1)
        if marker.exists() and marker.read_text() == "always":
            os._exit(1)
        out.append(f"done {marker.name}")
    return out


def lost_item(item: str, why: str) -> str:
    return f"lost {Path(item).name}: {why}"


def test_a_lost_worker_is_retried_once(tmp_path: Path) -> None:
    items = [str(tmp_path / f"item{i}") for i in range(6)]
    Path(items[2]).write_text("crash")
    executor = ProcessExecutor(2)
    results = executor.map_chunks(crash_once, items, lost=lost_item, chunk_size=1)
    assert results == [f"done item{i}" for i in range(6)]
    assert executor.stats.retried_chunks >= 1 and executor.stats.lost_items == 0


def test_a_run_whose_worker_dies_twice_becomes_a_result(tmp_path: Path) -> None:
    items = [str(tmp_path / f"item{i}") for i in range(4)]
    Path(items[1]).write_text("always")
    executor = ProcessExecutor(2)
    results = executor.map_chunks(crash_once, items, lost=lost_item, chunk_size=1)
    assert results[1] == "lost item1: its worker process stopped unexpectedly twice"
    assert results[0] == "done item0" and results[3] == "done item3"
    assert executor.stats.lost_items == 1


def test_only_the_item_that_kills_its_worker_is_lost(tmp_path: Path) -> None:
    # the other item in flight when the worker died is rerun, never blamed (common
    # practice (no source): a crash is attributed to the work that reproduces it alone)
    items = [str(tmp_path / f"item{i}") for i in range(8)]
    Path(items[4]).write_text("always")
    for chunk_size in (1, 3):
        executor = ProcessExecutor(2)
        results = executor.map_chunks(crash_once, items, lost=lost_item, chunk_size=chunk_size)
        expected = [f"done item{i}" for i in range(8)]
        expected[4] = "lost item4: its worker process stopped unexpectedly twice"
        assert results == expected, chunk_size
        assert executor.stats.lost_items == 1


def test_a_bug_on_one_run_becomes_a_finding(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    root = make_dataset(tmp_path / "ds", n_subjects=3)
    real = audit_module.audit_one

    def flaky(root_: Path, path: Path, *args: object, **kwargs: object):
        if "sub-02" in path.name:
            raise ZeroDivisionError("invented failure")
        return real(root_, path, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.delenv("SLICETIME_DEBUG", raising=False)
    monkeypatch.setattr(audit_module, "audit_one", flaky)
    result = audit_paths([root], executor=Executor())
    by_path = {r.record.path: r for r in result.runs}
    broken = by_path["sub-02/func/sub-02_task-hum_bold.nii.gz"]
    assert [f.code for f in broken.findings] == ["batch/internal-error"]
    assert "ZeroDivisionError: invented failure" in broken.findings[0].message
    assert len(result.runs) == 3  # the batch went on


def interrupt_at_third(items: Sequence[int]) -> list[int]:
    if items[0] == 3:
        raise KeyboardInterrupt
    return [i * 10 for i in items]


def test_ctrl_c_keeps_what_finished() -> None:
    with pytest.raises(Interrupted) as stop:
        map_chunks(interrupt_at_third, [1, 2, 3, 4], lost=lambda i, why: -1, chunk_size=1)
    assert stop.value.results == [10, 20, None, None]


def test_progress_reports_failures() -> None:
    seen: list[tuple[int, int, int]] = []
    map_chunks(
        lambda chunk: [i % 3 == 0 for i in chunk],
        list(range(7)),
        lost=lambda i, why: False,
        chunk_size=2,
        progress=lambda done, total, failed: seen.append((done, total, failed)),
        failed_of=bool,
    )
    assert seen == [(2, 7, 1), (4, 7, 2), (6, 7, 2), (7, 7, 3)]


def test_progress_lines_off_a_terminal(capsys: pytest.CaptureFixture[str]) -> None:
    from slicetime.interfaces.progress import periodic_lines

    update = periodic_lines("auditing", every=0.0)
    update(5, 20, 1)
    update(20, 20, 1)  # the end is left to the final report
    lines = capsys.readouterr().err.splitlines()
    assert len(lines) == 1
    assert lines[0].startswith("slicetime: auditing: 5/20 runs, 1 failed, about ")


def test_make_executor_follows_the_options() -> None:
    assert type(make_executor(1, None)) is Executor
    pooled = make_executor(3, None)
    assert isinstance(pooled, ProcessExecutor) and pooled.jobs == 3


def test_correct_uses_all_cpus_for_a_single_run(tmp_path: Path) -> None:
    # one run in a process pool would waste the other CPUs: it gets them as threads
    from slicetime.pipelines.correct_batch import _auto_threads
    from slicetime.pipelines.executor import available_cpus

    assert _auto_threads(ProcessExecutor(2), 2, 1) == available_cpus()
    assert _auto_threads(ProcessExecutor(available_cpus()), 1, 50) == 1


def test_ctrl_c_during_an_audit_says_how_far_it_got(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    root = make_dataset(tmp_path / "ds", n_subjects=3)
    real = audit_module.audit_one
    seen = {"n": 0}

    def interrupt_second(*args: object, **kwargs: object):
        seen["n"] += 1
        if seen["n"] == 2:
            raise KeyboardInterrupt
        return real(*args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(audit_module, "audit_one", interrupt_second)
    result = CliRunner().invoke(cli, ["audit", str(root), "--jobs", "1"])
    assert result.exit_code == 130
    assert "interrupted; 0 of 3 runs audited, no report written" in result.output


def test_light_work_stays_in_one_process_on_small_machines(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # measured (README, Performance): on 2 CPUs a second audit worker costs more than
    # it saves, while correction (seconds per run) gains from it
    from slicetime.pipelines import executor as executor_module

    monkeypatch.setattr(executor_module, "available_cpus", lambda: 2)
    assert type(make_executor(None, None, light=True)) is Executor
    assert isinstance(make_executor(None, None, light=False), ProcessExecutor)
    assert isinstance(make_executor(2, None, light=True), ProcessExecutor)  # asked for
    monkeypatch.setattr(executor_module, "available_cpus", lambda: 8)
    pooled = make_executor(None, None, light=True)
    assert isinstance(pooled, ProcessExecutor) and pooled.jobs == 8


# ------------------------------------------------------------- prepared streams


def _many_runs(root: Path, n: int = 150) -> Path:
    """More runs than one chunk of 64, so that a process pool really shares them out:
    clean runs, one outlier scheme, one unreadable file, one in milliseconds."""
    from tests.helpers_bids import write_run

    write_description(root)
    write_sidecar(root, "task-hum_bold.json", {"RepetitionTime": 2.0, "SliceTiming":
                                               interleaved(6)})
    for i in range(n):
        sidecar = ({"SliceTiming": [0.0, 0.4, 0.8, 1.2, 1.6, 2.0 - 0.4]} if i == 7 else
                   {"SliceTiming": [t * 1000 for t in interleaved(6)]} if i == 11 else None)
        write_run(root, f"sub-{i:03d}/func/sub-{i:03d}_task-hum_bold.nii.gz",
                  shape=(4, 4, 6, 5), sidecar=sidecar)
    (root / "sub-042/func/sub-042_task-hum_bold.nii.gz").write_bytes(b"not an image")
    return root


def _streamed_json(root: Path, executor: Executor, prepared: bool) -> str:
    import io

    from slicetime.interfaces.report_source import RunSpool, run_line
    from slicetime.interfaces.report_stream import write_report

    spool = RunSpool(str(root))
    try:
        spool.totals = audit_module.audit_stream(
            [root], spool.add_line if prepared else spool.add, executor=executor,
            prepare=run_line if prepared else None)
        out = io.StringIO()
        write_report("json", spool, out)
        return out.getvalue()
    finally:
        spool.close()


def test_a_prepared_stream_in_worker_processes_gives_the_same_report(tmp_path: Path) -> None:
    # report lines made in the workers, with only the run facts sent back, give the very
    # report that whole results audited in this process give (the executor never changes
    # a report)
    root = _many_runs(tmp_path / "ds")
    whole = _streamed_json(root, Executor(), prepared=False)
    pooled = ProcessExecutor(2)
    assert _streamed_json(root, pooled, prepared=True) == whole
    assert _streamed_json(root, Executor(), prepared=True) == whole
    data = json.loads(whole)
    assert data["summary"]["runs"] == 150
    assert any(f["code"] == "dataset/outlier-scheme" for r in data["runs"] for f in r["findings"])


def _die_on_sub_013(root_: Path, path: Path, *args: object, **kwargs: object):
    if "sub-013_" in path.name:
        os._exit(3)  # the worker process dies, every time
    return _REAL_AUDIT_ONE(root_, path, *args, **kwargs)  # type: ignore[arg-type]


_REAL_AUDIT_ONE = audit_module.audit_one


def test_a_run_that_kills_its_worker_in_a_prepared_stream_is_reported_lost(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
) -> None:
    root = _many_runs(tmp_path / "ds", n=80)
    monkeypatch.setattr(audit_module, "audit_one", _die_on_sub_013)
    data = json.loads(_streamed_json(root, ProcessExecutor(2), prepared=True))
    by_path = {r["path"]: r for r in data["runs"]}
    lost = by_path["sub-013/func/sub-013_task-hum_bold.nii.gz"]
    assert [f["code"] for f in lost["findings"]] == ["batch/worker-lost"]
    assert len(data["runs"]) == 80  # the others were audited, each once
    assert sum(1 for r in data["runs"] if r["findings"] and
               r["findings"][0]["code"] == "batch/worker-lost") == 1


def test_small_results_use_the_second_cpu_only_for_large_audits(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # measured (README, Performance): on 2 CPUs, workers that send back only report lines
    # and run facts make a 2,000-run audit about a quarter faster; a few runs stay here
    from slicetime.pipelines import executor as executor_module

    monkeypatch.setattr(executor_module, "available_cpus", lambda: 2)
    monkeypatch.setattr(executor_module, "load_average", lambda: 0.1)  # an idle machine
    pooled = make_executor(None, None, light=True, small_results=True)
    assert isinstance(pooled, ProcessExecutor) and pooled.jobs == 2
    assert pooled.serial_below == executor_module.SMALL_RESULTS_PARALLEL_FROM
    few = pooled.map_chunks(_pid, list(range(200)),
                            lost=lambda i, why: -1)
    assert set(few) == {os.getpid()}  # fewer than the threshold: in this process
    monkeypatch.setattr(executor_module, "available_cpus", lambda: 1)
    assert type(make_executor(None, None, light=True, small_results=True)) is Executor


def test_a_busy_two_cpu_machine_audits_in_one_process(monkeypatch: pytest.MonkeyPatch) -> None:
    # measured (README, Performance; benchmarks/bench_audit.py json@1): with the other
    # CPU busy, a second worker lost to one; --jobs still asks for workers
    from slicetime.pipelines import executor as executor_module

    monkeypatch.setattr(executor_module, "available_cpus", lambda: 2)
    monkeypatch.setattr(executor_module, "load_average", lambda: 1.4)
    assert type(make_executor(None, None, light=True, small_results=True)) is Executor
    assert isinstance(make_executor(2, None, light=True, small_results=True), ProcessExecutor)
    monkeypatch.setattr(executor_module, "load_average", lambda: 0.3)
    assert isinstance(make_executor(None, None, light=True, small_results=True),
                      ProcessExecutor)


def _pid(items: Sequence[int]) -> list[int]:
    return [os.getpid() for _ in items]


def test_the_html_page_from_worker_parts_equals_the_page_from_whole_records(
    tmp_path: Path,
) -> None:
    # with --html the workers send back each run's page parts instead of its record: the
    # page (data, drawings, counts) must be the one the whole records give
    from slicetime.interfaces.report_html import write_html_stream
    from slicetime.interfaces.report_html_parts import DiagramCollector, line_and_parts
    from slicetime.interfaces.report_source import RunSpool

    root = _many_runs(tmp_path / "ds", n=90)
    pages = []
    for executor, prepared in ((Executor(), False), (ProcessExecutor(2), True)):
        spool, drawings = RunSpool(str(root)), DiagramCollector()

        def from_parts(item: tuple[str, object], spool: RunSpool = spool,
                       drawings: DiagramCollector = drawings) -> None:
            spool.add_line(item[0])
            drawings.add_parts(item[1])  # type: ignore[arg-type]

        def from_record(run: object, spool: RunSpool = spool,
                        drawings: DiagramCollector = drawings) -> None:
            spool.add(run)  # type: ignore[arg-type]
            drawings.add(run)  # type: ignore[arg-type]

        try:
            spool.totals = audit_module.audit_stream(
                [root], from_parts if prepared else from_record, executor=executor,
                prepare=line_and_parts if prepared else None)
            page = tmp_path / f"page-{prepared}.html"
            write_html_stream(spool, drawings, page, generated="fixed")
            pages.append(page.read_text(encoding="utf-8"))
        finally:
            spool.close()
    assert pages[0] == pages[1]
    assert "dg-2" in pages[0]  # more than one distinct diagram (the outlier's own)


def test_dask_reports_the_workers_that_ran_the_tasks(tmp_path: Path,
                                                     dask_cluster: object) -> None:
    # distributed's own task stream (a scheduler plugin) records the worker of every task;
    # the executor's count must be exactly the workers that stream names
    distributed = pytest.importorskip("distributed")
    root = make_dataset(tmp_path / "ds", n_subjects=8)
    address = dask_cluster.scheduler_address  # type: ignore[attr-defined]
    executor = DaskExecutor(address)
    watcher = distributed.Client(address, set_as_default=False)
    try:
        with distributed.get_task_stream(client=watcher) as stream:
            audit_module.map_chunks(
                audit_module.audit_chunk, [(root, p) for p in sorted(root.rglob("*.nii.gz"))],
                lost=lambda item, why: None, executor=executor, chunk_size=1)
    finally:
        executor.close()
        watcher.close()
    ran = {task["worker"] for task in stream.data if str(task["key"]).startswith("slicetime-")}
    assert ran and executor.stats.workers == ran
    assert executor.stats.cluster_workers == 2  # the cluster of the fixture
