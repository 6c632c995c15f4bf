"""The lab policy file: loading and validation, and applying it to runs and findings.

Expected outcomes follow from the TOML specification (read through tomllib),
JSON Schema (through jsonschema), the BIDS entity definitions (through
bidsschematools) and the policy semantics documented in
the ``slicetime/policy/`` package.
"""

from __future__ import annotations

import fnmatch
import sys
from pathlib import Path
from typing import Any

import jsonschema
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from slicetime.model import Finding, HeaderInfo, RunRecord, Severity
from slicetime.policy.checks import (
    apply_overrides_and_ignores,
    apply_policy,
    check_protocol,
    select_protocol,
)
from slicetime.policy.loading import (
    INDEX_ENTITIES,
    MATCH_KEYS,
    find_policy,
    load_policy,
    parse_policy,
    policy_schema,
)
from slicetime.policy.model import POLICY_FILENAME
from slicetime.policy.patterns import path_matches, path_pattern_problem
from slicetime.readers.errors import ReadError
from slicetime.rules import RULES, check_run, explain
from slicetime.schemes.generate import Protocol, slice_timing
from tests.factories import header_info, record

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

EXAMPLE = """\
# slicetime-policy.toml at the dataset root
version = 1

[[protocols]]
match = { task = "rest", acq = "mb4" }
repetition_time = 0.8
slices = 72
multiband_factor = 4
scheme = "multiband ×4, interleaved ascending from 0"
slice_encoding_direction = "k"
tolerance = 0.003

[levels]
"scheme/multiband-undeclared" = "warning"
"timing/missing" = "error"

[[waive]]
runs = ["sub-pilot*/**"]
findings = ["*"]
reason = "pilot sessions use a test protocol"
"""


def load_text(text: str, file: str = "lab/slicetime-policy.toml") -> Any:
    return parse_policy(text, file=file, known_codes=RULES)


def invalid(text: str) -> ReadError:
    with pytest.raises(ReadError) as caught:
        load_text(text)
    assert caught.value.code == "policy/invalid"
    assert caught.value.message.startswith("lab/slicetime-policy.toml: ")
    assert "\n" not in caught.value.message
    return caught.value


# --------------------------------------------------------------------------- loading


def test_valid_file_is_found_at_the_root_and_loaded(tmp_path: Path) -> None:
    assert find_policy(tmp_path) is None
    path = tmp_path / POLICY_FILENAME
    path.write_text(EXAMPLE, encoding="utf-8")
    assert find_policy(tmp_path) == path
    policy = load_policy(path, RULES, display=POLICY_FILENAME)
    # the values are the TOML document's values (TOML spec, read with tomllib)
    doc = tomllib.loads(EXAMPLE)
    (protocol,) = policy.protocols
    assert dict(protocol.match) == doc["protocols"][0]["match"]
    assert protocol.repetition_time == doc["protocols"][0]["repetition_time"]
    assert protocol.slices == doc["protocols"][0]["slices"]
    assert protocol.multiband_factor == doc["protocols"][0]["multiband_factor"]
    assert protocol.scheme == doc["protocols"][0]["scheme"]
    assert protocol.slice_encoding_direction == "k"
    assert {k: v.value for k, v in policy.severity.items()} == doc["levels"]
    assert policy.ignores[0].reason == doc["waive"][0]["reason"]
    assert policy.file == POLICY_FILENAME
    assert policy.notices == ()


def test_former_key_names_are_read_with_a_note_naming_the_new_ones(tmp_path: Path) -> None:
    # the same policy written with the former names ([severity], [[ignore]] with codes
    # and paths) means the same thing, and the note names every new key
    former = (EXAMPLE.replace("[levels]", "[severity]").replace("[[waive]]", "[[ignore]]")
              .replace("findings = [", "codes = [").replace("runs = [", "paths = ["))
    assert former != EXAMPLE
    old, new = load_text(former), load_text(EXAMPLE)
    assert old.severity == new.severity and old.ignores == new.ignores
    (notice,) = old.notices
    for words in ("[severity] → [levels]", "[[ignore]] → [[waive]]", "codes → findings",
                  "paths → runs"):
        assert words in notice
    # both spellings at once: refused, naming the one to keep
    error = invalid('version = 1\n[severity]\n"timing/missing" = "note"\n'
                    '[levels]\n"timing/missing" = "note"\n')
    assert error.field == "severity" and "[levels]" in error.message
    # the note reaches the report as a finding about the policy file
    from slicetime.policy.loading import FORMER_KEYS_CODE, root_policies

    assert RULES[FORMER_KEYS_CODE].severity is Severity.NOTE
    (tmp_path / POLICY_FILENAME).write_text(former, encoding="utf-8")
    problems: list[Any] = []
    root_policies([tmp_path], None, RULES, problems)
    assert [(f.code, f.file) for f in problems] == [(FORMER_KEYS_CODE, POLICY_FILENAME)]
    assert "[[waive]]" in problems[0].message


def test_shipped_schema_is_draft_2020_12_and_accepts_the_example() -> None:
    schema = policy_schema()
    cls = jsonschema.validators.validator_for(schema)
    assert cls is jsonschema.Draft202012Validator  # jsonschema: $schema selects the draft
    cls.check_schema(schema)
    assert not list(cls(schema).iter_errors(tomllib.loads(EXAMPLE)))

    def closed(node: Any) -> None:  # every table of the format is closed
        if isinstance(node, dict):
            if node.get("type") == "object" and "properties" in node:
                assert node.get("additionalProperties") is False, node
            for value in node.values():
                closed(value)

    closed(schema)


def test_match_keys_are_bids_entities() -> None:
    # BIDS entity definitions (bidsschematools: objects.entities, rules.files.raw)
    from bidsschematools import schema as bids_schema

    bids = bids_schema.load_schema()
    entities = {e["name"]: e.get("format") for e in bids.objects.entities.values()}
    ours = set(MATCH_KEYS) - {"datatype", "suffix"}
    assert ours <= set(entities)
    assert INDEX_ENTITIES == {name for name in ours if entities[name] == "index"}
    raw_mri = set()
    for datatype in ("func", "perf", "dwi", "anat", "fmap"):
        for rule in bids.rules.files.raw[datatype].values():
            raw_mri |= {bids.objects.entities[e]["name"] for e in rule["entities"]}
    assert raw_mri <= ours
    datatypes = policy_schema()["$defs"]["match"]["properties"]["datatype"]["enum"]
    assert set(datatypes) <= set(bids.objects.datatypes)


def test_toml_syntax_error_names_file_line_and_column() -> None:
    # TOML spec: a key without a value is invalid; tomllib reports the position
    text = "version = 1\n[[protocols]]\nrepetition_time =\n"
    with pytest.raises(tomllib.TOMLDecodeError) as reference:
        tomllib.loads(text)
    error = invalid(text)
    assert "line 3" in error.message and "column" in error.message
    assert f"(at line {error.evidence['line']}, column {error.evidence['column']})" in str(
        reference.value
    )


def test_wrong_type_names_the_key_path() -> None:
    # TOML spec: "0.8" in quotes is a string, not a float
    error = invalid(
        'version = 1\n[[protocols]]\nmatch = {task = "rest"}\nrepetition_time = "0.8"\n'
    )
    assert error.field == "protocols[0].repetition_time"
    assert "protocols[0].repetition_time: must be a number greater than 0" in error.message
    # the second entry is named by its position
    error = invalid(
        "version = 1\n[[protocols]]\nmatch = {}\nslices = 3\n"
        '[[protocols]]\nmatch = {task = "rest"}\nrepetition_time = 0\n'
    )
    assert error.field == "protocols[1].repetition_time"


@pytest.mark.parametrize(("tr", "words"), [("0.01", "below the shortest plausible TR"),
                                           ("2000", "above the longest plausible TR")])
def test_a_policy_tr_no_run_can_have_is_refused(tr: str, words: str) -> None:
    # the bounds the audit's tr/implausible and correct's gate judge by
    # (model.implausible_repetition): a policy may not expect such a TR
    error = invalid(f'version = 1\n[[protocols]]\nmatch = {{task = "rest"}}\n'
                    f"repetition_time = {tr}\n")
    assert error.field == "protocols[0].repetition_time"
    assert words in error.message


def test_a_version_of_the_wrong_type_is_named_as_a_type_error() -> None:
    # TOML spec: "1" in quotes is a string, 1.5 a float, true a boolean (tomllib reads
    # them as str, float and bool); the format asks for the integer 1
    for text, kind, shown in (('version = "1"', str, '"1"'), ("version = 1.5", float, "1.5"),
                              ("version = true", bool, "true")):
        assert type(tomllib.loads(text)["version"]) is kind
        error = invalid(text + "\n")
        assert error.field == "version"
        words = {str: "string", float: "float", bool: "boolean"}[kind]
        assert error.message == (f"lab/{POLICY_FILENAME}: version: expected the integer 1, got "
                                 f"the {words} {shown}")
        assert "missing" not in error.message and "\n" not in error.message
    # the right type with another value is a value problem, not a type problem
    assert "must be 1 (found 2, an integer)" in invalid("version = 2\n").message


def test_unknown_keys_are_typos_not_silently_ignored() -> None:
    error = invalid("version = 1\n[[protocols]]\nmatch = {}\nrepetition_tme = 2.0\n")
    assert error.field == "protocols[0].repetition_tme"
    assert "repetition_time" in error.message  # the suggestion
    error = invalid('version = 1\n[[protocols]]\nmatch = {taks = "rest"}\nslices = 3\n')
    assert error.field == "protocols[0].match.taks" and "'task'" in error.message
    error = invalid('version = 1\n[severty]\n"timing/missing" = "error"\n')
    assert error.field == "severty"


def test_unknown_code_and_bad_severity() -> None:
    error = invalid('version = 1\n[levels]\n"timing/mising" = "error"\n')
    assert error.field == 'levels."timing/mising"' and "timing/missing" in error.message
    error = invalid('version = 1\n[levels]\n"nosuch/*" = "note"\n')
    assert "matches no finding code" in error.message
    error = invalid('version = 1\n[levels]\n"timing/missing" = "fatal"\n')
    assert "error, warning, note" in error.message
    error = invalid('version = 1\n[[waive]]\nfindings = ["header/nope"]\nreason = "x"\n')
    assert error.field == "waive[0].findings[0]"


def test_ignore_needs_a_reason() -> None:
    error = invalid('version = 1\n[[waive]]\nfindings = ["*"]\nruns = ["sub-01/**"]\n')
    assert error.field == "waive[0].reason"
    error = invalid('version = 1\n[[waive]]\nfindings = ["*"]\nreason = "   "\n')
    assert error.field == "waive[0].reason"


@pytest.mark.parametrize(
    ("pattern", "why"),
    [
        ("/sub-01/**", "relative"),
        ("sub-**/func", "stand alone"),
        ("sub-0[1/**", "["),
        ("sub-01\\\\func", "forward slashes"),
        ("sub-01//func", "empty"),
    ],
)
def test_bad_path_patterns(pattern: str, why: str) -> None:
    error = invalid(
        f'version = 1\n[[waive]]\nfindings = ["*"]\nruns = ["{pattern}"]\nreason = "x"\n'
    )
    assert error.field == "waive[0].runs[0]" and why in error.message


def test_semantic_problems_of_protocols() -> None:
    base = 'version = 1\n[[protocols]]\nmatch = {task = "rest"}\n'
    assert invalid(base + "slices = 10\nmultiband_factor = 4\n").field == (
        "protocols[0].multiband_factor"
    )
    assert invalid(base + 'scheme = "interleaved ascnding"\n').field == "protocols[0].scheme"
    contradiction = base + 'scheme = "multiband ×4, ascending"\nmultiband_factor = 2\n'
    assert invalid(contradiction).field == "protocols[0].multiband_factor"
    assert invalid(base + "tolerance = 0.01\n").field == "protocols[0]"  # no expectation
    # BIDS: run is an index, so run-1 and run-01 are one run: the same selector twice
    twice = (
        "version = 1\n[[protocols]]\nmatch = {run = 1}\nslices = 3\n"
        '[[protocols]]\nmatch = {run = "01"}\nslices = 4\n'
    )
    assert invalid(twice).field == "protocols[1].match"
    assert invalid("version = 2\n").field == "version"
    assert invalid('[levels]\n"timing/missing" = "error"\n').field == "version"


def test_conflicting_severity_patterns() -> None:
    error = invalid('version = 1\n[levels]\n"header/*" = "note"\n"*/tr-disagrees" = "error"\n')
    assert "header/tr-disagrees" in error.message
    # an exact code settles it
    load_text(
        'version = 1\n[levels]\n"header/*" = "note"\n"*/tr-disagrees" = "error"\n'
        '"header/tr-disagrees" = "warning"\n'
    )


def test_missing_file_keeps_the_file_code(tmp_path: Path) -> None:
    with pytest.raises(ReadError) as caught:
        load_policy(tmp_path / POLICY_FILENAME, RULES)
    assert caught.value.code == "file/missing"


# --------------------------------------------------------------------------- protocol checks

NAME = "sub-01/func/sub-01_task-rest_acq-mb2_bold.nii.gz"
LAB = """\
version = 1
[[protocols]]
match = { task = "rest", acq = "mb2" }
repetition_time = 1.0
slices = 12
multiband_factor = 2
scheme = "multiband ×2, interleaved ascending from 0"
slice_encoding_direction = "k"
"""


def run(
    *,
    slices: int = 12,
    tr: float = 1.0,
    multiband: int = 2,
    order: str = "interleaved",
    header: HeaderInfo | None = None,
    name: str = NAME,
    **metadata: Any,
) -> RunRecord:
    times = slice_timing(
        Protocol(
            n_slices=slices,
            order=order,  # type: ignore[arg-type]
            multiband=multiband,
            repetition_time=tr,
        )
    )
    md: dict[str, Any] = {
        "RepetitionTime": tr,
        "SliceTiming": times,
        "MultibandAccelerationFactor": multiband,
        "SliceEncodingDirection": "k",
    }
    md.update(metadata)
    md = {k: v for k, v in md.items() if v is not None}
    return record(md, header or header_info((4, 4, slices, 5), tr=tr), name=name)


def policy_codes(policy_text: str, rec: RunRecord) -> set[str]:
    return {f.code for f in check_protocol(load_text(policy_text), rec)}


def test_a_run_that_follows_the_protocol_gets_no_policy_finding() -> None:
    rec = run()
    assert rec.scheme is not None and rec.scheme.multiband_factor == 2
    assert policy_codes(LAB, rec) == set()
    # the family spellings of the same order (policy semantics: family ignores multiband)
    for family in ("interleaved", "ascending", "interleaved ascending"):
        text = LAB.replace('"multiband ×2, interleaved ascending from 0"', f'"{family}"')
        assert policy_codes(text, rec) == set(), family


@pytest.mark.parametrize(
    ("code", "violating"),
    [
        ("policy/tr-mismatch", {"tr": 2.0}),
        ("policy/slice-count", {"slices": 10}),
        ("policy/multiband-mismatch", {"multiband": 1, "MultibandAccelerationFactor": None}),
        ("policy/scheme-mismatch", {"order": "sequential"}),
        ("policy/direction-mismatch", {"SliceEncodingDirection": "k-"}),
    ],
)
def test_each_mismatch_fires_on_a_violating_run(code: str, violating: dict[str, Any]) -> None:
    rec = run(**violating)
    found = [f for f in check_protocol(load_text(LAB), rec) if f.code == code]
    assert len(found) == 1, check_protocol(load_text(LAB), rec)
    finding = found[0]
    assert finding.severity is RULES[code].severity is Severity.ERROR
    assert finding.evidence["protocol"] == {"task": "rest", "acq": "mb2"}
    assert finding.evidence["run"] == NAME
    assert finding.evidence["expected"] != finding.evidence["found"]
    assert finding.field and finding.hint
    assert code not in policy_codes(LAB, run())


def test_tr_within_tolerance_and_milliseconds_hint() -> None:
    # default tolerance 0.003 s (documented); 1.002 is within it, 1.01 is not
    assert policy_codes(LAB, run(tr=1.002)) == set()
    assert "policy/tr-mismatch" in policy_codes(LAB, run(tr=1.01))
    loose = LAB + "tolerance = 0.02\n"
    assert policy_codes(loose, run(tr=1.01)) == set()


def test_run_without_schedule_gets_header_checks() -> None:
    # no SliceTiming and no header slice_code: no schedule (resolve precedence)
    header = header_info((4, 4, 10, 5), tr=2.0)
    rec = record({}, header, name=NAME)
    assert rec.schedule is None
    found = {f.code: f for f in check_protocol(load_text(LAB), rec)}
    assert set(found) == {"policy/tr-mismatch", "policy/slice-count"}
    assert found["policy/tr-mismatch"].field == "pixdim[4]"
    assert found["policy/slice-count"].field == "dim[3]"  # NIfTI dim[3] is the k extent
    # declared multiband factor is checked when there are no times
    rec = record({"MultibandAccelerationFactor": 3}, header_info((4, 4, 12, 5), tr=1.0), name=NAME)
    assert policy_codes(LAB, rec) == {"policy/multiband-mismatch"}


def test_missing_direction_is_the_bids_default_k() -> None:
    # BIDS: SliceTiming runs along k when SliceEncodingDirection is absent
    rec = run(SliceEncodingDirection=None)
    assert policy_codes(LAB, rec) == set()
    expects_j = LAB.replace('slice_encoding_direction = "k"', 'slice_encoding_direction = "j"')
    assert policy_codes(expects_j, rec) == {"policy/direction-mismatch"}


def test_most_specific_protocol_wins() -> None:
    text = """\
version = 1
[[protocols]]
match = {}
repetition_time = 2.0
[[protocols]]
match = { task = "rest" }
repetition_time = 1.0
"""
    policy = load_text(text)
    assert select_protocol(policy, run()).protocol == policy.protocols[1]
    assert policy_codes(text, run()) == set()
    other = run(name="sub-01/func/sub-01_task-nback_bold.nii.gz")
    assert policy_codes(text, other) == {"policy/tr-mismatch"}


def test_equally_specific_protocols_that_disagree_are_reported() -> None:
    text = """\
version = 1
[[protocols]]
match = { task = "rest" }
repetition_time = 1.0
[[protocols]]
match = { acq = "mb2" }
repetition_time = 2.0
"""
    assert policy_codes(text, run()) == {"policy/ambiguous-protocol"}
    agreeing = text.replace("repetition_time = 2.0", "repetition_time = 1.0")
    assert policy_codes(agreeing, run()) == set()


def test_selectors_use_bids_index_and_folder_semantics() -> None:
    # BIDS entity definitions: run is an index ("run-01" is run 1)
    text = (
        'version = 1\n[[protocols]]\nmatch = { run = 1, datatype = "func", suffix = "bold" }\n'
        "repetition_time = 2.0\n"
    )
    selected = run(name="sub-01/func/sub-01_task-rest_run-01_bold.nii.gz")
    assert policy_codes(text, selected) == {"policy/tr-mismatch"}
    for name in (
        "sub-01/func/sub-01_task-rest_run-02_bold.nii.gz",
        "sub-01/perf/sub-01_task-rest_run-01_bold.nii.gz",
        "sub-01/func/sub-01_task-rest_bold.nii.gz",
    ):
        assert policy_codes(text, run(name=name)) == set(), name


# --------------------------------------------------------------------------- overrides, ignores


def finding(code: str, severity: Severity = Severity.WARNING, file: str | None = None) -> Finding:
    return Finding(code, severity, "something", file=file)


def test_severity_override_changes_severity() -> None:
    policy = load_text('version = 1\n[levels]\n"timing/missing" = "note"\n')
    rec = run(SliceTiming=None)
    missing = [f for f in check_run(rec) if f.code == "timing/missing"]
    assert missing and missing[0].severity is RULES["timing/missing"].severity
    outcome = apply_overrides_and_ignores(policy, rec.path, missing)
    assert [f.severity for f in outcome.kept] == [Severity.NOTE]
    lab = load_text(LAB + '[levels]\n"policy/*" = "warning"\n')
    outcome = apply_policy(lab, run(tr=2.0), check_run(run(tr=2.0)))
    tr = [f for f in outcome.kept if f.code == "policy/tr-mismatch"]
    assert [f.severity for f in tr] == [Severity.WARNING]


def test_ignore_by_glob_drops_and_counts() -> None:
    policy = load_text(EXAMPLE)
    pilot = "sub-pilot01/ses-1/func/sub-pilot01_ses-1_task-rest_bold.nii.gz"
    regular = "sub-01/func/sub-01_task-rest_bold.nii.gz"
    found = [finding("timing/missing"), finding("header/tr-disagrees", Severity.ERROR)]
    outcome = apply_overrides_and_ignores(policy, pilot, found)
    assert outcome.kept == () and len(outcome.ignored) == 2
    assert outcome.ignored_by_reason() == {"pilot sessions use a test protocol": 2}
    outcome = apply_overrides_and_ignores(policy, regular, found)
    assert outcome.ignored == ()
    # the example's [levels] table makes timing/missing an error
    assert [f.severity for f in outcome.kept] == [Severity.ERROR, Severity.ERROR]


def test_ignore_codes_patterns_and_dataset_findings() -> None:
    policy = load_text(
        'version = 1\n[[waive]]\nfindings = ["header/*"]\n'
        'runs = ["**/anat"]\nreason = "anatomy is not timed"\n'
    )
    found = [finding("header/tr-disagrees"), finding("timing/missing")]
    outcome = apply_overrides_and_ignores(policy, "sub-01/ses-2/anat/sub-01_T1w.nii.gz", found)
    assert [f.code for f in outcome.kept] == ["timing/missing"] and len(outcome.ignored) == 1
    # a dataset finding is matched by its own file
    outcome = apply_overrides_and_ignores(
        policy,
        None,
        [finding("header/tr-disagrees", file="sub-02/anat/x.nii.gz"),
         finding("header/tr-disagrees")],
    )
    assert len(outcome.kept) == 1 and len(outcome.ignored) == 1


# Path patterns. POSIX fnmatch/glob(7): * and ? never cross "/", [..] and [!..] sets;
# ** as a whole segment spans folders and a folder pattern covers its contents
# (common practice (no source), as in version-control ignore files).
@pytest.mark.parametrize(
    ("pattern", "path", "expected"),
    [
        ("sub-pilot*/**", "sub-pilot01/func/a_bold.nii.gz", True),
        ("sub-pilot*/**", "sub-01/func/a_bold.nii.gz", False),
        ("sub-*", "sub-01/func/a_bold.nii.gz", True),
        ("*_bold.nii.gz", "sub-01/func/a_bold.nii.gz", False),
        ("**/*_bold.nii.gz", "sub-01/func/a_bold.nii.gz", True),
        ("**/*_bold.nii.gz", "a_bold.nii.gz", True),
        ("sub-01/**/a_bold.nii.gz", "sub-01/a_bold.nii.gz", True),
        ("sub-01/**/a_bold.nii.gz", "sub-01/ses-1/func/a_bold.nii.gz", True),
        ("sub-0?/func", "sub-01/func/a_bold.nii.gz", True),
        ("sub-0[!1]/**", "sub-01/func/a_bold.nii.gz", False),
        ("sub-0[!1]/**", "sub-02/func/a_bold.nii.gz", True),
        ("sub-01/func/a*", "sub-01/func/a_bold.nii.gz", True),
        ("sub-01*func", "sub-01/func/a_bold.nii.gz", False),
    ],
)
def test_path_patterns(pattern: str, path: str, expected: bool) -> None:
    assert path_matches(pattern, path) is expected


@settings(max_examples=150, deadline=None)
@given(
    pattern=st.text(alphabet="ab*?-.", min_size=1, max_size=6),
    name=st.text(alphabet="ab-.", max_size=6),
)
def test_single_name_patterns_agree_with_fnmatch(pattern: str, name: str) -> None:
    # reference: Python's fnmatch (POSIX shell patterns), for names without folders
    assume("**" not in pattern and name not in ("", ".", ".."))
    assume(path_pattern_problem(pattern) is None)
    assert path_matches(pattern, name) is fnmatch.fnmatchcase(name, pattern)


def test_policy_codes_are_documented() -> None:
    for code in (
        "policy/tr-mismatch",
        "policy/slice-count",
        "policy/multiband-mismatch",
        "policy/scheme-mismatch",
        "policy/direction-mismatch",
        "policy/ambiguous-protocol",
        "policy/invalid",
    ):
        assert code in RULES
        assert explain(code).startswith(code)
    # the policy codes are found by check_protocol (they need the policy), never by a
    # run check of the rules layer
    from slicetime.rules.bindings import RUN_CHECKS

    policy_codes = {c for c in RULES if c.startswith("policy/")}
    assert not policy_codes & {code for code, _ in RUN_CHECKS}
    assert all(RULES[c].scope == "reader" for c in policy_codes)


# --------------------------------------------------------------------------- a broken lab policy


def _broken_policy_dataset(tmp_path: Path) -> tuple[Path, Path]:
    from tests.helpers_bids import write_description
    from tests.test_correct import build_run, interleaved

    root = tmp_path / "ds"
    write_description(root)
    image, _ = build_run(root, "sub-01/func/sub-01_task-hum_bold.nii.gz", interleaved(8))
    # TOML v1.0.0 ("Table"): a table header is closed by "]"; this one is not
    (root / POLICY_FILENAME).write_text("[severity\nbroken = ", encoding="utf-8")
    return root, image


def test_a_broken_lab_policy_is_seen_by_audit_show_and_correct_alike(tmp_path: Path) -> None:
    import json

    from click.testing import CliRunner

    from slicetime.interfaces.cli import cli

    root, image = _broken_policy_dataset(tmp_path)
    try:  # the standard library's TOML reader (tomli before Python 3.11)
        import tomllib
    except ModuleNotFoundError:  # pragma: no cover - Python 3.10
        import tomli as tomllib  # type: ignore[no-redef]
    with pytest.raises(tomllib.TOMLDecodeError):
        tomllib.loads((root / POLICY_FILENAME).read_text(encoding="utf-8"))
    runner = CliRunner()
    audit = runner.invoke(cli, ["audit", str(root), "--format", "json"])
    assert audit.exit_code == 1
    assert "policy/invalid" in audit.stdout
    shown = runner.invoke(cli, ["show", str(image), "--json"])
    assert shown.exit_code == 1, shown.output
    assert [f["code"] for f in json.loads(shown.stdout)["findings"]][:1] == ["policy/invalid"]
    text = runner.invoke(cli, ["show", str(image)])
    assert text.exit_code == 1 and "no findings" not in text.stdout
    assert "policy/invalid" in text.stdout
    out = tmp_path / "out"
    corrected = runner.invoke(cli, ["correct", str(root), "--out", str(out)])
    assert corrected.exit_code == 2
    lines = corrected.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"slicetime: {root / POLICY_FILENAME}: line 1")
    assert "without the dataset's lab policy" in lines[0]
    assert not out.exists()


def test_fix_stops_on_a_broken_lab_policy_as_correct_does(tmp_path: Path) -> None:
    import json

    from click.testing import CliRunner

    from slicetime.interfaces.cli import cli
    from tests.helpers_bids import tree_hashes

    root, image = _broken_policy_dataset(tmp_path)
    own = image.with_name("sub-01_task-hum_bold.json")
    content = json.loads(own.read_text(encoding="utf-8"))
    # milliseconds where BIDS asks for seconds: a repair fix plans when the policy is sound
    content["SliceTiming"] = [t * 1000 for t in content["SliceTiming"]]
    own.write_text(json.dumps(content), encoding="utf-8")
    broken = (root / POLICY_FILENAME).read_text(encoding="utf-8")
    runner = CliRunner()
    before = tree_hashes(tmp_path)
    for args in ([], ["--apply"]):
        refused = runner.invoke(cli, ["fix", str(root), *args])
        assert refused.exit_code == 2, refused.output
        lines = refused.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"slicetime: {root / POLICY_FILENAME}: ")
        assert "fix does not run without the dataset's lab policy" in lines[0]
        assert refused.stdout == ""  # no plan shown
        assert tree_hashes(tmp_path) == before
    # a plan saved without the policy is not applied once a broken one is there
    (root / POLICY_FILENAME).unlink()
    plan = tmp_path / "plan.json"
    saved = runner.invoke(cli, ["fix", str(root), "--plan", str(plan)])
    assert saved.exit_code == 1 and "timing/units-ms" in saved.stdout
    (root / POLICY_FILENAME).write_text(broken, encoding="utf-8")
    before = tree_hashes(tmp_path)
    applied = runner.invoke(cli, ["fix", "--apply", "--plan", str(plan),
                                  "--backup-dir", str(tmp_path / "backups")])
    assert applied.exit_code == 2
    assert "fix does not run without the dataset's lab policy" in applied.stderr
    assert tree_hashes(tmp_path) == before
