"""SLICETIME_ASCII=1: every screen prints ASCII only; the JSON report keeps the
standard scheme label ("multiband ×3, ...")."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.screen import ascii_text, unicode_wanted
from tests.helpers_bids import write_description, write_run

RUN = "sub-01/func/sub-01_task-x_bold.nii.gz"
# three groups of two simultaneous slices, 0.5 s apart: multiband factor 2 (BIDS
# "Task imaging data": slices sharing a SliceTiming value are acquired together)
SIDECAR = {"RepetitionTime": 2.0, "SliceTiming": [0.0, 0.5, 1.0, 0.0, 0.5, 1.0],
           "MultibandAccelerationFactor": 2}


@pytest.fixture()
def run(tmp_path: Path) -> Path:
    write_description(tmp_path)
    return write_run(tmp_path, RUN, shape=(12, 12, 6, 8), tr=2.0, sidecar=SIDECAR)


def invoke(*args: str, ascii_mode: bool = True) -> tuple[int, str, str]:
    env = {"SLICETIME_ASCII": "1" if ascii_mode else None}
    result = CliRunner().invoke(cli, list(args), env=env)  # type: ignore[arg-type]
    return result.exit_code, result.stdout, result.stderr


def test_the_screens_print_ascii_only(run: Path) -> None:
    screens = [
        ("show", str(run)),
        ("audit", str(run.parents[2])),
        ("verify", str(run)),
        ("explain", "--list"),
        ("timing", "--slices", "6", "--tr", "2", "--multiband", "2"),
    ]
    for args in screens:
        code, out, err = invoke(*args)
        assert code in (0, 1), (args, out, err)
        text = out if args[0] != "timing" else err
        assert text.isascii(), (args, [c for c in text if not c.isascii()])
    _, shown, _ = invoke("show", str(run))
    assert "12 x 12 x 6 x 8" in shown and "multiband x2" in shown


def test_without_ascii_mode_the_screen_keeps_its_signs(run: Path) -> None:
    _, shown, _ = invoke("show", str(run), ascii_mode=False)
    assert "12 × 12 × 6 × 8" in shown  # CliRunner's stream is UTF-8


def test_the_json_label_keeps_its_standard_words(run: Path) -> None:
    code, out, _ = invoke("show", str(run), "--json")
    assert code in (0, 1)
    assert json.loads(out)["scheme"]["label"].startswith("multiband ×2, ")


def test_the_one_decision(monkeypatch: pytest.MonkeyPatch) -> None:
    class Stream:
        encoding = "utf-8"

    monkeypatch.delenv("SLICETIME_ASCII", raising=False)
    assert unicode_wanted(Stream())
    Stream.encoding = "ascii"
    assert not unicode_wanted(Stream())
    Stream.encoding = "utf-8"
    monkeypatch.setenv("SLICETIME_ASCII", "1")
    assert not unicode_wanted(Stream())
    assert ascii_text("multiband ×4 → 12 × 12") == "multiband x4 -> 12 x 12"


def test_the_lines_fix_prints_itself_are_ascii_too(tmp_path: Path,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    # fix --apply prints its own lines (written, journal, re-audit) besides the plan; a
    # finding left after the re-audit may quote a scheme label ("multiband ×2, ...",
    # the label grammar of slicetime.schemes.labels): in ASCII mode it reads "x2"
    from slicetime.codes import make_finding
    from slicetime.pipelines import fix as fixing
    from slicetime.schemes.labels import with_multiband

    write_description(tmp_path)
    # SliceTiming in milliseconds (BIDS: seconds): a repair fix plans
    write_run(tmp_path, RUN, shape=(12, 12, 6, 8), tr=2.0,
              sidecar={**SIDECAR, "SliceTiming": [0, 500, 1000, 0, 500, 1000]})
    label = with_multiband("ascending", 2)
    assert "×" in label
    left = make_finding("timing/units-ms", f"still read as {label}", file=RUN)
    monkeypatch.setattr(fixing, "reaudit", lambda *a, **k: [left])
    code, out, err = invoke("fix", str(tmp_path), "--apply")
    assert code == 0, (out, err)
    assert "still" in out and "multiband x2" in out
    assert out.isascii() and err.isascii(), [c for c in out + err if not c.isascii()]


def test_no_plain_echo_of_text_for_people_in_the_interfaces() -> None:
    # every line for people goes through screen.say (or a console on screen_stream);
    # click.echo is left for machine formats: JSON (dumps) and the TOML pin writes
    import ast

    import slicetime.interfaces as interfaces

    machine = {"dumps", "json.dumps"}
    found = []
    for path in Path(interfaces.__file__).parent.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if not (isinstance(node, ast.Call) and ast.unparse(node.func) == "click.echo"):
                continue
            first = node.args[0] if node.args else None
            if first is not None and any(f"{name}(" in ast.unparse(first) for name in machine):
                continue
            if any(k.arg == "file" for k in node.keywords):  # a stream chosen with care
                continue
            if path.name == "pin.py" and isinstance(first, ast.Name) and first.id == "text":
                continue
            found.append(f"{path.name}:{node.lineno}")
    assert found == []
