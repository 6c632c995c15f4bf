"""Strict reading of JSON sidecars and type checks of their timing fields.

:func:`load_sidecar` parses one sidecar more strictly than :func:`json.loads`
and reports every departure from JSON (RFC 8259) and BIDS as a finding:

=============================  ========  =====================================================
code                           severity  when (data returned)
=============================  ========  =====================================================
``file/*``                     error     missing, broken or annexed link, unreadable (None)
``sidecar/too-large``          error     over 16 MiB (None)
``sidecar/bad-encoding``       error     not UTF-8, e.g. UTF-16 or Latin-1 bytes (None)
``sidecar/bad-encoding``       warning   a UTF-8 byte-order mark (parsed without it); a
                                         ``\\uD800``-style lone surrogate escape (replaced
                                         with U+FFFD)
``sidecar/bad-json``           error     a syntax error, with line and column (None)
``sidecar/too-deep``           error     nesting beyond 64 levels (None)
``sidecar/not-object``         error     the top level is not an object (None)
``sidecar/non-finite-number``  error     ``NaN``, ``Infinity``, ``-Infinity`` or a number
                                         that overflows to infinity; the value reads as
                                         ``null`` (data kept)
``sidecar/duplicate-key``      warning   a key repeated in one object; the last copy wins,
                                         as standard parsers do (data kept)
``sidecar/duplicate-key``      error     as above, for a top-level timing field whose
                                         copies differ
=============================  ========  =====================================================

:func:`load_sidecar` never raises: file problems come back as findings with
data ``None``. :func:`check_types` checks the known timing fields
(:data:`TIMING_FIELDS`, defined by ``slicetime/data/sidecar.schema.json``,
which follows the BIDS field definitions) and reports ``sidecar/wrong-type``
(error) once per bad field; unknown fields are not checked.
"""

from __future__ import annotations

import functools
import json
import os
import re
import threading
from collections.abc import Callable, Mapping
from itertools import compress
from operator import not_
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # imported when a value fails the quick checks: 50 ms a start otherwise
    import jsonschema

from slicetime.codes import make_finding, package_data
from slicetime.model import Finding, Severity
from slicetime.schemes.resolve import valid_multiband_factor

from .errors import ReadError, display_name, open_regular, os_error, read_bounded
from .schema_text import describe_schema

__all__ = [
    "MAX_SIDECAR_BYTES",
    "MAX_SIDECAR_DEPTH",
    "TIMING_FIELDS",
    "FrozenDict",
    "FrozenList",
    "check_types",
    "load_schema",
    "load_sidecar",
    "parse_sidecar_bytes",
    "read_sidecar_bytes",
]

MAX_SIDECAR_BYTES = 16 * 1024 * 1024
MAX_SIDECAR_DEPTH = 64

_UTF8_BOM = b"\xef\xbb\xbf"
_OTHER_BOMS = {
    b"\x00\x00\xfe\xff": "UTF-32",
    b"\xff\xfe\x00\x00": "UTF-32",
    b"\xfe\xff": "UTF-16",
    b"\xff\xfe": "UTF-16",
}
_SURROGATE = re.compile("[\ud800-\udfff]")
_LITERAL = re.compile(r'"(?:[^"\\]|\\.)*"|(-?Infinity|NaN|-?\d[\d.eE+\-]*)', re.S)


@functools.cache
def load_schema() -> dict[str, Any]:
    """The sidecar JSON Schema shipped in ``slicetime/data``."""
    schema: dict[str, Any] = json.loads(package_data("sidecar.schema.json"))
    return schema


@functools.cache
def _validators() -> dict[str, jsonschema.protocols.Validator]:
    import jsonschema

    schema = load_schema()
    cls = jsonschema.validators.validator_for(schema)
    return {key: cls(sub) for key, sub in schema["properties"].items()}


def _refuse(self: Any, *_args: Any, **_kwargs: Any) -> Any:
    raise TypeError(
        "a value read from a sidecar is shared between runs and cannot be changed; "
        "copy it first (list(value), dict(value))"
    )


class FrozenList(list):
    """A JSON array read from a sidecar: a ``list`` that refuses every change.

    One parsed value is shared by every run that inherits it (no copy per run), so it
    must not change under them. It is still a ``list`` for ``isinstance``, equality,
    ``json`` and jsonschema; copy it with ``list(value)`` to get a mutable one.
    """

    __slots__ = ()
    append = extend = insert = pop = remove = clear = sort = reverse = _refuse
    __setitem__ = __delitem__ = __iadd__ = __imul__ = _refuse

    def __reduce__(self) -> tuple[Any, ...]:
        return (FrozenList, (list(self),))


class FrozenDict(dict):
    """A JSON object nested in a sidecar: a ``dict`` that refuses every change (see
    :class:`FrozenList`)."""

    __slots__ = ()
    __setitem__ = __delitem__ = __ior__ = _refuse
    clear = pop = popitem = setdefault = update = _refuse

    def __reduce__(self) -> tuple[Any, ...]:
        return (FrozenDict, (dict(self),))


_LISTS: frozenset[type] = frozenset({list, FrozenList})

#: The sidecar fields slicetime knows the type of (keys of the shipped schema).
TIMING_FIELDS: frozenset[str] = frozenset(load_schema()["properties"])

Check = Callable[[Any], bool]

#: schema keywords :func:`_quick_check` understands; with any other, it defers to jsonschema
_QUICK_KEYWORDS = frozenset(
    {"description", "type", "enum", "items", "minItems", "minimum", "exclusiveMinimum", "anyOf"}
)


def _never(_value: Any) -> bool:
    return False


def _quick_check(schema: Mapping[str, Any]) -> Check:
    """A fast predicate that is True only for values ``schema`` certainly accepts.

    It understands the few keywords the shipped schema uses, for the value types JSON
    parsing produces (``int``, ``float``, ``str``, ``list``, :class:`FrozenList`);
    anything else (another keyword, a bool, a float where an integer is wanted, another
    subclass) gives False, and the caller asks jsonschema, which also words the finding.
    So the predicate only decides how fast a valid value passes, never what is reported.
    """
    if not _QUICK_KEYWORDS.issuperset(schema):
        return _never
    if "anyOf" in schema:
        if len(schema) != 1 + ("description" in schema):
            return _never
        options = [_quick_check(option) for option in schema["anyOf"]]
        return lambda value: any(option(value) for option in options)
    kind = schema.get("type")
    low = schema.get("minimum")
    above = schema.get("exclusiveMinimum")
    if kind in ("number", "integer"):
        if "enum" in schema or "items" in schema or "minItems" in schema:
            return _never
        accepted = (int, float) if kind == "number" else (int,)
        if not all(type(b) in (int, float) for b in (low, above) if b is not None):
            return _never

        def number(value: Any) -> bool:
            return (
                type(value) in accepted
                and (low is None or value >= low)
                and (above is None or value > above)
            )

        return number
    if kind == "string":
        if low is not None or above is not None or "items" in schema or "minItems" in schema:
            return _never
        enum = schema.get("enum")
        if enum is None:
            return lambda value: type(value) is str
        if not all(type(option) is str for option in enum):
            return _never
        allowed = frozenset(enum)
        return lambda value: type(value) is str and value in allowed
    if kind == "array":
        if low is not None or above is not None or "enum" in schema:
            return _never
        min_items = schema.get("minItems", 0)
        items = schema.get("items")
        if type(min_items) is not int or not isinstance(items, Mapping | None):
            return _never
        item = _quick_check(items) if items is not None else None
        return lambda value: (
            type(value) in _LISTS
            and len(value) >= min_items
            and (item is None or all(item(v) for v in value))
        )
    return _never


def quick_checks() -> dict[str, Check]:
    """Per known field, a predicate that is True only for values the schema accepts."""
    return _quick_checks()


#: what a field must be beyond its BIDS type (the shipped schema copies the BIDS types
#: and nothing more): field → (predicate of a valid value, what it must be)
_BEYOND_SCHEMA: dict[str, tuple[Check, str]] = {
    "MultibandAccelerationFactor": (valid_multiband_factor, "an integer ≥ 1"),
    # BIDS: a time "to delay the acquisition" of the next volume; none is negative
    "DelayTime": (lambda value: value >= 0, "a number of seconds, 0 or more"),
}


@functools.cache
def _quick_checks() -> dict[str, Check]:
    checks = {key: _quick_check(sub) for key, sub in load_schema()["properties"].items()}
    for key, (valid, _) in _BEYOND_SCHEMA.items():
        checks[key] = _both(checks[key], valid)
    return checks


def _both(first: Check, second: Check) -> Check:
    """A check that passes when both pass."""
    def check(value: Any) -> bool:
        return bool(first(value) and second(value))

    return check


class _NonFinite:
    """Placeholder for a non-finite number while parsing; becomes ``None``."""

    __slots__ = ("index", "literal")

    def __init__(self, literal: str, index: int) -> None:
        self.literal = literal
        self.index = index

    def __eq__(self, other: object) -> bool:
        return isinstance(other, _NonFinite) and other.literal == self.literal

    def __hash__(self) -> int:
        return hash(self.literal)

    def __repr__(self) -> str:
        return self.literal


def _short(value: Any, limit: int = 60) -> str:
    text = json.dumps(value, default=repr, ensure_ascii=True)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _line_col(data: bytes, offset: int) -> tuple[int, int]:
    line = data.count(b"\n", 0, offset) + 1
    col = offset - (data.rfind(b"\n", 0, offset) + 1) + 1
    return line, col


def load_sidecar(
    path: str | os.PathLike[str], display: str | None = None, *,
    root: str | os.PathLike[str] | None = None,
) -> tuple[dict[str, Any] | None, list[Finding]]:
    """Read and strictly parse the sidecar at ``path``; never raises.

    Returns ``(data, findings)``; ``data`` is ``None`` only when the file is
    unusable (see the module docstring for codes and severities). With ``root``
    (the dataset root), a link out of the dataset is not read
    (``file/link-leaves-dataset``, :func:`.errors.link_leaving`).
    """
    p = os.fspath(path)
    shown = display if display is not None else display_name(Path(p), None)
    raw, problem = read_sidecar_bytes(p, shown, root=root)
    if raw is None:
        return None, [problem] if problem is not None else []
    return parse_sidecar_bytes(raw, shown)


def read_sidecar_bytes(
    path: str, shown: str, *, root: str | os.PathLike[str] | None = None,
    plain: bool = False,
) -> tuple[bytes | None, Finding | None]:
    """The bytes of the sidecar at ``path`` (a regular file, read with a bound; with
    ``root``, not a link out of the dataset), or None and the finding that says why not
    (the reading half of :func:`load_sidecar`); ``plain``: see
    :func:`.errors.open_regular`."""
    try:
        fh, st = open_regular(path, shown, what="JSON file", root=root, plain=plain)
        with fh:
            if st.st_size > MAX_SIDECAR_BYTES:
                return None, _too_large(shown, st.st_size)
            if st.st_size == 0:
                # not read: a size of 0 is an empty file or a pseudo-file (/proc) whose
                # read may never end
                return None, _empty(shown)
            # ask for the size on disk (plus one byte, to see growth): a read of the 16 MiB
            # limit would allocate that much for every small file
            return read_bounded(fh, st.st_size, MAX_SIDECAR_BYTES), None
    except ReadError as err:
        return None, err.to_finding()
    except OSError as exc:
        return None, os_error(exc, shown, what="JSON file").to_finding()


def _too_large(shown: str, size: int) -> Finding:
    return make_finding(
        "sidecar/too-large",
        f"{shown}: the sidecar has {size} bytes, more than the {MAX_SIDECAR_BYTES} "
        "bytes (16 MiB) metadata can reasonably need; not read",
        file=shown,
        evidence={"size": size, "limit": MAX_SIDECAR_BYTES},
    )


def _empty(shown: str) -> Finding:
    return make_finding(
        "sidecar/bad-json",
        f"{shown}: the sidecar is empty (0 bytes on disk)",
        file=shown,
        evidence={"line": 1, "column": 1, "size": 0},
    )


def parse_sidecar_bytes(raw: bytes, shown: str) -> tuple[dict[str, Any] | None, list[Finding]]:
    """Parse sidecar content already in memory; ``shown`` names it in messages."""
    findings: list[Finding] = []
    if len(raw) > MAX_SIDECAR_BYTES:
        return None, [_too_large(shown, len(raw))]
    for bom, name in _OTHER_BOMS.items():
        if raw.startswith(bom):
            return None, [
                make_finding(
                    "sidecar/bad-encoding",
                    f"{shown}: the sidecar is encoded as {name}; BIDS sidecars must be UTF-8",
                    file=shown,
                    evidence={"encoding": name},
                    hint="re-save the file as UTF-8 without a byte-order mark",
                )
            ]
    if raw.startswith(_UTF8_BOM):
        raw = raw[len(_UTF8_BOM) :]
        findings.append(
            make_finding(
                "sidecar/bad-encoding",
                f"{shown}: the sidecar starts with a UTF-8 byte-order mark, which JSON "
                "writers must not add; read without it",
                severity=Severity.NOTE,
                file=shown,
                hint="re-save the file as UTF-8 without a byte-order mark",
            )
        )
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line, col = _line_col(raw, exc.start)
        return None, [
            *findings,
            make_finding(
                "sidecar/bad-encoding",
                f"{shown}: the sidecar is not valid UTF-8 (byte 0x{raw[exc.start]:02x} at line "
                f"{line} column {col})",
                file=shown,
                evidence={"offset": exc.start, "line": line, "column": col},
                hint="re-save the file as UTF-8",
            ),
        ]
    if not text or text.isspace():  # as not text.strip(), without a copy
        return None, [
            *findings,
            make_finding(
                "sidecar/bad-json",
                f"{shown}: the sidecar is empty",
                file=shown,
                evidence={"line": 1, "column": 1},
            ),
        ]

    # first with the C scanner's own float parsing (no per-float hook); an overflowing
    # literal then shows as an infinite float, which the cleaner notices, and only then is
    # the text parsed again with the hook that places and reports it
    exact = not _FAST_FLOATS
    while True:
        parsed = _parse_or_finding(text, shown, findings, exact=exact)
        if isinstance(parsed, list):
            return None, parsed
        data, constants, duplicates = parsed
        # lone surrogates can only come from \u escapes (the UTF-8 decoder refuses them),
        # and placeholders only from non-finite literals: without either, strings need no
        # cleaning
        cleaner = _Cleaner(strings=bool(constants) or "\\u" in text)
        try:
            cleaned = cleaner.clean(data, 1, None)
        except _TooDeep:
            return None, [*findings, _too_deep(shown)]
        # (a repeated key's overridden values are not in the data: with repeats, the
        # exact parse, which sees them)
        if exact or not (cleaner.infinite or duplicates):
            break
        exact = True
    assert isinstance(cleaned, dict)

    findings.extend(_duplicate_findings(shown, data, duplicates))
    if constants:
        reached = {id(marker): top for top, marker in cleaner.non_finite}
        placed = [(reached.get(id(m), _DISCARDED), m) for m in constants]
        findings.extend(_non_finite_findings(shown, text, placed))
    if cleaner.surrogate_keys:
        keys = sorted(cleaner.surrogate_keys)
        findings.append(
            make_finding(
                "sidecar/bad-encoding",
                f"{shown}: {', '.join(keys)} contain lone UTF-16 surrogate escapes, which are not "
                "valid Unicode; replaced with U+FFFD",
                severity=Severity.WARNING,
                file=shown,
                field=keys[0],
                evidence={"fields": keys},
            )
        )
    return cleaned, findings


#: parse first without the per-float hook (see :func:`parse_sidecar_bytes`); the tests set
#: it False to compare with the parse that hooks every float
_FAST_FLOATS = True
_INFINITY = float("inf")
_NEG_INFINITY = -_INFINITY


def _parse_or_finding(
    text: str, shown: str, findings: list[Finding], *, exact: bool,
) -> tuple[dict[str, Any], list[_NonFinite], list[tuple[dict[str, Any], str, list[Any]]]] | list[
        Finding]:
    """``text`` parsed by the strict parser (a top-level object, its non-finite
    placeholders and its repeated keys), or the findings that say why it is not a sidecar
    (``findings`` first)."""
    try:
        data, constants, duplicates = _parser().parse(text, exact_floats=exact)
    except json.JSONDecodeError as exc:
        return [
            *findings,
            make_finding(
                "sidecar/bad-json",
                f"{shown}: invalid JSON at line {exc.lineno} column {exc.colno}: {exc.msg}",
                file=shown,
                evidence={"line": exc.lineno, "column": exc.colno, "error": exc.msg},
            ),
        ]
    except RecursionError:
        return [*findings, _too_deep(shown)]
    except ValueError as exc:  # e.g. an integer literal beyond Python's digit limit
        return [
            *findings,
            make_finding(
                "sidecar/bad-json",
                f"{shown}: a value cannot be read ({str(exc).splitlines()[0]})",
                file=shown,
            ),
        ]
    if not isinstance(data, dict):
        kind = {list: "an array", str: "a string", bool: "a boolean", type(None): "null"}.get(
            type(data), "a number"
        )
        return [
            *findings,
            make_finding(
                "sidecar/not-object",
                f"{shown}: the top level is {kind}; a sidecar must be a JSON object",
                file=shown,
                evidence={"type": kind},
            ),
        ]
    return data, constants, duplicates


class _StrictParser:
    """A JSON decoder whose hooks note what plain parsing would hide: non-finite numbers
    (kept as :class:`_NonFinite` placeholders, numbered in text order) and repeated keys.

    The decoder is made once per thread (making one costs more than parsing a small
    sidecar); :meth:`parse` starts each document with fresh notes.
    """

    def __init__(self) -> None:
        self.constants: list[_NonFinite] = []
        self.duplicates: list[tuple[dict[str, Any], str, list[Any]]] = []
        self.decoder = json.JSONDecoder(
            object_pairs_hook=self.on_pairs,
            parse_constant=self.on_constant,
            parse_float=self.on_float,
        )
        # without a float hook: floats are made by the C scanner (an overflowing literal
        # becomes an infinite float; see parse_sidecar_bytes)
        self.fast_decoder = json.JSONDecoder(
            object_pairs_hook=self.on_pairs, parse_constant=self.on_constant
        )

    def parse(
        self, text: str, *, exact_floats: bool = True
    ) -> tuple[Any, list[_NonFinite], list[tuple[dict[str, Any], str, list[Any]]]]:
        """Parse ``text`` as :func:`json.loads` would, with this parser's hooks.

        ``exact_floats=False`` skips the per-float hook: an overflowing literal then
        reads as an infinite float instead of a placeholder."""
        self.constants, self.duplicates = [], []
        if text.startswith("\ufeff"):  # as json.loads does for text input
            raise json.JSONDecodeError("Unexpected UTF-8 BOM (decode using utf-8-sig)", text, 0)
        decoder = self.decoder if exact_floats else self.fast_decoder
        return decoder.decode(text), self.constants, self.duplicates

    def on_constant(self, literal: str) -> _NonFinite:
        marker = _NonFinite(literal, len(self.constants))
        self.constants.append(marker)
        return marker

    def on_float(self, literal: str) -> float | _NonFinite:
        value = float(literal)
        if value in (float("inf"), float("-inf")):
            return self.on_constant(literal)
        return value

    def on_pairs(self, pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        obj = dict(pairs)
        if len(obj) != len(pairs):
            seen: dict[str, list[Any]] = {}
            for key, value in pairs:
                seen.setdefault(key, []).append(value)
            for key, values in seen.items():
                if len(values) > 1:
                    self.duplicates.append((obj, key, values))
        return obj


_THREAD = threading.local()


def _parser() -> _StrictParser:
    parser: _StrictParser | None = getattr(_THREAD, "parser", None)
    if parser is None:
        parser = _THREAD.parser = _StrictParser()
    return parser


def _too_deep(shown: str) -> Finding:
    return make_finding(
        "sidecar/too-deep",
        f"{shown}: the sidecar nests deeper than {MAX_SIDECAR_DEPTH} levels; not read",
        file=shown,
        evidence={"limit": MAX_SIDECAR_DEPTH},
    )


#: parsed values that need no cleaning (strings may hold lone surrogates, containers
#: are copied, non-finite placeholders are replaced)
_PLAIN: frozenset[type] = frozenset({int, float, bool, type(None)})
_PLAIN_OR_TEXT: frozenset[type] = _PLAIN | {str}
_DISCARDED = "\x00discarded"  # marker: the value sat in an overridden duplicate key


class _TooDeep(Exception):
    pass


class _Cleaner:
    """Copy parsed JSON, bounding depth, replacing placeholders and lone surrogates.

    The top-level object comes back as a plain ``dict``; every nested array and object
    as a :class:`FrozenList` / :class:`FrozenDict`, so that the values can be shared
    between the runs that inherit them without a copy per run.
    """

    def __init__(self, *, strings: bool = True) -> None:
        self.non_finite: list[tuple[str | None, _NonFinite]] = []
        self.surrogate_keys: set[str] = set()
        #: value types copied as they are (strings too when they cannot need cleaning)
        self.plain = _PLAIN if strings else _PLAIN_OR_TEXT
        self.strings = strings
        #: whether an infinite float was met (from an overflowing literal, when the text
        #: was parsed without the float hook)
        self.infinite = False

    def _text(self, s: str, top: str | None) -> str:
        if s.isascii():
            return s
        try:
            s.encode("utf-8")
            return s
        except UnicodeEncodeError:
            self.surrogate_keys.add(top if top is not None else "a key")
            return _SURROGATE.sub("\ufffd", s)

    def clean(self, value: Any, depth: int, top: str | None) -> Any:
        if isinstance(value, dict):
            if depth > MAX_SIDECAR_DEPTH:
                raise _TooDeep
            plain = self.plain
            out: dict[str, Any]
            if self.strings:
                out = {}
                for k, v in value.items():
                    key = self._text(k, top if top is not None else k)
                    # plain numbers, booleans and null (the common case) need no cleaning
                    out[key] = (
                        v if type(v) in plain
                        else self.clean(v, depth + 1, top if top is not None else key)
                    )
            else:
                # keys need no cleaning: copy the object at once (in C) and clean only the
                # values that are not plain, found by C iterators, not a Python loop
                out = dict(value)
                if not plain.issuperset(map(type, value.values())):
                    odd = compress(value, map(not_, map(plain.__contains__,
                                                        map(type, value.values()))))
                    for key in list(odd):
                        out[key] = self.clean(value[key], depth + 1,
                                              top if top is not None else key)
            values = out.values()
            if _INFINITY in values or _NEG_INFINITY in values:  # one C loop each
                self.infinite = True
            return out if depth == 1 else FrozenDict(out)
        if isinstance(value, list):
            if depth > MAX_SIDECAR_DEPTH:
                raise _TooDeep
            plain = self.plain
            if plain.issuperset(map(type, value)):  # numbers: nothing to clean
                items = FrozenList(value)
            else:
                items = FrozenList([self.clean(v, depth + 1, top) for v in value])
            if _INFINITY in items or _NEG_INFINITY in items:
                self.infinite = True
            return items
        if isinstance(value, str):
            return self._text(value, top)
        if isinstance(value, _NonFinite):
            self.non_finite.append((top, value))
            return None
        return value


def _duplicate_findings(
    shown: str, top_obj: dict[str, Any], duplicates: list[tuple[dict[str, Any], str, list[Any]]]
) -> list[Finding]:
    out: list[Finding] = []
    for obj, key, values in duplicates:
        top_level = obj is top_obj
        differ = any(v != values[-1] for v in values[:-1])
        severity = (
            Severity.ERROR if top_level and differ and key in TIMING_FIELDS else Severity.WARNING
        )
        where = "" if top_level else " (in a nested object)"
        if differ:
            shown_values = ", ".join(_short(v, 40) for v in values)
            what = f"with different values ({shown_values}); the last one wins"
        else:
            what = "with the same value; the last copy is kept"
        out.append(
            make_finding(
                "sidecar/duplicate-key",
                f"{shown}: key {key!r}{where} appears {len(values)} times {what}",
                severity=severity,
                file=shown,
                field=key,
                evidence={
                    "values": [_short(v) for v in values],
                    "kept": _short(values[-1]),
                    "top_level": top_level,
                },
                hint="keep a single copy of the key with the intended value",
            )
        )
    return out


def _non_finite_findings(
    shown: str, text: str, seen: list[tuple[str | None, _NonFinite]]
) -> list[Finding]:
    # positions of the literals in text order; placeholders were numbered in text order too
    positions: list[int] = []
    for m in _LITERAL.finditer(text):
        token = m.group(1)
        if token is None:
            continue
        if token in ("NaN", "Infinity", "-Infinity") or (
            any(c in token for c in ".eE") and float(token) in (float("inf"), float("-inf"))
        ):
            positions.append(m.start(1))
    by_field: dict[str | None, list[_NonFinite]] = {}
    for top, marker in seen:
        by_field.setdefault(top, []).append(marker)
    out: list[Finding] = []
    for key, markers in by_field.items():
        first = markers[0]
        where = ""
        if first.index < len(positions):
            offset = positions[first.index]
            line = text.count("\n", 0, offset) + 1
            col = offset - (text.rfind("\n", 0, offset) + 1) + 1
            where = f" at line {line} column {col}"
        literals = sorted({m.literal for m in markers})
        if key == _DISCARDED:
            subject, field_name, outcome = "a value overridden by a duplicate key", None, "ignored"
        else:
            subject, field_name, outcome = key or "a value", key, "read as null"
        out.append(
            make_finding(
                "sidecar/non-finite-number",
                f"{shown}: {subject} holds {', '.join(literals)}{where}, which is not a "
                f"JSON number; {outcome}",
                file=shown,
                field=field_name,
                evidence={"literals": literals, "count": len(markers)},
                hint="write a finite number, or remove the key",
            )
        )
    return out


# --- type checks -------------------------------------------------------------------------


def _describe(schema: Mapping[str, Any]) -> str:
    return describe_schema(schema)


def _beyond_finding(key: str, value: Any, what: str, sources: Mapping[str, str] | None,
                    display: str | None) -> Finding:
    """The ``sidecar/wrong-type`` finding of a value of the right BIDS type that no
    acquisition can have (:data:`_BEYOND_SCHEMA`)."""
    shown = (sources or {}).get(key) or display or "sidecar"
    return make_finding(
        "sidecar/wrong-type",
        f"{shown}: {key} must be {what}; it is {_short(value)}",
        file=shown,
        field=key,
        evidence={"value": _short(value, 200), "at": key, "expected": what},
        hint=f"write {key} as {what}",
    )


def check_types(
    data: Mapping[str, Any],
    display: str | None = None,
    sources: Mapping[str, str] | None = None,
) -> list[Finding]:
    """Check the known timing fields of ``data``; one ``sidecar/wrong-type`` error per bad field.

    ``display`` names the sidecar in messages. For merged (inherited)
    metadata pass ``sources`` (field -> sidecar that supplied it): each
    finding is then attributed to the file that supplied the bad value.
    Fields not in :data:`TIMING_FIELDS` are not checked.
    """
    schema = load_schema()["properties"]
    quick = _quick_checks()
    out: list[Finding] = []
    for key in sorted(TIMING_FIELDS.intersection(data)):
        value = data[key]
        if quick[key](value):
            continue
        errors = list(_validators()[key].iter_errors(value))
        if not errors:
            beyond = _BEYOND_SCHEMA.get(key)
            if beyond is not None and not beyond[0](value):
                out.append(_beyond_finding(key, value, beyond[1], sources, display))
            continue
        import jsonschema

        err = jsonschema.exceptions.best_match(errors) or errors[0]
        path = list(err.absolute_path)
        where = key + "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in path)
        shown = (sources or {}).get(key) or display or "sidecar"
        out.append(
            make_finding(
                "sidecar/wrong-type",
                f"{shown}: {key} must be {_describe(schema[key])}; "
                f"{where} is {_short(err.instance)}",
                file=shown,
                field=key,
                evidence={
                    "value": _short(value, 200),
                    "at": where,
                    "expected": _describe(schema[key]),
                },
                hint=f"write {key} as {_describe(schema[key])}",
            )
        )
    return out
