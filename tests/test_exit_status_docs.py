"""The exit statuses are told the same way in ``slicetime --help``, ``verify --help`` and
the README, and say what the code does."""

from __future__ import annotations

import re
from pathlib import Path

from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from tests.helpers_bids import write_description, write_run

README = Path(__file__).resolve().parents[1] / "README.md"
VERIFY_EXIT_1 = "a verdict at or above --fail-on, by default a claim contradicted (verify)"


def _flat(text: str) -> str:
    return re.sub(r"\s+", " ", text.replace("`", ""))


def test_the_three_texts_agree_on_verify() -> None:
    top = _flat(CliRunner().invoke(cli, ["--help"]).output)
    own = _flat(CliRunner().invoke(cli, ["verify", "--help"]).output)
    readme = _flat(README.read_text("utf-8"))
    assert VERIFY_EXIT_1 in top and VERIFY_EXIT_1 in readme
    assert "Exit 1 when a verdict reaches --fail-on (by default: a claim contradicted)" in own
    for text in (top, own, readme.split("## Exit status")[1].split("## ")[0]):
        assert "millisecond" not in text  # verify makes no unit findings of its own


def test_times_in_milliseconds_do_not_make_verify_exit_1(tmp_path: Path) -> None:
    # BIDS: SliceTiming is in seconds; 500..1500 for a TR of 2 s are milliseconds. verify
    # judges the order from the data only: its verdict here is a note, so exit 0
    write_description(tmp_path)
    run = write_run(tmp_path, "sub-01/func/sub-01_task-x_bold.nii.gz", shape=(4, 4, 4, 40),
                    tr=2.0, sidecar={"RepetitionTime": 2.0,
                                     "SliceTiming": [0, 500, 1000, 1500]})
    result = CliRunner().invoke(cli, ["verify", str(run)])
    assert result.exit_code == 0, result.output
