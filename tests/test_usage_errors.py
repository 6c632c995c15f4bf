"""Every usage mistake click finds (an unknown option or command, a bad or missing
value, a path of the wrong kind) is one line on standard error naming the command
and the option, argument or file, with exit 2; ``--help`` is unchanged.

Exit 2 for a usage error: click's documented ``UsageError.exit_code`` (click API
reference, "Exception Handling"), which the project's exit-status contract keeps.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli


def run(*args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args), prog_name="slicetime")
    return result.exit_code, result.stdout, result.stderr


@pytest.fixture()
def places(tmp_path: Path) -> dict[str, str]:
    afile = tmp_path / "notes.txt"
    afile.write_text("x", encoding="utf-8")
    folder = tmp_path / "policies"
    folder.mkdir()
    return {"file": str(afile), "folder": str(folder), "root": str(tmp_path)}


def test_each_usage_mistake_is_one_line_naming_the_option(places: dict[str, str]) -> None:
    cases = [
        # (arguments, words the line must hold)
        (("correct", places["root"], "--out", places["file"]),
         ["slicetime correct:", "'--out'", "notes.txt"]),
        (("audit", places["root"], "--policy", places["folder"]),
         ["slicetime audit:", "'--policy'", "policies"]),
        (("audit", "--no-such-option", places["root"]),
         ["slicetime audit:", "'--no-such-option'"]),
        (("audit", places["root"], "--fail-on", "sometimes"),
         ["slicetime audit:", "'--fail-on'", "'sometimes'"]),
        (("audit", places["root"], "--jobs"), ["slicetime audit:", "'--jobs'"]),
        (("audit", places["root"], "--jobs", "0"), ["slicetime audit:", "'--jobs'"]),
        (("correct",), ["slicetime correct:", "PATHS"]),
        (("--no-such-option",), ["slicetime:", "'--no-such-option'"]),
        (("audti", places["root"]), ["slicetime:", "'audti'"]),
    ]
    for args, words in cases:
        code, out, err = run(*args)
        assert code == 2, (args, err)
        assert out == "", args
        lines = err.splitlines()
        assert len(lines) == 1, (args, err)
        for word in words:
            assert word in lines[0], (args, word, err)
        assert "Usage:" not in err and "--help' for help" not in err


def test_suggestions_are_kept_short_on_the_same_line(places: dict[str, str]) -> None:
    # click suggests close option names ("Did you mean"); commands get the same
    code, _, err = run("audit", "--polcy", places["file"], places["root"])
    assert code == 2 and err.count("\n") == 1 and "'--policy'" in err
    code, _, err = run("audti", places["root"])
    assert code == 2 and err.count("\n") == 1 and "did you mean 'audit'?" in err


def test_help_and_version_are_unchanged() -> None:
    for args in (("--help",), ("audit", "--help"), ("correct", "-h")):
        code, out, _ = run(*args)
        assert code == 0 and out.startswith("Usage: slicetime"), args
    code, out, _ = run("--version")
    assert code == 0 and out.startswith("slicetime, version ")
    code, out, err = run()  # no command: the group's help, as click gives it
    assert "Usage: slicetime" in out + err
