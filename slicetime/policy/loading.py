"""Loading the lab policy file: what a lab expects of its runs and how it reads findings.

A dataset may carry ``slicetime-policy.toml`` at its root (:func:`find_policy`),
or the policy can be given on the command line. :func:`load_policy` reads it,
checks it against ``slicetime/data/policy.schema.json`` (JSON Schema draft
2020-12, every table closed so that a misspelt key is an error) and against
the semantics below, and returns a frozen :class:`Policy`. Applying it to runs
and findings is pure and lives in :mod:`slicetime.policy.checks`.

The format (version 1)::

    version = 1                          # required

    [[protocols]]                        # what runs should look like
    name = "resting state, mb4"          # optional, used in messages
    match = { task = "rest", acq = "mb4" }
    repetition_time = 0.8                # seconds
    slices = 72                          # along the slice axis
    multiband_factor = 4
    scheme = "multiband ×4, interleaved ascending from 0"
    slice_encoding_direction = "k"
    tolerance = 0.003                    # seconds, for repetition_time (default 0.003)

    [levels]                             # replaces a code's default level
    "scheme/multiband-undeclared" = "warning"

    [[waive]]                            # waives findings (dropped, counted)
    findings = ["*"]
    runs = ["sub-pilot*/**"]
    reason = "pilot sessions use a test protocol"

    [[accept]]                           # correct goes ahead despite these doubts
    findings = ["header/slice-code-mismatch"]
    runs = ["sub-07/**"]
    reason = "the console protocol confirms the sidecar; the header is the converter's guess"

Former key names (read for one release, each use reported by a
``policy/former-keys`` note that names the new ones): ``[severity]`` is
``[levels]``; ``[[ignore]]`` is ``[[waive]]``, its ``codes`` is ``findings``
and its ``paths`` is ``runs`` (:data:`FORMER_KEYS`).

Semantics, decided here and relied on by :mod:`slicetime.policy.checks`:

*Protocols.* ``match`` is required (``match = {}`` selects every run). Its keys
are BIDS entities by their short names (``sub``, ``ses``, ``task``, ``acq``,
``run``, ``echo``, ...), ``datatype`` (the run's folder: ``func``, ``perf``,
...) and ``suffix`` (``bold``, ...); a run is selected when every key equals
the run's value. Labels compare exactly (case-sensitive, as BIDS names are);
index entities (``run``, ``echo``, ``flip``, ``inv``, ``split``, ``chunk``)
compare as numbers, so ``run = 1`` selects ``run-01`` (BIDS: an index may
carry leading zeros). A protocol must set at least one expectation. When
several protocols select a run, the one with the most ``match`` keys wins; two
protocols with the same ``match`` are an error here (merge them). Protocols
with different keys but equal size can only be seen to collide on a real run;
that is reported there (``policy/ambiguous-protocol``).

``scheme`` is either a label exactly as slicetime prints it (describing the
order of data-array indices, after ``SliceEncodingDirection``), or an order
family: ``ascending``, ``descending``, ``interleaved``, ``sequential``, or a
kind with a direction such as ``interleaved descending`` or ``sequential
ascending``. A family ignores the multiband factor and the start slice, and
``ascending``/``descending`` alone include interleaved orders (for exactly
one-slice-after-another write ``sequential ascending``). Labels are checked
against the label grammar; ``multiband x4`` is accepted for ``multiband ×4``.
A label's multiband factor must agree with ``multiband_factor``, and
``multiband_factor`` must divide ``slices``.

*Levels.* Keys are finding codes, or patterns with ``*`` and ``?`` (``header/*``).
Every key must name or match at least one known code. An exact code beats
patterns; two patterns that give one known code different severities are an
error (give that code its own key).

*Waive.* ``findings`` (required) are codes or patterns as above. ``runs``
(default: every run) are patterns over the run's path relative to the dataset
root with forward slashes: ``*`` and ``?`` within one folder or file name,
``[abc]``/``[!abc]`` character sets, ``**`` as a whole path segment for any
number of folders. A pattern that selects a folder covers everything in it
(``sub-pilot01`` and ``sub-pilot01/**`` are the same). ``reason`` is required
and must not be blank.

*Accept.* ``codes`` (required) are exact finding codes whose rule puts the slice
times in doubt (``timing_in_doubt``; no patterns: a doubt is accepted by name);
``paths`` as for ignore; ``reason`` is required. The audit still reports these
findings; ``correct`` goes ahead on the runs they select and records the
acceptance in each output (:mod:`slicetime.rules.correction`).

Every problem raises :class:`ReadError` with code ``policy/invalid``, a
one-line message naming the file and the key path
(``protocols[1].repetition_time: must be a number greater than 0 ...``), the
key path as ``field``, and for TOML syntax errors the line and column. File
problems (missing, unreadable) keep their ``file/*`` codes.
"""

from __future__ import annotations

import dataclasses
import difflib
import functools
import json
import math
import re
import sys
from collections.abc import Collection, Iterable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # imported where a policy is validated: 50 ms a start otherwise
    import jsonschema

from slicetime.codes import RULES, make_finding, package_data
from slicetime.model import TIME_TOLERANCE, Finding, Severity, implausible_repetition
from slicetime.numbers import plain
from slicetime.policy.model import (
    EXPECTATION_KEYS,
    INVALID_CODE,
    POLICY_FILENAME,
    AcceptEntry,
    ExpectedProtocol,
    IgnoreEntry,
    Policy,
)
from slicetime.policy.patterns import CODE_CHARS, code_matches, is_pattern, path_pattern_problem
from slicetime.readers.errors import (
    ReadError,
    display_name,
    open_regular,
    os_error,
    read_bounded,
)
from slicetime.readers.schema_text import describe_schema
from slicetime.schemes.labels import label_multiband, label_problem, normalise_label

__all__ = [
    "INDEX_ENTITIES",
    "MATCH_KEYS",
    "MAX_POLICY_BYTES",
    "find_policy",
    "load_policy",
    "parse_policy",
    "policy_from_document",
    "policy_schema",
    "root_policies",
]


#: a policy is a few kilobytes; anything this large is not one
MAX_POLICY_BYTES = 1024 * 1024
_HINT = "Fix the policy file; `slicetime explain policy/invalid` describes its format."

# the code this module raises, registered here so a reader can make its finding


FORMER_KEYS_CODE = "policy/former-keys"

#: former policy keys and the names they are read as (one release): at the top level,
#: and inside each ``[[waive]]`` entry
FORMER_KEYS: dict[str, str] = {"severity": "levels", "ignore": "waive"}
FORMER_WAIVE_KEYS: dict[str, str] = {"codes": "findings", "paths": "runs"}


def _with_current_keys(data: Mapping[str, Any], file: str
                       ) -> tuple[dict[str, Any], tuple[str, ...]]:
    """``data`` with the former key names (:data:`FORMER_KEYS`) read as the current
    ones, and one sentence per kind of renaming met (for the ``policy/former-keys``
    note). A file that gives both the former and the current name is refused."""
    out = dict(data)
    used: list[str] = []
    for old, new in FORMER_KEYS.items():
        if old not in out:
            continue
        if new in out:
            raise _invalid(file, old, f"is the former name of [{new}], which the file also "
                           f"has; keep only [{new}]")
        out[new] = out.pop(old)
        used.append(f"[{old}] → [{new}]" if old == "severity" else f"[[{old}]] → [[{new}]]")
    for table in ("waive", "accept"):  # one spelling for both kinds of entry
        entries = out.get(table)
        if not isinstance(entries, list):
            continue
        renamed_entries = []
        for i, entry in enumerate(entries):
            if isinstance(entry, dict):
                entry = dict(entry)
                for old, new in FORMER_WAIVE_KEYS.items():
                    if old in entry:
                        if new in entry:
                            raise _invalid(file, f"{table}[{i}].{old}", f"is the former name "
                                           f"of {new}, which the entry also has; keep only "
                                           f"{new}")
                        entry[new] = entry.pop(old)
                        word = f"{old} → {new}"
                        if word not in used:
                            used.append(word)
            renamed_entries.append(entry)
        out[table] = renamed_entries
    if not used:
        return out, ()
    return out, (f"{file}: former key names read as the current ones ({', '.join(used)}); "
                 "rename them, the former names are read until the next release",)


@functools.cache
def policy_schema() -> dict[str, Any]:
    """The shipped JSON Schema of the policy file."""
    text = package_data("policy.schema.json").decode("utf-8")
    schema: dict[str, Any] = json.loads(text)
    return schema


def _match_keys() -> tuple[tuple[str, ...], frozenset[str]]:
    match = policy_schema()["$defs"]["match"]["properties"]
    index = frozenset(k for k, v in match.items() if v.get("$ref") == "#/$defs/index")
    return tuple(match), index


#: keys allowed in ``match``: BIDS entities, ``datatype`` and ``suffix`` (from the schema)
MATCH_KEYS, INDEX_ENTITIES = _match_keys()


# --------------------------------------------------------------------------- loading


def find_policy(root: Path) -> Path | None:
    """The policy file at a dataset root, or None when there is none.

    A broken link or a folder of that name is returned too, so that loading it
    reports the problem rather than silently auditing without the policy.
    """
    candidate = Path(root) / POLICY_FILENAME
    return candidate if candidate.exists() or candidate.is_symlink() else None


def load_policy(path: Path, known_codes: Collection[str], *, display: str | None = None) -> Policy:
    """Read, validate and return the policy at ``path``.

    ``known_codes`` are the finding codes that may appear in ``severity`` and
    ``ignore`` (pass ``slicetime.rules.RULES``; the readers cannot import the
    rules themselves). ``display`` names the file in messages. Raises
    :class:`ReadError`: ``file/*`` when the file cannot be read,
    ``policy/invalid`` for anything wrong with its content.
    """
    shown = display_name(path, display)
    fh, st = open_regular(Path(path), shown, what="policy file")
    with fh:
        if st.st_size > MAX_POLICY_BYTES:
            raise _invalid(shown, None, f"is {st.st_size} bytes; a policy file is a few kilobytes")
        try:
            # bounded even when the file grows while it is read
            raw = read_bounded(fh, st.st_size, MAX_POLICY_BYTES) if st.st_size else b""
        except OSError as exc:
            raise os_error(exc, shown, what="policy file") from None
    if len(raw) > MAX_POLICY_BYTES:
        raise _invalid(shown, None, f"grew beyond {MAX_POLICY_BYTES} bytes while being read")
    return parse_policy(raw, file=shown, known_codes=known_codes)


def parse_policy(text: str | bytes, *, file: str, known_codes: Collection[str]) -> Policy:
    """Parse and validate policy text (TOML); ``file`` names it in messages."""
    if isinstance(text, bytes):
        if text.startswith(b"\xef\xbb\xbf"):
            text = text[3:]
        try:
            text = text.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise _invalid(
                file,
                None,
                f"is not UTF-8 text (bad byte at offset {exc.start}); TOML files must be UTF-8",
            ) from None
    elif text.startswith("\ufeff"):
        text = text[1:]
    if sys.version_info >= (3, 11):  # imported only when a policy is read
        import tomllib
    else:  # pragma: no cover - exercised on Python 3.10 only
        import tomli as tomllib
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _syntax_error(file, exc) from None
    return policy_from_document(data, file=file, known_codes=known_codes)


def _syntax_error(file: str, exc: Exception) -> ReadError:
    text = str(exc)
    line: int | None = getattr(exc, "lineno", None)
    column: int | None = getattr(exc, "colno", None)
    m = re.search(r"\s*\(at line (\d+), column (\d+)\)\s*$", text)
    if m and line is None:
        line, column = int(m.group(1)), int(m.group(2))
    message = getattr(exc, "msg", None) or re.sub(
        r"\s*\((?:at line \d+, column \d+|at end of document)\)\s*$", "", text
    )
    where = f"line {line}, column {column}" if line is not None else "at the end of the file"
    return ReadError(
        INVALID_CODE,
        file,
        None,
        f"{file}: {where}: not valid TOML: {message}",
        evidence={"line": line, "column": column, "reason": message},
        hint="Fix the syntax at the line and column given (see the TOML specification).",
    )


def _invalid(file: str, key: str | None, text: str, **evidence: Any) -> ReadError:
    where = f"{file}: {key}: " if key else f"{file}: "
    return ReadError(
        INVALID_CODE, file, key, where + text, evidence={"key": key, **evidence}, hint=_HINT
    )


# ------------------------------------------------------------------ document -> Policy

KeyPath = Sequence[str | int]
_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+\Z")


def _key_path(parts: KeyPath) -> str:
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            name = part if _BARE_KEY.match(part) else json.dumps(part, ensure_ascii=False)
            out += ("." if out else "") + name
    return out


def _document_order(data: Any, parts: KeyPath) -> tuple[int, ...]:
    """Sort key putting problems in the order their keys appear in the file."""
    out: list[int] = []
    node = data
    for part in parts:
        if isinstance(node, dict):
            keys = list(node)
            out.append(keys.index(part) if part in node else len(keys))
            node = node[part] if part in node else None
        elif isinstance(node, list) and isinstance(part, int) and part < len(node):
            out.append(part)
            node = node[part]
        else:
            out.append(0)
            node = None
    return tuple(out)


#: TOML's value types as Python reads them, in words (bool before int: a bool is an int)
_TOML_TYPES: tuple[tuple[type, str], ...] = (
    (bool, "a boolean"), (int, "an integer"), (float, "a float"), (str, "a string"),
    (dict, "a table"), (list, "an array"),
)


def _toml_type(value: Any) -> str:
    return next((words for kind, words in _TOML_TYPES if isinstance(value, kind)),
                "a date/time")


def _shown(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return f"{value!r}, {_toml_type(value)}"
    if isinstance(value, str):
        text = json.dumps(value if len(value) <= 40 else value[:37] + "...", ensure_ascii=False)
        return f"{text}, a string"
    return _toml_type(value)


def _value_words(value: Any) -> str:
    """A value with its TOML type first: ``the string "1"``, ``the float 1.5``."""
    kind = _toml_type(value).split(" ", 1)[-1]
    if isinstance(value, dict | list) or kind == "date/time":
        return _toml_type(value)
    shown = _shown(value).rsplit(", ", 1)[0] if not isinstance(value, bool) else _shown(value)
    return f"the {kind} {shown}"


_PATTERN_WORDS = {
    "^[A-Za-z0-9]+$": "a string of letters and digits (a BIDS label)",
    "\\S": "a string that is not blank",
    "^[0-9]+$": "such a number as a string of digits",
}


def _describe(schema: Mapping[str, Any]) -> str:
    return describe_schema(
        schema, resolve=lambda ref: policy_schema()["$defs"][ref.rsplit("/", 1)[-1]],
        object_word=("a table", "tables"), pattern_words=_PATTERN_WORDS)


_REQUIRED_WHY = {
    "version": "the policy must say version = 1",
    "match": 'say which runs this protocol is for, e.g. match = { task = "rest" } '
    "(match = {} for every run)",
    "findings": 'list the finding codes to waive (findings = ["*"] for every code)',
    "reason": 'say why these findings are waived (reason = "..."): a lab must say why',
}
#: the same for an ``[[accept]]`` entry (the table a missing key belongs to decides)
_REQUIRED_WHY_ACCEPT = {
    "findings": 'list the codes whose doubt is accepted, each exactly '
    '(findings = ["header/slice-code-mismatch"])',
    "reason": 'say why the runs\' own timing is trusted despite the doubt (reason = "..."): '
    "it is recorded in every output",
}


def _schema_problem(error: jsonschema.ValidationError) -> tuple[list[str | int], str]:
    """A jsonschema error as (key path, message)."""
    path: list[str | int] = list(error.absolute_path)
    validator = error.validator
    if "propertyNames" in error.absolute_schema_path:
        return [*path, str(error.instance)], (
            "is not a finding code or code pattern (codes are area/short-name in lower case, "
            "patterns may use * and ?)"
        )
    if validator == "additionalProperties" and isinstance(error.instance, dict):
        allowed = list(error.schema.get("properties", {}))
        extras = [k for k in error.instance if k not in allowed]
        extra = extras[0] if extras else "?"
        close = difflib.get_close_matches(str(extra), allowed, n=1, cutoff=0.6)
        guess = f" (did you mean {close[0]!r}?)" if close else ""
        if "sub" in allowed:
            text = "is not a BIDS entity, 'datatype' or 'suffix'" + guess
        else:
            text = "unknown key" + guess + "; allowed here: " + ", ".join(allowed)
        return [*path, extra], text
    if validator == "required" and isinstance(error.instance, dict):
        missing = [k for k in error.validator_value if k not in error.instance]
        key = missing[0] if missing else "?"
        why = _REQUIRED_WHY_ACCEPT if path[:1] == ["accept"] else _REQUIRED_WHY
        return [*path, key], "missing: " + why.get(key, "this key is required")
    if (
        validator == "anyOf"
        and isinstance(error.instance, dict)
        and "match" in error.schema.get("properties", {})
    ):
        return path, "sets no expectation; give at least one of " + ", ".join(EXPECTATION_KEYS)
    if validator == "const":
        expected = error.validator_value
        if _toml_type(error.instance) != _toml_type(expected):  # version = "1": the type
            return path, f"expected {_value_words(expected)}, got {_value_words(error.instance)}"
        return path, f"must be {json.dumps(expected)} (found {_shown(error.instance)})"
    if validator in ("minItems", "minLength"):
        return path, "must not be empty"
    return path, f"must be {_describe(error.schema)} (found {_shown(error.instance)})"


def _non_finite(data: Any, path: list[str | int]) -> list[tuple[list[str | int], str]]:
    if isinstance(data, float) and not math.isfinite(data):
        return [(path, f"must be a finite number (found {data!r})")]
    out: list[tuple[list[str | int], str]] = []
    if isinstance(data, dict):
        for key, value in data.items():
            out += _non_finite(value, [*path, key])
    elif isinstance(data, list):
        for i, value in enumerate(data):
            out += _non_finite(value, [*path, i])
    return out


_STRUCTURAL = ("missing: ", "sets no expectation")


def _raise_first(file: str, data: Any, problems: list[tuple[list[str | int], str]]) -> None:
    if not problems:
        return
    # a misspelt key also leaves a required key missing: report the spelling first
    problems.sort(key=lambda p: (p[1].startswith(_STRUCTURAL), _document_order(data, p[0])))
    parts, text = problems[0]
    more = len(problems) - 1
    if more:
        text += f" (and {more} more problem{'s' if more > 1 else ''})"
    raise _invalid(file, _key_path(parts) or None, text, problems=len(problems))


def _code_problem(code: str, known: Collection[str]) -> str | None:
    if not CODE_CHARS.match(code):
        return (
            f"{json.dumps(code)} is not a finding code: codes are lower-case letters, digits, "
            "- and /, and patterns may use * and ?"
        )
    if is_pattern(code):
        if not any(code_matches(code, k) for k in known):
            return f"pattern {json.dumps(code)} matches no finding code"
        return None
    if code not in known:
        close = difflib.get_close_matches(code, sorted(known), n=1, cutoff=0.6)
        guess = f" (did you mean {json.dumps(close[0])}?)" if close else ""
        return (
            f"unknown finding code {json.dumps(code)}{guess}; `slicetime explain --list` "
            "shows every code"
        )
    return None


def _protocol(index: int, entry: Mapping[str, Any]) -> ExpectedProtocol:
    match: dict[str, str | int] = {}
    for key, value in entry["match"].items():
        match[key] = int(value) if key in INDEX_ENTITIES else str(value)
    scheme = entry.get("scheme")
    return ExpectedProtocol(
        index=index,
        match=match,
        name=entry.get("name"),
        repetition_time=float(entry["repetition_time"]) if "repetition_time" in entry else None,
        slices=int(entry["slices"]) if "slices" in entry else None,
        multiband_factor=int(entry["multiband_factor"]) if "multiband_factor" in entry else None,
        scheme=normalise_label(scheme) if scheme is not None else None,
        slice_encoding_direction=entry.get("slice_encoding_direction"),
        tolerance=float(entry.get("tolerance", TIME_TOLERANCE)),
    )


def _protocol_problems(protocols: Sequence[ExpectedProtocol]) -> list[tuple[list[str | int], str]]:
    problems: list[tuple[list[str | int], str]] = []
    seen: dict[tuple[tuple[str, str | int], ...], int] = {}
    for p in protocols:
        here: list[str | int] = ["protocols", p.index]
        implausible = (implausible_repetition(p.repetition_time)
                       if p.repetition_time is not None else None)
        if implausible is not None:  # the audit's tr/implausible and correct's gate agree
            problems.append(([*here, "repetition_time"],
                             f"{plain(p.repetition_time)} s is {implausible}"))
        if p.scheme is not None:
            problem = label_problem(p.scheme)
            if problem:
                problems.append(([*here, "scheme"], problem))
            else:
                implied = label_multiband(p.scheme)
                if (
                    implied is not None
                    and p.multiband_factor is not None
                    and implied != p.multiband_factor
                ):
                    problems.append(
                        (
                            [*here, "multiband_factor"],
                            f"{p.multiband_factor} contradicts scheme "
                            f"{json.dumps(p.scheme, ensure_ascii=False)} "
                            f"(multiband factor {implied})",
                        )
                    )
        if (
            p.slices is not None
            and p.multiband_factor is not None
            and p.slices % p.multiband_factor
        ):
            problems.append(
                (
                    [*here, "multiband_factor"],
                    f"{p.multiband_factor} does not divide slices = {p.slices}",
                )
            )
        selector = tuple(sorted(p.match.items(), key=lambda kv: kv[0]))
        if selector in seen:
            problems.append(
                (
                    [*here, "match"],
                    f"selects the same runs as protocols[{seen[selector]}] "
                    f"({p.selector()}); merge the two entries",
                )
            )
        else:
            seen[selector] = p.index
    return problems


def _severity_problems(
    severity: Mapping[str, Severity], known: Collection[str]
) -> list[tuple[list[str | int], str]]:
    problems: list[tuple[list[str | int], str]] = []
    for code in severity:
        problem = _code_problem(code, known)
        if problem:
            problems.append((["levels", code], problem))
    if problems:
        return problems
    patterns = [c for c in severity if is_pattern(c)]
    for code in sorted(known):
        if code in severity:
            continue
        hits = [p for p in patterns if code_matches(p, code)]
        levels = {severity[p] for p in hits}
        if len(levels) > 1:
            first, second = hits[0], next(p for p in hits if severity[p] != severity[hits[0]])
            problems.append(
                (
                    ["levels", second],
                    f"gives {code} {severity[second].value} but levels.{json.dumps(first)} gives "
                    f"it {severity[first].value}; give {json.dumps(code)} its own entry",
                )
            )
    return problems


def _ignore_problems(entries: Sequence[Any], key: str = "waive"
                     ) -> list[tuple[list[str | int], str]]:
    problems: list[tuple[list[str | int], str]] = []
    for i, entry in enumerate(entries):
        for j, pattern in enumerate(entry.get("runs", [])):
            problem = path_pattern_problem(pattern)
            if problem:
                problems.append(([key, i, "runs", j], f"{json.dumps(pattern)}: {problem}"))
    return problems


def _accept_problems(entries: Sequence[Any]) -> list[tuple[list[str | int], str]]:
    """``[[accept]]`` codes name, exactly, a code whose rule puts the timing in doubt."""
    problems = _ignore_problems(entries, "accept")
    for i, entry in enumerate(entries):
        for j, code in enumerate(entry["findings"]):
            rule = RULES.get(code)
            if rule is None or not rule.timing_in_doubt:
                doubting = ", ".join(sorted(c for c, r in RULES.items() if r.timing_in_doubt))
                problems.append((["accept", i, "findings", j],
                                 f"{json.dumps(code)} is not a code that puts the timing in "
                                 f"doubt (name one exactly: {doubting})"))
    return problems


def _entry_fields(index: int, entry: Mapping[str, Any]) -> dict[str, Any]:
    """The fields a ``[[waive]]`` and an ``[[accept]]`` entry share, as written."""
    return {"index": index, "codes": tuple(entry["findings"]),
            "reason": " ".join(entry["reason"].split()),
            "paths": tuple(entry.get("runs", ["**"]))}


def policy_from_document(
    data: Mapping[str, Any], *, file: str, known_codes: Collection[str]
) -> Policy:
    """Validate a parsed TOML document and build the :class:`Policy` (pure)."""
    known = frozenset(known_codes)
    data, notices = _with_current_keys(data, file)
    _raise_first(file, data, _non_finite(dict(data), []))
    import jsonschema

    validator_class = jsonschema.validators.validator_for(policy_schema())
    validator = validator_class(policy_schema())
    _raise_first(file, data, [_schema_problem(e) for e in validator.iter_errors(dict(data))])

    protocols = tuple(_protocol(i, entry) for i, entry in enumerate(data.get("protocols", [])))
    severity = {code: Severity(level) for code, level in data.get("levels", {}).items()}
    raw_ignores = data.get("waive", [])
    problems = _protocol_problems(protocols)
    problems += _severity_problems(severity, known)
    problems += _ignore_problems(raw_ignores)
    for i, entry in enumerate(raw_ignores):
        for j, code in enumerate(entry["findings"]):
            problem = _code_problem(code, known)
            if problem:
                problems.append((["waive", i, "findings", j], problem))
    raw_accepts = data.get("accept", [])
    problems += _accept_problems(raw_accepts)
    _raise_first(file, data, problems)

    accepts = tuple(AcceptEntry(**_entry_fields(i, entry), given=f"{Path(file).name} accept[{i}]")
                    for i, entry in enumerate(raw_accepts))
    ignores = tuple(IgnoreEntry(**_entry_fields(i, entry)) for i, entry in enumerate(raw_ignores))
    return Policy(
        file=file,
        version=int(data["version"]),
        protocols=protocols,
        severity=severity,
        ignores=ignores,
        accepts=accepts,
        notices=notices,
    )


def with_current_codes(policy: Policy, renamed: Mapping[str, str]) -> Policy:
    """The policy with every former finding code (``renamed``: former → current) named
    as the code it became, so a policy written for an earlier release keeps working. A
    pattern is kept as written (it matches the current codes only)."""
    def now(code: str) -> str:
        return renamed.get(code, code)

    if all(now(c) == c for c in policy.severity) and all(
            now(c) == c for entry in policy.ignores for c in entry.codes):
        return policy
    return dataclasses.replace(
        policy,
        severity={now(c): s for c, s in policy.severity.items()},
        ignores=tuple(dataclasses.replace(e, codes=tuple(now(c) for c in e.codes))
                      for e in policy.ignores),
    )


def root_policies(
    roots: Iterable[Path],
    policy_file: Path | None,
    known_codes: Collection[str],
    problems: list[Finding] | None = None,
    *,
    renamed: Mapping[str, str] | None = None,
    broken: dict[Path, Finding] | None = None,
) -> dict[Path, Policy | None]:
    """The policy of each dataset root: the one given (its errors propagate, so the
    command line can exit 2), else the root's own ``slicetime-policy.toml``. A
    root's broken file is not used: its problem is appended to ``problems`` as a
    finding (when given) for the report. ``renamed`` maps former codes to current
    ones (:func:`with_current_codes`); ``broken`` receives each root whose own file is
    broken, with its problem (every command that must not go on without the lab's
    policy reads it there)."""
    roots = list(roots)

    def load(path: Path, display: str | None = None) -> Policy:
        policy = load_policy(path, known_codes, display=display)
        if problems is not None:
            problems.extend(make_finding(FORMER_KEYS_CODE, text, file=policy.file)
                            for text in policy.notices)
        return with_current_codes(policy, renamed) if renamed else policy

    if policy_file is not None:
        given = load(policy_file)
        return {Path(root): given for root in roots}
    found: dict[Path, Policy | None] = {}
    for root in roots:
        candidate = find_policy(root)
        if candidate is None:
            found[Path(root)] = None
            continue
        try:
            found[Path(root)] = load(candidate, display=POLICY_FILENAME)
        except ReadError as exc:
            if problems is not None:
                problems.append(exc.to_finding())
            if broken is not None:
                broken[Path(root)] = exc.to_finding()
            found[Path(root)] = None
    return found
