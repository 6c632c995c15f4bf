"""The HTML audit report: structure, drawings, escaping, and a real browser.

References:

- HTML structure is read back with Python's ``html.parser`` (the standard
  library's tokenizer for the HTML standard), an independent parser.
- URL-bearing attributes (``src``, ``href``, ``xlink:href``, ``action``,
  ``poster``, ``data``, ``srcset``, ``formaction``) and CSS ``url(...)`` are
  where an HTML page can load something (HTML and CSS standards, from memory).
- The script's hash in the Content-Security-Policy is ``sha256-`` followed by
  the base64 of the SHA-256 of the script element's text (Content Security
  Policy Level 2, from memory).
- The browser checks run headless Chromium (Debian's ``chromium`` package): its
  DOM after scripts (``--dump-dom``) and its screenshot (a PNG, decoded with
  matplotlib's PNG reader).
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import re
import shutil
import subprocess
from collections import Counter, defaultdict
from collections.abc import Iterator
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.interfaces.plots import diagram_spec, render_svg
from slicetime.interfaces.report_html import render_html
from slicetime.interfaces.safe_text import xml_safe
from slicetime.model import SliceSchedule
from slicetime.pipelines.audit import AuditResult, RunResult, audit_paths
from slicetime.schemes.generate import Protocol, slice_timing
from tests.factories import header_info
from tests.factories import record as make_record
from tests.helpers_bids import write_description, write_run, write_sidecar

SHAPE = (4, 4, 10, 5)
TR = 2.0
CLEAN = [f"sub-0{i}/func/sub-0{i}_task-tap_bold.nii.gz" for i in (1, 2, 3, 4)]
OUTLIER = "sub-05/func/sub-05_task-tap_bold.nii.gz"  # descending, among interleaved runs
MS = "sub-06/func/sub-06_task-tap_bold.nii.gz"  # SliceTiming in milliseconds
SHORT = "sub-07/func/sub-07_task-tap_bold.nii.gz"  # 9 entries for 10 slices
MB = "sub-08/func/sub-08_task-hum_bold.nii.gz"  # multiband x2
PAUSE = "sub-09/func/sub-09_task-hum_bold.nii.gz"  # one long gap
BROKEN = "sub-11/func/sub-11_task-tap_bold.nii.gz"  # not a NIfTI file
#: markup, an event handler, both quotes, terminal controls (not a BIDS name: a run
#: because its own sidecar has SliceTiming); a byte that is not UTF-8 is added on disk
HOSTILE_STEM = "sub-10/func/x<script>alert(1)<img src=x onerror=alert(2)>\"q' \x1b[2J\x07"


def _interleaved() -> list[float]:
    return slice_timing(Protocol(n_slices=10, order="interleaved", repetition_time=TR))


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("html") / "ds"
    write_description(root)
    st = _interleaved()
    write_sidecar(root, "task-tap_bold.json", {"RepetitionTime": TR, "SliceTiming": st})
    for path in CLEAN:
        write_run(root, path, shape=SHAPE, tr=TR)
    descending = slice_timing(
        Protocol(n_slices=10, order="sequential", ascending=False, repetition_time=TR)
    )
    write_run(root, OUTLIER, shape=SHAPE, tr=TR, sidecar={"SliceTiming": descending})
    write_run(root, MS, shape=SHAPE, tr=TR, sidecar={"SliceTiming": [t * 1000 for t in st]})
    write_run(root, SHORT, shape=SHAPE, tr=TR, sidecar={"SliceTiming": st[:9]})
    mb = slice_timing(Protocol(n_slices=10, order="interleaved", multiband=2, repetition_time=TR))
    write_run(
        root,
        MB,
        shape=SHAPE,
        tr=TR,
        sidecar={"RepetitionTime": TR, "SliceTiming": mb, "MultibandAccelerationFactor": 2},
    )
    pause = [0.0, 0.1, 0.2, 0.3, 0.4, 0.9, 1.0, 1.1, 1.2, 1.3]
    write_run(root, PAUSE, shape=SHAPE, tr=TR, sidecar={"RepetitionTime": TR, "SliceTiming": pause})
    broken = root / BROKEN
    broken.parent.mkdir(parents=True)
    broken.write_bytes(b"this is not an image" * 30)
    hostile = write_run(
        root,
        HOSTILE_STEM + "_bold.nii.gz",
        shape=SHAPE,
        tr=TR,
        sidecar={"RepetitionTime": TR, "SliceTiming": st},
    )
    folder = os.fsencode(hostile.parent)
    stem = os.fsencode(hostile.name[: -len("_bold.nii.gz")])
    try:  # a file-name byte that is not UTF-8 as well
        os.rename(hostile, folder + b"/" + stem + b"\xff_bold.nii.gz")
        os.rename(
            hostile.with_name(hostile.name.replace(".nii.gz", ".json")),
            folder + b"/" + stem + b"\xff_bold.json",
        )
    except OSError:  # pragma: no cover - file systems that require UTF-8 names
        pass
    return root


@pytest.fixture(scope="module")
def audited(dataset: Path) -> AuditResult:
    return audit_paths([dataset])


@pytest.fixture(scope="module")
def report(dataset: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("out") / "report.html"
    result = CliRunner().invoke(
        cli, ["audit", str(dataset), "--html", str(out)], catch_exceptions=False
    )
    assert result.exit_code == 1, result.output  # errors present: the audit's exit code
    return out, out.read_text(encoding="utf-8")


# --------------------------------------------------------------------------- parsing


@dataclass
class Page:
    """What the parser saw."""

    runs: dict[str, dict[str, str]] = field(default_factory=dict)  # section id -> attrs
    run_paths: dict[str, str] = field(default_factory=dict)  # section id -> shown path
    run_uses: dict[str, list[str]] = field(default_factory=lambda: defaultdict(list))
    symbols: list[str] = field(default_factory=list)
    ids: Counter[str] = field(default_factory=Counter)
    tags: Counter[str] = field(default_factory=Counter)
    references: list[tuple[str, str, str]] = field(default_factory=list)  # tag, attr, value
    styles: list[str] = field(default_factory=list)  # style attributes and <style> text
    scripts: list[str] = field(default_factory=list)  # scripts a browser runs
    data: list[str] = field(default_factory=list)  # <script type="application/json"> text
    elements: dict[str, dict[str, str]] = field(default_factory=dict)  # id -> attrs
    options: list[str] = field(default_factory=list)
    meta: list[dict[str, str]] = field(default_factory=list)


URL_ATTRIBUTES = {"src", "href", "xlink:href", "action", "poster", "data", "srcset", "formaction"}


class ReportParser(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.page = Page()
        self._run: str | None = None
        self._depth = 0  # open <details> inside the current run section
        self._capture: str | None = None  # "path" | "script" | "style"
        self._text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        page = self.page
        page.tags[tag] += 1
        if "id" in a:
            page.ids[a["id"]] += 1
            page.elements[a["id"]] = {"tag": tag, **a}
        for key, value in a.items():
            if key in URL_ATTRIBUTES:
                page.references.append((tag, key, value))
            if key == "style":
                page.styles.append(value)
        if tag == "meta":
            page.meta.append(a)
        if tag == "option":
            page.options.append(a.get("value", ""))
        if tag == "symbol":
            page.symbols.append(a["id"])
        if tag == "details":
            if "run" in a.get("class", "").split():
                self._run, self._depth = a["id"], 0
                page.runs[a["id"]] = a
            elif self._run is not None:
                self._depth += 1
        if tag == "use" and self._run is not None:
            page.run_uses[self._run].append(a.get("href", ""))
        if tag == "code" and "path" in a.get("class", "").split() and self._run is not None:
            self._capture, self._text = "path", []
        if tag == "script" and a.get("type") == "application/json":
            self._capture, self._text = "data", []
        elif tag in ("script", "style"):
            self._capture, self._text = tag, []

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.handle_starttag(tag, attrs)

    def handle_endtag(self, tag: str) -> None:
        if tag == "details" and self._run is not None:
            if self._depth:
                self._depth -= 1
            else:
                self._run = None
        if self._capture == "path" and tag == "code":
            assert self._run is not None
            self.page.run_paths[self._run] = "".join(self._text)
            self._capture = None
        elif self._capture == "data" and tag == "script":
            self.page.data.append("".join(self._text))
            self._capture = None
        elif self._capture == "script" and tag == "script":
            self.page.scripts.append("".join(self._text))
            self._capture = None
        elif self._capture == "style" and tag == "style":
            self.page.styles.append("".join(self._text))
            self._capture = None

    def handle_data(self, data: str) -> None:
        if self._capture:
            self._text.append(data)


def parse(text: str) -> Page:
    parser = ReportParser()
    parser.feed(text)
    parser.close()
    return parser.page


@dataclass
class DataRun:
    """One run as the page's embedded data describes it (layout: report_html._page_data)."""

    index: int
    path: str
    drawing: str  # the id of its <symbol>
    counts: tuple[int, int, int]
    codes: list[str]


def page_runs(page: Page) -> list[DataRun]:
    # json (the standard library's parser) reads the data block back
    assert len(page.data) == 1
    data = json.loads(page.data[0])
    strings = data["s"]
    return [
        DataRun(i, strings[r[0]], data["drawings"][r[2]][0], (r[3], r[4], r[5]),
                [strings[f[0]] for f in r[10]])
        for i, r in enumerate(data["runs"])
    ]


def schedule_key(result: RunResult) -> tuple[object, ...]:
    """The test's own notion of "the same picture": times at 0.1 ms, window, axis."""
    schedule = result.record.schedule
    if schedule is None:
        return (
            "none",
            result.record.header is None,
            tuple(p.code for p in result.record.timing_problems),
        )
    scheme = result.record.scheme
    # SliceTiming read as milliseconds is drawn in seconds, as the terminal draws it
    factor = 0.001 if scheme is not None and scheme.evidence.get("assumed_unit") == "ms" else 1
    return (
        tuple(round(t * factor, 4) for t in schedule.times),
        schedule.acquisition_window,
        schedule.axis,
        schedule.direction,
    )


def section_of(page: Page, audited: AuditResult, path: str) -> str:
    """The id of the section the page's script creates for ``path``."""
    shown = xml_safe(path)
    return next(f"run-{r.index + 1}" for r in page_runs(page) if r.path == shown)


# --------------------------------------------------------------------------- structure


def test_every_run_is_named_once(report: tuple[Path, str], audited: AuditResult) -> None:
    page = parse(report[1])
    runs = page_runs(page)
    # each run appears once in the page's data, under its path escaped for display exactly
    # as the other reports do; no section is pre-rendered (the script creates them)
    expected = Counter(xml_safe(r.record.path) for r in audited.runs)
    assert Counter(r.path for r in runs) == expected
    assert len(runs) == len(audited.runs) == 11
    assert page.runs == {}
    by_path = {xml_safe(r.record.path): r for r in audited.runs}
    for run in runs:
        findings = by_path[run.path].findings
        assert run.counts == tuple(
            sum(1 for f in findings if f.severity.value == s) for s in ("error", "warning", "note"))
        assert sorted(run.codes) == sorted(f.code for f in findings)


def test_one_drawing_per_distinct_schedule(report: tuple[Path, str], audited: AuditResult) -> None:
    page = parse(report[1])
    keys = {xml_safe(r.record.path): schedule_key(r) for r in audited.runs}
    # clean interleaved (4 runs + the hostile one + the ms one, drawn in seconds),
    # descending, short list, multiband, pause, unreadable
    assert len(set(keys.values())) == 6
    # the short list and the unreadable run have no usable timing: no drawing (no empty
    # box), and they are not counted as diagrams
    undrawn = {xml_safe(r.record.path) for r in audited.runs
               if diagram_spec(r.record).kind != "schedule"}
    assert len({keys[p] for p in undrawn}) == 2
    assert len(page.symbols) == 4 == len(set(page.symbols))
    assert "4</span><span class=\"what\">distinct timing diagrams" in report[1]
    drawing_of_key: dict[tuple[object, ...], str] = {}
    for run in page_runs(page):
        if run.path in undrawn:
            assert run.drawing == ""
            continue
        assert run.drawing in page.symbols
        # equal schedules share one drawing, different ones never do
        assert drawing_of_key.setdefault(keys[run.path], run.drawing) == run.drawing
    assert len(set(drawing_of_key.values())) == len(drawing_of_key)
    assert set(drawing_of_key.values()) == set(page.symbols)
    assert [i for i, n in page.ids.items() if n > 1] == []


def test_no_external_references(report: tuple[Path, str]) -> None:
    text = report[1]
    page = parse(text)
    assert page.references, "the parser saw no references at all"
    for tag, attr, value in page.references:
        # only fragments within the page, or data: URLs, may be referenced
        assert value.startswith("#") or value.startswith("data:"), (tag, attr, value)
    for css in page.styles:
        for target in re.findall(r"url\(\s*['\"]?([^'\")]*)", css):
            assert target.startswith("#") or target.startswith("data:"), target
        assert "@import" not in css and "@font-face" not in css
    for forbidden in ("link", "iframe", "object", "embed", "img", "base", "frame"):
        assert page.tags[forbidden] == 0, forbidden
    assert not re.search(r"\b(?:https?|file|ftp):|//[a-z0-9.-]+\.[a-z]{2,}/", text, re.I)


def test_policy_allows_only_the_page_script(report: tuple[Path, str]) -> None:
    page = parse(report[1])
    assert len(page.scripts) == 1  # the data never adds a script a browser would run
    # the data block cannot end its element early or open a comment (HTML standard:
    # script data ends at "</script"; from memory)
    assert len(page.data) == 1 and "<" not in page.data[0]
    policy = next(
        m["content"]
        for m in page.meta
        if m.get("http-equiv", "").lower() == "content-security-policy"
    )
    # CSP Level 2: 'sha256-' + base64(SHA-256(script text)); default-src 'none' blocks loads
    digest = base64.b64encode(hashlib.sha256(page.scripts[0].encode("utf-8")).digest())
    assert f"'sha256-{digest.decode()}'" in policy
    assert "default-src 'none'" in policy
    assert "unsafe-inline" not in policy.split("script-src")[1].split(";")[0]
    # the script is the shipped file, byte for byte, and the style holds the shipped one
    from importlib import resources

    data = resources.files("slicetime").joinpath("data")
    assert page.scripts[0].encode("utf-8") == data.joinpath("report.js").read_bytes()
    assert data.joinpath("report.css").read_text("utf-8") in "".join(page.styles)


def test_the_page_files_are_package_data() -> None:
    """An installed wheel has report.css and report.js: every file under slicetime/data
    matches a pattern of [tool.setuptools.package-data] (setuptools' glob patterns)."""
    import fnmatch

    try:
        import tomllib
    except ImportError:  # Python 3.10
        import tomli as tomllib

    root = Path(__file__).resolve().parents[1]
    patterns = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"][
        "package-data"]["slicetime"]
    shipped = sorted((root / "slicetime" / "data").iterdir())
    assert {"report.css", "report.js"} <= {p.name for p in shipped}
    for path in shipped:
        name = path.relative_to(root / "slicetime").as_posix()
        assert any(fnmatch.fnmatch(name, pattern) for pattern in patterns), name


def test_filter_and_search_controls_exist(report: tuple[Path, str]) -> None:
    page = parse(report[1])
    assert page.elements["severity-filter"]["tag"] == "select"
    assert set(page.options) >= {"all", "error", "warning", "note", "clean"}
    assert page.elements["run-search"]["tag"] == "input"
    assert page.elements["run-search"]["type"] == "search"
    assert "@media print" in "".join(page.styles)


def test_hostile_names_are_escaped(report: tuple[Path, str], audited: AuditResult) -> None:
    text = report[1]
    hostile = next(r.record.path for r in audited.runs if "script" in r.record.path)
    assert "\x1b" in hostile and "\x07" in hostile  # the name really holds controls
    # nothing from the name reaches the page as markup or as a raw control character
    assert "<script>alert" not in text and "<img" not in text
    assert not re.search("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]", text)
    assert "\ufffd" not in text
    page = parse(text)
    assert page.tags["script"] == 2 and len(page.scripts) == 1 and page.tags["img"] == 0
    shown = [r.path for r in page_runs(page) if "script" in r.path]
    # the parser gives the name back as text, with visible escapes for the controls
    assert shown == [xml_safe(hostile)]
    assert "<script>alert(1)<img src=x onerror=alert(2)>\"q'" in shown[0]
    assert "\\x1b[2J\\x07" in shown[0]
    if "\udcff" in hostile:  # the byte that is not UTF-8, as the JSON report shows it
        assert "\\xff" in shown[0]


def test_cli_html_with_other_formats(dataset: Path, tmp_path: Path) -> None:
    out = tmp_path / "r.html"
    json_out = tmp_path / "r.json"
    plain = CliRunner().invoke(cli, ["audit", str(dataset), "--format", "json"])
    both = CliRunner().invoke(
        cli,
        [
            "audit",
            str(dataset),
            "--format",
            "json",
            "--output",
            str(json_out),
            "--html",
            str(out),
            "--fail-on",
            "never",
        ],
    )
    assert both.exit_code == 0 and plain.exit_code == 1
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert json_out.read_text(encoding="utf-8").strip() == plain.stdout.strip()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.html", "r.json"]  # no temp file
    missing = CliRunner().invoke(
        cli, ["audit", str(dataset), "--html", str(tmp_path / "no" / "such" / "dir.html")]
    )
    assert missing.exit_code == 2 and "cannot write the HTML report" in missing.output


def test_overview_and_title(report: tuple[Path, str], audited: AuditResult, dataset: Path) -> None:
    text = report[1]
    page = parse(text)
    overview = text[text.index('id="overview"') : text.index('id="picture"')]
    # the schemes table links an example run of each scheme
    assert f'href="#{section_of(page, audited, CLEAN[0])}"' in overview
    # the outlier's dataset/* finding is in the data the overview's outlier list is made of
    outlier = next(r for r in page_runs(page) if r.path == OUTLIER)
    assert "dataset/outlier-scheme" in outlier.codes
    # the title names the dataset (dataset_description.json Name, else the folder), not "."
    name = json.loads((dataset / "dataset_description.json").read_text())["Name"]
    assert f"<title>slicetime audit · {name}</title>" in text


# --------------------------------------------------------------------------- diagrams


def test_diagram_marks(audited: AuditResult) -> None:
    by_path = {r.record.path: r for r in audited.runs}
    ms = diagram_spec(by_path[MS].record)
    clean = diagram_spec(by_path[CLEAN[0]].record)
    # SliceTiming the audit reads as milliseconds (timing/units-ms) is drawn in seconds, as
    # the terminal draws it: every time divided by 1000, so none lies beyond the TR and the
    # picture is the clean run's (common practice (no source): 1 s = 1000 ms)
    assert ms.late == () and ms.times == clean.times == tuple(round(t, 4) for t in _interleaved())
    assert ms.reference == clean.reference
    st = _interleaved()
    assert clean.late == () and clean.uneven_after == ()
    # the default reference is halfway between the first and the last excitation
    # (DEVELOPERS.md, correction defaults)
    assert clean.reference == pytest.approx((min(st) + max(st)) / 2)
    assert clean.window == TR and clean.window_name == "TR"
    pause = diagram_spec(by_path[PAUSE].record)
    # scanners excite at a fixed interval (common practice, no source): the 0.5 s gap
    # after the fifth excitation (group 4) is the only uneven one
    assert pause.uneven_after == (4,)
    mb = diagram_spec(by_path[MB].record)
    # multiband m=2, N=10: groups of 2 slices N/m = 5 apart (common practice, no source)
    assert all(len(g) == 2 and g[1] - g[0] == 5 for g in mb.groups)
    short = diagram_spec(by_path[SHORT].record)
    assert short.kind == "placeholder" and "9" in short.message
    broken = diagram_spec(by_path[BROKEN].record)
    assert broken.kind == "placeholder" and "could not be read" in broken.message


def test_drawings_are_deterministic_with_prefixed_ids(audited: AuditResult) -> None:
    spec = diagram_spec(audited.runs[0].record)
    first, size = render_svg(spec, "a-")
    again, _ = render_svg(spec, "a-")
    other, _ = render_svg(spec, "b-")
    assert first == again  # svg.hashsalt and no date: byte-identical
    ids_a = re.findall(r'\bid="([^"]+)"', first)
    ids_b = re.findall(r'\bid="([^"]+)"', other)
    assert ids_a and all(i.startswith("a-") for i in ids_a)
    assert not set(ids_a) & set(ids_b)
    refs = re.findall(r'href="#([^"]+)"|url\(#([^)]+)\)', first)
    assert all((a or b) in ids_a for a, b in refs)
    assert size[0] > size[1] > 0


def test_2000_runs_with_5_schemes_give_5_drawings() -> None:
    protocols = [
        Protocol(n_slices=40, order="interleaved", repetition_time=2.0, decimals=4),
        Protocol(n_slices=40, order="sequential", repetition_time=2.0, decimals=4),
        Protocol(n_slices=40, order="sequential", ascending=False, repetition_time=2.0, decimals=4),
        Protocol(n_slices=40, order="interleaved", multiband=4, repetition_time=2.0, decimals=4),
        Protocol(n_slices=40, order="interleaved", start=1, repetition_time=2.0, decimals=4),
    ]
    timings = [slice_timing(p) for p in protocols]
    header = header_info(shape=(8, 8, 40, 20))
    runs = []
    for i in range(2000):
        name = f"sub-{i // 4:04d}/func/sub-{i // 4:04d}_task-t{i % 4}_bold.nii.gz"
        rec = make_record({"RepetitionTime": 2.0, "SliceTiming": timings[i % 5]}, header, name=name)
        runs.append(RunResult(rec, []))
    result = AuditResult(roots=["ds"], runs=runs)
    text = render_html(result, "ds", generated="fixed")
    page = parse(text)
    assert len(page.symbols) == 5
    runs = page_runs(page)
    assert len(runs) == 2000 and {r.drawing for r in runs} == set(page.symbols)
    # each drawing once, each run a short row of data: the page grows by about 100 bytes
    # per run, not by drawings or pre-rendered sections
    assert len(text.encode("utf-8")) < 2000 * 400 + 500_000


# --------------------------------------------------------------------------- browser


def _browser() -> str | None:
    explicit = os.environ.get("SLICETIME_CHROMIUM")
    if explicit:
        return explicit
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


@pytest.fixture()
def browser(tmp_path: Path) -> Iterator[list[str]]:
    binary = _browser()
    if binary is None:
        if os.environ.get("SLICETIME_REQUIRE_BROWSER") == "1":
            pytest.fail("SLICETIME_REQUIRE_BROWSER=1 but no Chromium binary was found")
        pytest.skip("no Chromium binary (set SLICETIME_REQUIRE_BROWSER=1 to require it)")
    profile = tmp_path / "chromium-profile"
    yield [
        binary,
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-dev-shm-usage",
        "--no-first-run",
        "--disable-extensions",
        f"--user-data-dir={profile}",
    ]


def _run_browser(command: list[str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        command, capture_output=True, text=True, timeout=90, check=False, stdin=subprocess.DEVNULL
    )


def _section_tags(dom: str) -> dict[str, str]:
    """The runs table's rows (one per listed run), by id."""
    return {m.group(1): m.group(0)
            for m in re.finditer(r'<tr[^>]*\bclass="run"[^>]*\bid="([^"]+)"[^>]*>', dom)}


def test_browser_runs_the_script_and_filters(
    browser: list[str], report: tuple[Path, str], audited: AuditResult
) -> None:
    path, text = report
    page = parse(text)
    clean_id = section_of(page, audited, CLEAN[0])
    error_id = section_of(page, audited, MS)
    outlier_id = section_of(page, audited, OUTLIER)
    url = path.resolve().as_uri()
    done = _run_browser([*browser, "--dump-dom", url + "#severity=error"])
    assert done.returncode == 0, done.stderr[-2000:]
    dom = done.stdout
    # Chromium's DOM after scripts: the script ran and applied the filter from the fragment
    assert re.search(r'<body[^>]*data-ready="1"', dom)
    sections = _section_tags(dom)
    assert error_id in sections and clean_id not in sections
    errors = sum(1 for r in audited.runs if any(f.severity.value == "error" for f in r.findings))
    assert len(sections) == errors
    assert all('data-worst="error"' in tag for tag in sections.values())
    assert f"{errors} of {len(audited.runs)} runs shown" in dom
    # nothing from a file name became an element
    assert len(re.findall(r"<script\b", dom)) == 2 and "<img" not in dom
    # the picture: one cell per run, linking its section; the outlier list links the outlier
    picture = dom[dom.index('id="picture-table"') : dom.index('id="runs"')]
    for result in audited.runs:
        ident = section_of(page, audited, result.record.path)
        assert picture.count(f'href="#{ident}"') == 1
    assert "sub-05" in picture and "task-tap" in picture
    outliers = dom[dom.index('id="outliers"') : dom.index('id="picture"')]
    assert f'href="#{outlier_id}"' in outliers and "dataset/outlier-scheme" in outliers

    searched = _run_browser([*browser, "--dump-dom", url + "#q=sub-05"])
    sections = _section_tags(searched.stdout)
    assert list(sections) == [outlier_id]

    # a link to one run opens its section, built on demand with its findings and drawing
    opened = _run_browser([*browser, "--dump-dom", url + f"#{error_id}"])
    dom = opened.stdout
    tag = _section_tags(dom)[error_id]
    assert 'data-open="1"' in tag
    body = dom[dom.index(tag) :]
    body = body[: body.index('<tr class="run"', len(tag))] if '<tr class="run"' in body[
        len(tag):] else body
    assert "timing/units-ms" in body and '<use href="#dg-' in body
    assert "where each value came from" in body and "sidecars" in body


def test_browser_opens_a_large_report(browser: list[str], tmp_path: Path) -> None:
    # 20,000 runs: the page stays small and the browser renders it within the test's
    # timeout (the speed itself is measured by benchmarks/bench_audit.py)
    timing = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                                   decimals=4))
    header = header_info(shape=(8, 8, 40, 20))
    base = make_record({"RepetitionTime": 2.0, "SliceTiming": timing}, header,
                       name="sub-0000/func/sub-0000_task-t0_bold.nii.gz")
    from dataclasses import replace

    from slicetime.model import Finding, Severity

    runs = []
    for i in range(20_000):
        name = f"sub-{i // 4:04d}/func/sub-{i // 4:04d}_task-t{i % 4}_bold.nii.gz"
        findings = [Finding("timing/uneven", Severity.WARNING, f"{name}: uneven", name,
                            "SliceTiming")] if i % 10 == 0 else []
        runs.append(RunResult(replace(base, path=name, abs_path=f"/ds/{name}",
                                      entities={"sub": f"{i // 4:04d}", "task": f"t{i % 4}"}),
                              findings))
    result = AuditResult(roots=["/ds"], runs=runs)
    out = tmp_path / "big.html"
    out.write_text(render_html(result, "/ds", generated="fixed"), encoding="utf-8")
    assert out.stat().st_size < 10_000_000
    done = _run_browser([*browser, "--dump-dom", out.resolve().as_uri() + "#severity=warning"])
    assert done.returncode == 0, done.stderr[-2000:]
    assert re.search(r'<body[^>]*data-ready="1"', done.stdout)
    assert "2000 of 20000 runs shown (the first 200 listed)" in done.stdout
    assert len(_section_tags(done.stdout)) == 200


def test_browser_screenshot_is_not_blank(
    browser: list[str], report: tuple[Path, str], tmp_path: Path
) -> None:
    import matplotlib.image

    shot = tmp_path / "shot.png"
    done = _run_browser(
        [
            *browser,
            f"--screenshot={shot}",
            "--window-size=1200,2000",
            "--hide-scrollbars",
            report[0].resolve().as_uri(),
        ]
    )
    assert done.returncode == 0, done.stderr[-2000:]
    assert shot.exists() and shot.stat().st_size > 5000
    pixels = matplotlib.image.imread(str(shot))  # the PNG decoder as the reference reader
    assert pixels.shape[0] == 2000 and pixels.shape[1] == 1200
    rgb = (pixels[..., :3] * 255).astype(np.uint8).reshape(-1, 3)
    colours = np.unique(rgb[::97], axis=0)
    assert len(colours) > 20  # text, cards, chips and the severity colours
    dark = (rgb.sum(axis=1) < 200).mean()
    assert 0.001 < dark < 0.5  # some text, not a black page


def test_schedule_without_window_draws(tmp_path: Path) -> None:
    # neither a TR nor VolumeTiming: no window, still a picture (not a crash)
    schedule = SliceSchedule(times=(0.0, 0.5, 0.25, 0.75))
    rec = make_record({"SliceTiming": [0.0, 0.5, 0.25, 0.75]})
    from dataclasses import replace

    from slicetime.schemes.resolve import timing_of

    spec = diagram_spec(replace(rec, timing=timing_of(schedule)))
    assert spec.kind == "schedule" and spec.window is None
    body, _ = render_svg(spec, "w-")
    assert "window unknown" in body
    # VolumeTiming without a TR: the window is the volume spacing (the one rule,
    # SliceSchedule.window), drawn like any other
    timed = replace(schedule, volume_times=(0.0, 3.0, 6.0))
    spec = diagram_spec(replace(rec, timing=timing_of(timed)))
    assert spec.window == 3.0
    body, _ = render_svg(spec, "w-")
    assert "window unknown" not in body


def _study_of_many_sessions(subjects: int, sessions: int, tasks: int) -> AuditResult:
    """An audit of ``subjects`` × ``sessions`` × ``tasks`` runs (records made in memory)."""
    from dataclasses import replace

    from slicetime.model import Finding, Severity

    timing = slice_timing(Protocol(n_slices=40, order="interleaved", repetition_time=2.0,
                                   decimals=4))
    base = make_record({"RepetitionTime": 2.0, "SliceTiming": timing},
                       header_info(shape=(8, 8, 40, 20)),
                       name="sub-01/ses-1/func/sub-01_ses-1_task-t0_bold.nii.gz")
    runs = []
    for s in range(1, subjects + 1):
        for v in range(1, sessions + 1):
            for t in range(tasks):
                name = (f"sub-{s:02d}/ses-{v}/func/sub-{s:02d}_ses-{v}_task-listening{t}"
                        "_bold.nii.gz")
                findings = [Finding("timing/uneven", Severity.WARNING, "uneven", name,
                                    "SliceTiming")] if (s + t) % 7 == 0 else []
                record = replace(base, path=name, abs_path=f"/ds/{name}",
                                 entities={"sub": f"{s:02d}", "ses": str(v),
                                           "task": f"listening{t}"})
                runs.append(RunResult(record, findings))
    return AuditResult(roots=["/ds"], runs=runs)


@pytest.mark.parametrize("width", [800, 1400])
def test_a_study_of_many_sessions_and_tasks_fits_the_window(
        browser: list[str], tmp_path: Path, width: int) -> None:
    import matplotlib.image

    # 40 subjects × 3 sessions × 6 tasks (issue 28): no sideways scrolling at 800 px,
    # neither of the page nor of the dataset picture
    result = _study_of_many_sessions(40, 3, 6)
    out = tmp_path / "many.html"
    out.write_text(render_html(result, "/ds", generated="fixed"), encoding="utf-8")
    done = _run_browser([*browser, f"--window-size={width},900", "--dump-dom",
                         out.resolve().as_uri()])
    assert done.returncode == 0, done.stderr[-2000:]
    body = re.search(r"<body[^>]*>", done.stdout)
    assert body is not None and 'data-ready="1"' in body.group(0)
    page_width = int(re.search(r'data-page-width="(\d+)"', body.group(0)).group(1))  # type: ignore[union-attr]
    overflow = int(re.search(r'data-picture-overflow="(\d+)"', body.group(0)).group(1))  # type: ignore[union-attr]
    # document.documentElement.scrollWidth (CSSOM View) is at most the window's width
    assert page_width <= width, page_width
    assert overflow == 0, overflow
    # the rows of the picture are subjects' sessions: 120 rows, 6 task columns
    picture = done.stdout[done.stdout.index('id="picture-table"'):]
    picture = picture[: picture.index("</table>")]
    assert picture.count("<tr>") == 40 * 3 + 1
    # a screenshot of that window has the window's size and is not blank
    shot = tmp_path / f"shot{width}.png"
    taken = _run_browser([*browser, f"--window-size={width},1200", "--hide-scrollbars",
                          f"--screenshot={shot}", out.resolve().as_uri()])
    assert taken.returncode == 0, taken.stderr[-2000:]
    pixels = matplotlib.image.imread(str(shot))  # the PNG decoder as the reference reader
    assert pixels.shape[:2] == (1200, width)
    assert len(np.unique((pixels[::13, ::13, :3] * 255).astype(np.uint8).reshape(-1, 3),
                         axis=0)) > 10
