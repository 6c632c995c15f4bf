"""A sidecar RepetitionTime that no unit makes a plausible TR is no usable TR: the
resolve verdict says so once, the rule reads it, and no screen shows a divided number.

BIDS ("Task imaging data", "Required fields"): RepetitionTime is in seconds. The model's
plausible TR lies between ``model.MIN_REPETITION_TIME`` and ``MAX_REPETITION_TIME``
(0.05 to 100 s, common practice (no source)); 1e12 is no TR in seconds, nor read as
milliseconds (1e9 s, arithmetic).
"""

from __future__ import annotations

import json
from pathlib import Path

from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.rules import check_run
from slicetime.schemes.resolve import repetition_time_unit
from tests.factories import header_info, record
from tests.helpers_bids import write_description, write_run

RUN = "sub-01/func/sub-01_task-a_bold.nii.gz"
NO_TR = {"RepetitionTime": 1e12, "SliceTiming": [0, 1, 0.5]}


def test_the_verdict_says_no_unit_makes_it_a_tr() -> None:
    verdict = repetition_time_unit(1e12)
    assert not verdict.usable and "no plausible TR" in verdict.evidence["reason"]
    # 2000 read as milliseconds is 2 s (arithmetic): usable, divided
    ordinary = repetition_time_unit(2000.0)
    assert ordinary.usable and ordinary.unit == "ms" and 2000.0 * ordinary.factor == 2.0


def test_the_resolved_tr_is_none_not_a_divided_number() -> None:
    # the header's pixdim[4] (2 s) does not replace the sidecar's value (BIDS: the
    # sidecar wins; an unusable one is reported by tr/units-ms, not silently swapped)
    rec = record(NO_TR, header_info((8, 8, 3, 20), tr=2.0))
    assert rec.timing.repetition_time is None and rec.timing.repetition_unusable
    found = [f for f in check_run(rec) if f.code == "tr/units-ms"]
    assert len(found) == 1 and "no plausible TR" in found[0].message


def test_screens_say_not_usable(tmp_path: Path) -> None:
    write_description(tmp_path)
    write_run(tmp_path, RUN, shape=(4, 4, 3, 8), tr=2.0, sidecar=NO_TR)
    env = {"COLUMNS": "200"}
    text = CliRunner().invoke(cli, ["audit", str(tmp_path)], env=env).stdout
    assert "1000000000 s" not in text.split("error    tr/units-ms")[0]  # table and run line
    assert f"{RUN}  interleaved ascending from 0  TR not usable" in text
    assert any(line.startswith("func: task-a_bold") and "not usable" in line
               for line in text.splitlines())
    out = CliRunner().invoke(cli, ["audit", str(tmp_path), "--format", "json"], env=env).stdout
    run = json.loads(out)["runs"][0]
    assert run["repetition_time"] is None and run["repetition_time_source"] == "sidecar"
    show = CliRunner().invoke(cli, ["show", str(tmp_path / RUN)], env=env).stdout
    assert any(line.split() == ["repetition", "time", "not", "usable"]
               for line in show.splitlines())
