"""Worker processes end with their parent, and sizes that no image can have are
refused at once (issue 26, item 8)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.schemes.generate import MAX_SLICES

#: how long the workers may outlive a killed parent ("within a few seconds")
DEADLINE = 15.0

_PARENT = r"""
import os, sys, time
from slicetime.pipelines.executor import ProcessExecutor

def job(items):
    with open(os.path.join(sys.argv[1], f"worker-{os.getpid()}"), "w") as fh:
        fh.write("started")
    time.sleep(600)
    return items

if __name__ == "__main__":
    ProcessExecutor(2).map_chunks(job, [1, 2, 3, 4], lost=lambda i, w: i, chunk_size=1)
"""


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    # a zombie has ended; only its entry waits for its (new) parent to collect it
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def test_workers_end_when_their_parent_is_killed(tmp_path: Path) -> None:
    script = tmp_path / "parent.py"
    script.write_text(_PARENT)
    markers = tmp_path / "markers"
    markers.mkdir()
    parent = subprocess.Popen([sys.executable, str(script), str(markers)],
                              cwd=Path(__file__).resolve().parents[1])
    try:
        waited = time.monotonic()
        while len(list(markers.iterdir())) < 2 and time.monotonic() - waited < 60:
            time.sleep(0.1)
        workers = [int(p.name.split("-")[1]) for p in markers.iterdir()]
        assert len(workers) == 2
        parent.send_signal(signal.SIGKILL)  # kill -9: no clean-up in the parent
        parent.wait()
        waited = time.monotonic()
        while any(_alive(pid) for pid in workers) and time.monotonic() - waited < DEADLINE:
            time.sleep(0.1)
        assert not [pid for pid in workers if _alive(pid)]
    finally:
        if parent.poll() is None:
            parent.kill()
        for path in markers.iterdir():
            pid = int(path.name.split("-")[1])
            if _alive(pid):
                os.kill(pid, signal.SIGKILL)


def test_timing_refuses_more_slices_than_an_image_can_have() -> None:
    # NIfTI-1 dims are signed 16-bit (nifti1.h: short dim[8]), so 32767 is the largest
    assert MAX_SLICES == 32767
    result = CliRunner().invoke(cli, ["timing", "--slices", "100000000", "--tr", "2"])
    assert result.exit_code == 2
    assert "--slices must be at most 32767" in result.output
    assert len(result.output.strip().splitlines()) == 1
    # 32767 slices need groups at least 0.5 ms apart to be told apart (timing_problem)
    ok = CliRunner().invoke(cli, ["timing", "--slices", "32767", "--tr", "30", "--decimals",
                                  "5", "--compact"])
    assert ok.exit_code == 0
