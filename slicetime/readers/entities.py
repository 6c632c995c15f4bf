"""BIDS file names: entities, suffix, extension.

A BIDS name is ``key-value`` pairs joined by ``_``, then a suffix, then an
extension starting at the first dot: ``sub-01_ses-2_task-rest_run-1_bold.nii.gz``
has entities ``sub=01, ses=2, task=rest, run=1``, suffix ``bold`` and
extension ``.nii.gz``. Top-level inherited files have fewer entities
(``task-rest_bold.json``) or none (``bold.json``).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field

__all__ = ["IMAGE_EXTENSIONS", "ParsedName", "image_stem", "parse_name"]

#: Extensions of NIfTI image files, longest first.
IMAGE_EXTENSIONS: tuple[str, ...] = (".nii.gz", ".nii")

#: a whole stem: ``key-value`` parts, each followed by ``_``, then the suffix
_STEM = re.compile(r"(?:[A-Za-z0-9]+-[A-Za-z0-9]+_)*[A-Za-z0-9]+\Z")


@dataclass(frozen=True)
class ParsedName:
    """The parts of a BIDS file name. ``entities`` keeps the order of the name."""

    entities: Mapping[str, str] = field(default_factory=dict)
    suffix: str = ""
    extension: str = ""

    @property
    def stem(self) -> str:
        """The name without its extension."""
        parts = [f"{k}-{v}" for k, v in self.entities.items()]
        return "_".join([*parts, self.suffix])

    @property
    def name(self) -> str:
        return self.stem + self.extension

    def applies_to(self, other: ParsedName) -> bool:
        """True when this (sidecar) name is inherited by ``other`` (a data file).

        Same suffix, and every entity of this name present in ``other`` with the
        same value (BIDS inheritance principle).
        """
        if self.suffix != other.suffix:
            return False
        theirs = other.entities
        return all(theirs.get(k) == v for k, v in self.entities.items())


def parse_name(name: str) -> ParsedName | None:
    """Split a BIDS file name; ``None`` when it does not follow the BIDS pattern.

    The extension runs from the first dot (``.nii.gz``, ``.json``, ``.tsv.gz``);
    keys, values and the suffix are alphanumeric; a key may not repeat. Hidden
    names (starting with a dot) do not parse.
    """
    if not name or name.startswith(".") or "/" in name:
        return None
    stem, dot, rest = name.partition(".")
    if not _STEM.match(stem):
        return None
    *pairs, suffix = stem.split("_")
    entities: dict[str, str] = {}
    for pair in pairs:
        key, _, value = pair.partition("-")
        if key in entities:
            return None
        entities[key] = value
    return ParsedName(entities=entities, suffix=suffix, extension=dot + rest)


def image_stem(name: str) -> str:
    """``name`` without a NIfTI extension (or, failing that, without its last extension)."""
    lower = name.lower()
    for ext in IMAGE_EXTENSIONS:
        if lower.endswith(ext) and len(name) > len(ext):
            return name[: -len(ext)]
    stem, dot, _ = name.rpartition(".")
    return stem if dot and stem else name
