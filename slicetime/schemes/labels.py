"""Scheme labels: the one place that writes them and reads them back.

A label describes the order of data-array indices (after
``SliceEncodingDirection``) as slicetime prints it:

* ``single slice``, ``simultaneous``, ``irregular``;
* ``ascending`` / ``descending`` (sequential);
* ``interleaved ascending from S`` (step 2);
* ``interleaved step K descending from S`` (step 3 or more);
* ``interleaved step K ascending, residue order 1,0,2`` (runs not in the usual order);
* any order label after ``multiband ×M, `` (M ≥ 2).

:func:`format_label` writes a :class:`LabelParts`, :func:`parse_label` reads
one back (``parse_label(format_label(p)) == p`` and
``format_label(parse_label(s)) == s``; ``tests/test_scheme_labels.py`` checks
both over generated values). A lab policy may also name an order *family*
(``interleaved``, ``sequential descending``, ``ascending``):
:func:`scheme_family`. Pure: no I/O.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from typing import Literal, cast


@dataclass(frozen=True)
class SchemeFamily:
    """An order family: ``kind`` sequential/interleaved and/or a direction (None = any)."""

    kind: Literal["sequential", "interleaved"] | None = None
    ascending: bool | None = None


__all__ = [
    "ASCENDING",
    "DESCENDING",
    "IRREGULAR",
    "SIMULTANEOUS",
    "SINGLE_SLICE",
    "LabelParts",
    "format_label",
    "label_multiband",
    "label_problem",
    "normalise_label",
    "order_label",
    "parse_label",
    "scheme_family",
    "with_multiband",
]

SINGLE_SLICE = "single slice"
SIMULTANEOUS = "simultaneous"
IRREGULAR = "irregular"
ASCENDING = "ascending"
DESCENDING = "descending"
#: labels that name no order of slices
SPECIAL_LABELS = (SINGLE_SLICE, SIMULTANEOUS, IRREGULAR)


@dataclass(frozen=True)
class LabelParts:
    """What an order label says. ``step`` 1 is sequential (``start`` is then not
    printed and is None); ``residue_order`` is set only for interleaved runs taken in
    an unusual order (then ``start`` is None)."""

    step: int
    ascending: bool
    start: int | None = None
    residue_order: tuple[int, ...] | None = None
    multiband: int = 1


def order_label(
    step: int,
    ascending: bool,
    start: int | None,
    residue_order: tuple[int, ...] | None = None,
) -> str:
    """The label of an order of base slices (no multiband part)."""
    direction = ASCENDING if ascending else DESCENDING
    if step == 1:
        return direction
    if residue_order is not None:
        residues = ",".join(str(r) for r in residue_order)
        return f"interleaved step {step} {direction}, residue order {residues}"
    if step == 2:
        return f"interleaved {direction} from {start}"
    return f"interleaved step {step} {direction} from {start}"


def with_multiband(inner: str, multiband: int) -> str:
    """``inner`` with the multiband part in front when ``multiband`` is 2 or more."""
    return inner if multiband == 1 else f"multiband ×{multiband}, {inner}"


def format_label(parts: LabelParts) -> str:
    """The label of ``parts`` (the inverse of :func:`parse_label`)."""
    inner = order_label(parts.step, parts.ascending, parts.start, parts.residue_order)
    return with_multiband(inner, parts.multiband)


_ORDER = (
    r"(?:(?P<seq>ascending|descending)"
    r"|interleaved (?P<dir2>ascending|descending) from (?P<start2>\d+)"
    r"|interleaved step (?P<step>\d+) (?P<dirk>ascending|descending) from (?P<startk>\d+)"
    r"|interleaved step (?P<rstep>\d+) (?P<dirr>ascending|descending), residue order "
    r"(?P<residues>\d+(?:,\d+)+))"
)
_LABEL = re.compile(rf"(?:multiband ×(?P<mb>\d+), )?{_ORDER}\Z")
_FAMILY = re.compile(
    r"(?:(?P<kind>sequential|interleaved)(?: (?P<dir1>ascending|descending))?"
    r"|(?P<dir2>ascending|descending))\Z"
)


def parse_label(text: str) -> LabelParts | str | None:
    """Read a label back: its :class:`LabelParts`, the label itself for the special
    labels (``single slice``, ``simultaneous``, ``irregular``), or None when the
    text is not a label slicetime could print (a multiband ×1 part, a step-2 order
    written with ``step 2``, or a residue order that is not a permutation of
    ``0..step-1``)."""
    if text in SPECIAL_LABELS:
        return text
    m = _LABEL.match(text)
    if m is None:
        return None
    multiband = int(m.group("mb")) if m.group("mb") else 1
    if m.group("mb") is not None and multiband < 2:
        return None
    if m.group("seq"):
        parts = LabelParts(1, m.group("seq") == ASCENDING, None, None, multiband)
    elif m.group("dir2"):
        parts = LabelParts(2, m.group("dir2") == ASCENDING, int(m.group("start2")), None,
                           multiband)
    elif m.group("dirk"):
        parts = LabelParts(int(m.group("step")), m.group("dirk") == ASCENDING,
                           int(m.group("startk")), None, multiband)
        if parts.step < 3:
            return None
    else:
        step = int(m.group("rstep"))
        residues = tuple(int(r) for r in m.group("residues").split(","))
        if step < 3 or sorted(residues) != list(range(step)):
            return None
        parts = LabelParts(step, m.group("dirr") == ASCENDING, None, residues, multiband)
    # numbers are printed without leading zeros: "from 01" was never printed
    return parts if format_label(parts) == text else None


def normalise_label(text: str) -> str:
    """A label or family as a person may type it, in the printed form: single spaces,
    lower case, ``multiband x4`` / ``*4`` as ``multiband ×4``, ``1, 0`` as ``1,0``."""
    text = " ".join(text.split()).lower()
    text = re.sub(r"^multiband\s*[x×*]\s*(\d+)\s*,\s*", r"multiband ×\1, ", text)
    return re.sub(r"\s*,\s*(?=\d)", ",", text)


def scheme_family(text: str) -> SchemeFamily | None:
    """The order family a (normalised) value names, or None for anything else."""
    m = _FAMILY.match(text)
    if m is None:
        return None
    direction = m.group("dir1") or m.group("dir2")
    kind = cast(Literal["sequential", "interleaved"] | None, m.group("kind"))
    return SchemeFamily(
        kind=kind,
        ascending=None if direction is None else direction == ASCENDING,
    )


def label_multiband(text: str) -> int | None:
    """The multiband factor an exact order label implies (None for a family, a special
    label or text that is no label)."""
    if scheme_family(text) is not None:
        return None
    parts = _loose_parts(text)
    return None if parts is None else parts[0]


def _loose_parts(text: str) -> tuple[int, int | None] | None:
    """(multiband, step) of text that has the shape of an order label, also when
    :func:`parse_label` refuses it, so :func:`label_problem` can say why."""
    m = _LABEL.match(text)
    if m is None:
        return None
    step = m.group("step") or m.group("rstep")
    return (int(m.group("mb")) if m.group("mb") else 1), (int(step) if step else None)


def label_problem(text: str) -> str | None:
    """Why a (normalised) value is neither an exact label nor a family (None: it is one)."""
    if scheme_family(text) is not None or text in SPECIAL_LABELS:
        return None
    loose = _loose_parts(text)
    if loose is None:
        return (
            f"{json.dumps(text, ensure_ascii=False)} is not a scheme label or family; labels "
            'look like "ascending", "interleaved ascending from 1", "multiband ×4, interleaved '
            'descending from 17", families are ascending, descending, interleaved, sequential'
        )
    multiband, step = loose
    if multiband < 2 and text.startswith("multiband"):
        return "slicetime never prints multiband ×1; leave the multiband part out"
    if step is not None and step < 3:
        return (
            'slicetime prints step 2 as "interleaved ascending from S" (or descending); '
            "write it that way"
        )
    return None
