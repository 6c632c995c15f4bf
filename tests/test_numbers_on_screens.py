"""Every number a person reads is written by ``slicetime.numbers``: one rule for times
(10 µs: seconds with at most 5 decimals, milliseconds with at most 2), grouped
byte counts with their unit, milliseconds never called seconds, no raw float.

Every screen of the demo study and of a dataset of hostile numbers (float noise,
a header slice_duration stored as float32, milliseconds, a truncated file, a TR in
the wrong unit) is rendered at 80 and 120 columns, and the HTML page's text, and
each is scanned for a number with more digits than the rule allows.
"""

from __future__ import annotations

import html
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.numbers import as_written, grouped, plain, powers, secs, shown, size_words
from slicetime.pipelines.demo import build_demo_dataset
from tests.helpers_bids import write_description, write_run, write_sidecar

WIDTHS = (80, 120)
#: a decimal number and what follows it (its unit, if any)
DECIMAL = re.compile(r"(?<![\w.])(\d[\d,]*)\.(\d+)(\s*(?:ms|µs|s)\b)?")
#: a whole number of 5 or more digits without grouping, before "bytes"
UNGROUPED_BYTES = re.compile(r"(?<![\d,])\d{5,} bytes")
SCIENTIFIC = re.compile(r"\d[eE][+-]?\d")
#: the float32 value of 1/18 s as nibabel stores slice_duration (float noise on screens)
SLICE_DURATION = float(np.float32(1 / 18))


def run_cli(*args: object, columns: int | None) -> str:
    env = {"COLUMNS": str(columns)} if columns is not None else {}
    result = CliRunner(env=env).invoke(cli, [str(a) for a in args], catch_exceptions=False)
    return result.stdout + result.stderr


def build_hostile_numbers(root: Path) -> list[str]:
    """Runs whose values tempt a screen into float noise, wrong units or raw numbers."""
    write_description(root, name="a study of awkward numbers")
    n = 18
    # float noise: i * 0.1 for i in 0..17 as Python adds it up (0.30000000000000004 ...)
    noisy = [0.0]
    for _ in range(n - 1):
        noisy.append(noisy[-1] + 0.1)
    write_sidecar(root, "task-noisy_bold.json", {"RepetitionTime": 2.0000000000000004,
                                                "SliceTiming": noisy})
    write_sidecar(root, "task-ms_bold.json", {"RepetitionTime": 2.5, "SliceTiming":
                                             [i * 2500 / 18 for i in range(n)]})
    write_sidecar(root, "task-header_bold.json", {"RepetitionTime": 1.0})
    write_sidecar(root, "task-cut_bold.json", {"RepetitionTime": 2.0, "SliceTiming": noisy})
    write_sidecar(root, "task-unit_bold.json", {"RepetitionTime": 2.0, "SliceTiming": noisy})
    runs = []
    for sub in ("01", "02", "03"):
        for task in ("noisy", "ms", "header", "unit"):
            rel = f"sub-{sub}/func/sub-{sub}_task-{task}_bold.nii.gz"
            extra: dict = {}
            if task == "header":  # timing from the header only: slice_duration as float32
                extra = {"slice_code": 1, "slice_duration": SLICE_DURATION, "tr": 1.0}
            if task == "unit":  # the header TR in milliseconds labelled seconds
                extra = {"tr": 2000.0}
            write_run(root, rel, (4, 4, n, 6), **extra)
            runs.append(rel)
    cut = write_run(root, "sub-01/func/sub-01_task-cut_bold.nii.gz", (16, 16, n, 40),
                    data=np.random.default_rng(3).integers(-3000, 3000, (16, 16, n, 40))
                    .astype(np.int16))
    cut.write_bytes(cut.read_bytes()[: cut.stat().st_size // 2])
    runs.append("sub-01/func/sub-01_task-cut_bold.nii.gz")
    return runs


def screens_of(root: Path, runs: list[str], work: Path) -> dict[tuple[str, int], str]:
    copy = work / "copy"
    if copy.exists():
        shutil.rmtree(copy)
    shutil.copytree(root, copy)
    out: dict[tuple[str, int], str] = {}
    for width in WIDTHS:
        out["audit", width] = run_cli("audit", root, "--all", "--no-progress", columns=width)
        for rel in runs:
            out[f"show {rel}", width] = run_cli("show", root / rel, columns=width)
        out["fix", width] = run_cli("fix", copy, columns=width)
        out["correct", width] = run_cli("correct", copy, "--out", work / f"out{width}",
                                        columns=width)
        out["correct --force", width] = run_cli("correct", copy, "--force", "--out",
                                                work / f"forced{width}", columns=width)
    page = work / "audit.html"
    run_cli("audit", root, "--html", page, "--quiet", columns=None)
    out["html", 0] = page_text(page)
    return out


def page_text(page: Path) -> str:
    """What a person reads on the page: its text, and the strings its script shows."""
    text = page.read_text(encoding="utf-8")
    shown: list[str] = []
    for data in re.findall(r'<script type="application/json"[^>]*>(.*?)</script>', text, re.S):
        def strings(value: object) -> None:
            if isinstance(value, str):
                shown.append(value)
            elif isinstance(value, dict):
                for v in value.values():
                    strings(v)
            elif isinstance(value, list):
                for v in value:
                    strings(v)
        strings(json.loads(data))
    body = re.sub(r"<script.*?</script>|<style.*?</style>|<svg.*?</svg>|<symbol.*?</symbol>",
                  " ", text, flags=re.S)
    body = html.unescape(re.sub(r"<[^>]+>", " ", body))
    return body + "\n" + "\n".join(shown)


def number_problems(text: str) -> list[str]:
    """Numbers that break the rule (see the module docstring)."""
    problems = []
    for line in text.splitlines():
        if line.startswith(("+", "-")) and not line.startswith(("+++", "---")):
            # a diff line is the sidecar's JSON: what slicetime writes there is rounded
            # to 1 µs (6 decimals); the "-" lines are the user's own bytes
            if line.startswith("+"):
                problems += [m.group(0) for m in DECIMAL.finditer(line) if len(m.group(2)) > 6]
            continue
        for m in DECIMAL.finditer(line):
            decimals, unit = len(m.group(2)), (m.group(3) or "").strip()
            allowed = 2 if unit == "ms" else 5
            if decimals > allowed:
                problems.append(f"{m.group(0)!r} in {line.strip()!r}")
        problems += [f"{m.group(0)!r} in {line.strip()!r}" for m in UNGROUPED_BYTES.finditer(line)]
        problems += [f"{m.group(0)!r} in {line.strip()!r}" for m in SCIENTIFIC.finditer(line)]
    return problems


@pytest.fixture(scope="module")
def demo_screens(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], str]:
    work = tmp_path_factory.mktemp("numbers-demo")
    root = work / "quiet-rooms"
    build_demo_dataset(root)
    runs = sorted(str(p.relative_to(root)) for p in root.rglob("*_bold.nii.gz"))[:6]
    out = screens_of(root, runs, work)
    for width in WIDTHS:
        out["demo", width] = run_cli("demo", "--out", work / f"demo{width}", columns=width)
    return out


@pytest.fixture(scope="module")
def hostile_screens(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[str, int], str]:
    work = tmp_path_factory.mktemp("numbers-hostile")
    root = work / "awkward"
    runs = build_hostile_numbers(root)
    return screens_of(root, runs, work)


def test_demo_screens_write_numbers_by_the_rule(demo_screens: dict) -> None:
    for (name, width), text in demo_screens.items():
        assert text.strip(), name
        assert not number_problems(text), (name, width, number_problems(text)[:5])


def test_hostile_screens_write_numbers_by_the_rule(hostile_screens: dict) -> None:
    for (name, width), text in hostile_screens.items():
        assert text.strip(), name
        assert not number_problems(text), (name, width, number_problems(text)[:5])


def test_hostile_values_are_shown_as_numbers_does(hostile_screens: dict) -> None:
    audit = " ".join(hostile_screens["audit", 120].split())
    # slice_duration as the header stores it (float32 of 1/18 s) is written by secs()
    assert f"slice_duration {secs(SLICE_DURATION)}" in audit
    assert str(SLICE_DURATION) not in audit
    # the header TR in milliseconds is never called seconds
    assert "2000 s" not in audit and f"TR of {as_written(2000.0)} (labelled seconds" in audit
    # a truncated file: byte counts grouped, with their unit (size_words)
    assert re.search(r"holds \d{1,3}(,\d{3})+ bytes but the header implies "
                     r"\d{1,3}(,\d{3})+ bytes", audit)
    # the millisecond timing that correct refuses is not called seconds
    forced = " ".join(hostile_screens["correct --force", 120].split())
    assert "looks like milliseconds" in forced
    assert not re.search(r"run from [\d.,]+ to [\d.,]{5,} s", forced)


def test_the_number_rules() -> None:
    # the rules themselves, checked against Python's own formatting (format spec mini-
    # language, "," option: thousands separated by commas)
    assert grouped(109400) == f"{109400:,}" == "109,400" and grouped(2048) == "2048"
    assert size_words(221536) == "221,536 bytes" and size_words(1) == "1 byte"
    assert as_written(2361.111111) == "2361.11" and as_written(1e9) == f"{10**9:,}"
    assert secs(0.703125) == "0.70312 s"  # 10 µs: round half to even, as format() does
    # a double holds 15 to 17 significant decimal digits (IEEE 754 binary64): a huge
    # value (a SliceTiming entry of 1e308 in a sidecar) is not written out as 309
    # digits of noise, but as a power of ten (powers, below)
    assert secs(1e308) == "1 × 10^308 s"
    assert as_written(1e308) == plain(1e308) == shown(1e308) == "1 × 10^308"
    assert as_written(-1e300) == "-1 × 10^300"
    assert as_written(1e12) == f"{10**12:,}"  # below that, grouped digits as before
    assert not number_problems("slice_duration 0.05556 s, 138.89 ms, 109,400 bytes")
    assert number_problems("slice_duration 0.0555555559694767 s")
    assert number_problems("138.889 ms") and number_problems("109400 bytes")


def test_huge_and_tiny_values_are_written_as_powers_of_ten() -> None:
    # mantissa and exponent as Python's "e" presentation type rounds them (format spec
    # mini-language), written "m × 10^e" instead of "me+e"
    for value in (1e39, -1e300, 9.99999999e38, 1.5e15, 2.5e-9, 5.551115123125783e-17):
        mantissa, _, exponent = f"{value:.5e}".partition("e")
        words = powers(value)
        assert words.endswith(f" × 10^{int(exponent)}") and "e" not in words
        assert float(words.split(" × ")[0]) == float(mantissa)
    assert powers(9.99999999e38) == "1 × 10^39"  # the rounding carries into the exponent
    # a header's scl_slope of 1e39 (NIfTI-2 stores it as a double, nifti2.h) in the
    # scaling refusal; the float32 limit as numpy gives it (IEEE 754 binary32 max
    # 3.4028235e38), two digits, as readers.scratch.float32_range writes it
    assert plain(1e39) == as_written(1e39) == shown(1e39) == "1 × 10^39"
    assert plain(float(np.finfo(np.float32).max), 2) == "3.4 × 10^38"
    from slicetime.readers.scratch import float32_range
    assert float32_range() == f"±{plain(float(np.finfo(np.float32).max), 2)}"
    # a non-zero value that 6 decimals would write as 0 (a slope of 2.5e-9) is not 0;
    # a time keeps the screens' 10 µs, so float noise in seconds is still 0 s
    assert plain(2.5e-9) == as_written(2.5e-9) == "2.5 × 10^-9"
    assert plain(-2.5e-9) == "-2.5 × 10^-9" and plain(0.0) == "0"
    assert secs(5.551115123125783e-17) == "0 s" and shown(5.551115123125783e-17) == "0"
    assert plain(0.000001) == "0.000001"  # from 1 µs on, fixed decimals as before
    assert not number_problems(f"scl_slope {plain(1e39)}") and number_problems("scl_slope 1e+39")
