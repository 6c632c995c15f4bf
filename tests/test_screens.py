"""Every command's screen on the demo study, at 80 and 120 columns: no line wider
than the terminal, no float noise or scientific notation, no path said twice on a
line, the project's own words (severity words, the standard's axis spelling,
where a check happens), and one finding per line when the output is not a
terminal (no COLUMNS).

The demo study is slicetime's invented one (``pipelines.demo``). Widths follow
the rule documented in ``interfaces/screen.py``: COLUMNS, else the terminal, else
no limit.
"""

from __future__ import annotations

import json
import math
import re
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from slicetime.interfaces import screen
from slicetime.interfaces.cli import cli
from slicetime.interfaces.report_json import run_object
from slicetime.numbers import duration, json_float, json_time, ms, plain, secs
from slicetime.pipelines.audit import RunResult
from slicetime.pipelines.demo import build_demo_dataset
from slicetime.rules import check_run
from slicetime.words import count, with_article
from tests.factories import header_info, record

WIDTHS = (80, 120)
MS_RUN = "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz"  # SliceTiming in ms
SHOWN = (
    MS_RUN,
    "sub-01/ses-1/func/sub-01_ses-1_task-tone_bold.nii.gz",   # sparse (DelayTime)
    "sub-01/ses-1/func/sub-01_ses-1_task-chirp_bold.nii.gz",  # multiband, undeclared
    "sub-02/ses-1/func/sub-02_ses-1_task-rest_bold.nii.gz",   # header TR in ms
    "sub-03/ses-1/func/sub-03_ses-1_task-hum_bold.nii.gz",    # overriding participant
    "sub-03/ses-2/func/sub-03_ses-2_task-tone_bold.nii.gz",   # cut short
)
#: 7 or more decimals: float noise (0.44999999999999996, 2.3611109999999997)
NOISE = re.compile(r"\d\.\d{7,}")
#: scientific notation (1.389e+05)
SCIENTIFIC = re.compile(r"\d[eE][+-]?\d")
#: a run or sidecar path on a line
PATH = re.compile(r"[\w./-]*/[\w.-]+\.(?:nii\.gz|nii|json)")
#: labels this issue replaced
OLD_WORDS = re.compile(r"\b(ERR|WRN|NTE)\b|checked on: reader|\bk \(\+\)|\bk\+|"
                       r"1 entry that are|\ba image\b|1 finding ignored by the lab policy are")


def run_cli(*args: object, columns: int | None) -> tuple[int, str]:
    env = {"COLUMNS": str(columns)} if columns is not None else {}
    result = CliRunner(env=env).invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result.exit_code, result.stdout


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("screens") / "quiet-rooms"
    build_demo_dataset(root)
    return root


@pytest.fixture(scope="module")
def screens(study: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], str]:
    """Every command's output at each width, by (name, width)."""
    work = tmp_path_factory.mktemp("screens-work")
    copy = work / "fixed"
    shutil.copytree(study, copy)
    assert run_cli("fix", copy, "--apply", "--backup-dir", work / "bk", columns=None)[0] == 0
    out: dict[tuple[str, int], str] = {}
    for width in WIDTHS:
        out["audit", width] = run_cli("audit", study, "--no-progress", columns=width)[1]
        out["audit --all", width] = run_cli("audit", study, "--all", "--no-progress",
                                            columns=width)[1]
        out["audit --hide-notes", width] = run_cli("audit", study, "--hide-notes",
                                                   "--no-progress", columns=width)[1]
        for rel in SHOWN:
            out[f"show {rel}", width] = run_cli("show", study / rel, columns=width)[1]
        out["fix", width] = run_cli("fix", study, columns=width)[1]
        out["correct", width] = run_cli("correct", copy, "--out", work / f"out{width}",
                                        columns=width)[1]
        out["explain --list", width] = run_cli("explain", "--list", columns=width)[1]
        for code in ("timing/units-ms", "verify/contradicted", "header/tr-disagrees",
                     "batch/worker-lost", "dataset/outlier-scheme"):
            out[f"explain {code}", width] = run_cli("explain", code, columns=width)[1]
        out["timing", width] = run_cli("timing", "--slices", "16", "--tr", "3", "--delay-time",
                                       "1.5", "--order", "interleaved", columns=width)[1]
    return out


@pytest.fixture(scope="module")
def verify_screens(study: Path) -> dict[int, str]:
    """audit --verify reads image data: once per width, on the overriding participant."""
    return {width: run_cli("audit", study / "sub-03", "--verify", "--no-progress",
                           columns=width)[1] for width in WIDTHS}


@pytest.fixture(scope="module")
def demo_screens(tmp_path_factory: pytest.TempPathFactory) -> dict[int, str]:
    """The guided tour (every screen in one), at each width."""
    work = tmp_path_factory.mktemp("demo")
    return {width: run_cli("demo", "--out", work / str(width), columns=width)[1]
            for width in WIDTHS}


def every_screen(screens: dict[tuple[str, int], str], verify_screens: dict[int, str],
                 demo_screens: dict[int, str] | None = None) -> list[tuple[str, int, str]]:
    shown = [(name, width, text) for (name, width), text in screens.items()]
    shown += [("audit --verify", width, text) for width, text in verify_screens.items()]
    shown += [("demo", width, text) for width, text in (demo_screens or {}).items()]
    return shown


def test_no_line_is_wider_than_the_terminal(screens: dict[tuple[str, int], str],
                                            verify_screens: dict[int, str],
                                            demo_screens: dict[int, str]) -> None:
    for name, width, text in every_screen(screens, verify_screens, demo_screens):
        assert text.strip(), name
        for line in text.splitlines():
            # a command the user is told to paste is whole on its own line, whatever
            # the width (screen.split_pasteable)
            assert len(line) <= width or line.lstrip().startswith(
                ("--accept ", "slicetime correct ")), \
                (name, width, line)
            assert line == line.rstrip(), (name, width, "trailing spaces", line)


def test_no_float_noise_and_no_scientific_notation(screens: dict[tuple[str, int], str],
                                                   verify_screens: dict[int, str]) -> None:
    for name, width, text in every_screen(screens, verify_screens):
        if name.startswith("fix"):
            # a diff shows the sidecar's own bytes: the "-" lines are the user's file as it
            # is; the "+" lines are what slicetime writes and must be clean
            text = "\n".join(line for line in text.splitlines() if not line.startswith("-"))
        assert not NOISE.search(text), (name, width, NOISE.search(text))
        assert not SCIENTIFIC.search(text), (name, width, SCIENTIFIC.search(text))


def test_no_line_says_a_path_twice(screens: dict[tuple[str, int], str],
                                   verify_screens: dict[int, str],
                                   demo_screens: dict[int, str]) -> None:
    for name, width, text in every_screen(screens, verify_screens, demo_screens):
        for line in text.splitlines():
            paths = PATH.findall(line)
            assert len(paths) == len(set(paths)), (name, width, line)
    # the verify lines name the run once: the run's heading, not the message again
    for text in verify_screens.values():
        assert "verify/" in text
        for line in text.splitlines():
            if "verify/" in line:
                assert ".nii.gz" not in line, line


def test_the_projects_own_words(screens: dict[tuple[str, int], str],
                                verify_screens: dict[int, str]) -> None:
    for name, width, text in every_screen(screens, verify_screens):
        assert not OLD_WORDS.search(text), (name, width, OLD_WORDS.search(text))
    audit = screens["audit", 120]
    head = audit.splitlines()[0].split()
    assert head[:2] == ["run", "group"] and {"errors", "warnings", "notes"} <= set(head)
    assert "task and acquisition" not in audit.splitlines()[0]
    # the severity words in front of findings
    assert re.search(r"^  error    timing/units-ms", audit, re.M)
    assert re.search(r"^  note     scheme/multiband-undeclared", audit, re.M)
    # --hide-notes hides the notes column too (the summary line still counts them)
    hidden = screens["audit --hide-notes", 120]
    assert "notes" not in hidden.splitlines()[0] and " note " not in hidden
    assert hidden.splitlines()[-1] == audit.splitlines()[-1]
    # the slice axis as SliceEncodingDirection spells it
    assert re.search(r"^slice axis\s+k$", screens[f"show {MS_RUN}", 120], re.M)
    # where a check happens, in words
    assert "checked: in the image data" in screens["explain verify/contradicted", 120]
    assert "checked: in the batch" in screens["explain batch/worker-lost", 120]
    assert "checked: across the dataset" in screens["explain dataset/outlier-scheme", 120]


def test_millisecond_run_reads_in_seconds_and_rounds_like_the_html(
        screens: dict[tuple[str, int], str]) -> None:
    text = " ".join(screens[f"show {MS_RUN}", 120].split())
    # 18 slices ascending over 2.5 s: one every 2500/18 ms = 138.888… ms, shown with 2
    # decimals (common practice (no source): N slices evenly over a TR are TR/N apart)
    assert "one excitation every 138.89 ms" in text
    assert "2.5 s" in text and "2361.11" in text


def test_wrapped_findings_keep_their_indentation(screens: dict[tuple[str, int], str]) -> None:
    lines = screens["audit", 80].splitlines()
    start = next(i for i, line in enumerate(lines) if "timing/units-ms" in line)
    block = []
    for line in lines[start + 1:]:
        if not line.startswith("      "):
            break
        block.append(line)
    assert any(line.lstrip().startswith("at ") for line in block)
    assert any(line.lstrip().startswith("→ ") for line in block)
    # the message continues under the code, never at the left margin
    assert len(block) >= 3


def test_without_a_terminal_each_finding_stays_on_one_line(study: Path) -> None:
    _, text = run_cli("audit", study, "--no-progress", columns=None)
    _, report_text = run_cli("audit", study, "--format", "json", columns=None)
    report = json.loads(report_text)
    lines = text.splitlines()
    for run in report["runs"]:
        for f in run["findings"]:
            message = screen.strip_path_prefix(f["message"], f["file"], run["path"])
            wanted = f"{f['severity']:<7}  {f['code']}  {message}"
            assert any(line.strip().startswith(wanted.strip()) for line in lines), wanted


# --------------------------------------------------------------------------- numbers


def decimals(text: str) -> int:
    return len(text.split(".", 1)[1]) if "." in text else 0


@settings(max_examples=300, deadline=None)
@given(st.floats(min_value=-1e7, max_value=1e7, allow_nan=False, allow_infinity=False))
def test_json_times_have_at_most_6_decimals(value: float) -> None:
    text = repr(json_time(value))
    if "e" not in text:
        assert decimals(text) <= 6
    assert abs(json_time(value) - value) <= 5e-7 + 1e-9 * abs(value)  # 1 µs, half either way
    tidy = json_float(value)
    assert math.isclose(tidy, value, rel_tol=1e-11, abs_tol=5.1e-7)
    if "e" not in repr(tidy):
        assert decimals(repr(tidy)) <= 6


@settings(max_examples=300, deadline=None)
@given(st.floats(min_value=0, max_value=1e9, allow_nan=False, allow_infinity=False))
def test_screen_numbers_are_fixed_point_with_bounded_decimals(value: float) -> None:
    for text, most in ((ms(value), 2), (secs(value), 5), (plain(value), 6)):
        number = text.split(" ")[0]
        assert "e" not in number.lower() and decimals(number) <= most, text
    assert duration(value).endswith(" ms" if value < 1 else " s")


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(min_value=0.0, max_value=1.9, allow_nan=False), min_size=3,
                max_size=12))
def test_no_output_has_more_than_6_decimals_for_times(times: list[float]) -> None:
    # noisy times (as arithmetic leaves them) in a sidecar: the run object, its scheme and
    # every finding's evidence carries at most 6 decimals for any time
    noisy = [t + 1e-13 for t in times]
    rec = record({"SliceTiming": noisy, "RepetitionTime": 2.0},
                 header_info((4, 4, len(noisy), 5)))
    obj = run_object(RunResult(rec, check_run(rec)))
    for value in obj["slice_times"] + (obj["scheme"] or {}).get("group_times", []):
        assert decimals(repr(value)) <= 6
    for f in obj["findings"]:
        for number in re.findall(r"\d+\.\d+", json.dumps(f["evidence"])):
            assert decimals(number) <= 6, (f["code"], number)
        assert not NOISE.search(f["message"]) and not SCIENTIFIC.search(f["message"])


def test_counting_words() -> None:
    # English agreement (common practice, no source)
    assert count(1, "entry") == "1 entry" and count(2, "entry") == "2 entries"
    assert count(0, "run") == "0 runs" and count(1, "run") == "1 run"
    assert with_article("image") == "an image" and with_article("sidecar") == "a sidecar"


def test_paths_are_shortened_in_the_middle_keeping_the_file_name() -> None:
    path = "sub-0123/ses-baseline/func/sub-0123_ses-baseline_task-rest_bold.nii.gz"
    short = screen.shorten_path(path, 60)
    assert len(short) <= 60 and short.endswith("sub-0123_ses-baseline_task-rest_bold.nii.gz")
    assert short.startswith("sub-0123/") and "…" in short
    tiny = screen.shorten_path(path, 20)
    assert len(tiny) <= 20 and "…" in tiny
    assert screen.shorten_path(path, None) == path == screen.shorten_path(path, len(path))


def test_wrapping_never_breaks_a_word_or_a_number_from_its_unit() -> None:
    text = "header pixdim[4] gives a TR of 2500 s, the sidecar RepetitionTime 2.5 s"
    for width in range(20, 60):
        lines = screen.wrap_words(text, width)
        assert all(len(line) <= width for line in lines)
        assert " ".join(lines) == text
        assert not any(line.startswith(("s,", "s ")) or line == "s" for line in lines)


@pytest.mark.parametrize("width", WIDTHS)
def test_dicom_series_screens_fit(tmp_path: Path, width: int) -> None:
    from tests.test_dicom_source import resting_tree

    root, run, _ = resting_tree(tmp_path, None)
    for target in (root / "sourcedata/sub-01/rest", run):
        _, text = run_cli("show", target, columns=width)
        assert "interleaved ascending from 1" in text or "source DICOM series" in text
        for line in text.splitlines():
            assert len(line) <= width and line == line.rstrip(), line
        assert not NOISE.search(text) and not SCIENTIFIC.search(text)
    # the series' own slice times in milliseconds: the mosaic's tile 2 at 0 ms, tile 1 at
    # 1040 ms (MosaicRefAcqTimes of nibabel's csa_slice_norm.dcm, read by pydicom)
    _, series = run_cli("show", root / "sourcedata/sub-01/rest", columns=width)
    assert re.search(r"tile 1\s.*\b1040\b", series) and "time ms" in series


def test_a_command_to_paste_is_whole_on_its_own_line(tmp_path: Path) -> None:
    # POSIX shell (Shell Command Language, 2.3 Token Recognition): a pasted argument
    # must be the exact characters; an ellipsis or a line break inside it makes another
    # path or another command
    from tests.helpers_bids import write_description
    from tests.test_correct import build_run

    root = tmp_path / "ds"
    write_description(root)
    rel = ("sub-03/ses-follow-up-long-session-name/func/"
           "sub-03_ses-follow-up-long-session-name_task-hum_acq-longacquisition_bold.nii.gz")
    # NIfTI-1 (nibabel's slice_order_codes): slice_code 2 is "sequential decreasing",
    # against the sidecar's ascending times: a doubt correct refuses
    build_run(root, rel, [round(0.25 * z, 6) for z in range(8)], slice_code=2,
              slice_duration=0.25)
    code, text = run_cli("correct", root, "--out", tmp_path / "out", columns=80)
    assert code == 1
    expected = f"--accept header/slice-code-mismatch:{rel}"
    commands = [line.strip() for line in text.splitlines() if "--accept" in line]
    assert commands == [expected], text
    # a refused run has no output to show under its shortened path: no blank line
    assert all(line == line.rstrip() for line in text.splitlines()), text
    assert "…" not in commands[0] and "..." not in commands[0]
