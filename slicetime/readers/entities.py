"""BIDS file names: entities, suffix, extension.

A BIDS name is ``key-value`` pairs joined by ``_``, then a suffix, then an
extension starting at the first dot: ``sub-01_ses-2_task-rest_run-1_bold.nii.gz``
has entities ``sub=01, ses=2, task=rest, run=1``, suffix ``bold`` and
extension ``.nii.gz``. Top-level inherited files have fewer entities
(``task-rest_bold.json``) or none (``bold.json``).
"""

from __future__ import annotations

import functools
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

from slicetime.model import assembled

__all__ = [
    "COMPANION_SUFFIXES",
    "IMAGE_EXTENSIONS",
    "NOT_RUN_SUFFIXES",
    "RUN_FOLDERS",
    "TIME_SERIES_SUFFIXES",
    "ParsedName",
    "image_stem",
    "looks_like_run",
    "parse_name",
    "run_name_problem",
    "sidecar_name",
    "sidecar_path",
]

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
        mine, theirs = self.entities, other.entities
        if type(mine) is dict and type(theirs) is dict and None not in mine.values():
            # the same test as below in one C call (every pair of mine among theirs);
            # compared with it in tests/test_perf_equivalence.py
            return mine.items() <= theirs.items()
        return all(theirs.get(k) == v for k, v in mine.items())


@functools.lru_cache(maxsize=4096)
def parse_name(name: str) -> ParsedName | None:
    """Split a BIDS file name; ``None`` when it does not follow the BIDS pattern.

    Remembered (a run's name is parsed by the walk, the sidecar resolution and the
    record): the result is shared, so its ``entities`` must not be changed.

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
    # ParsedName(...) without the frozen constructor's setattr per field (the name of
    # every file a walk meets is parsed; tests/test_perf_equivalence.py compares)
    return assembled(ParsedName, {"entities": entities, "suffix": suffix,
                                  "extension": dot + rest})


def image_stem(name: str) -> str:
    """``name`` without a NIfTI extension (or, failing that, without its last extension)."""
    lower = name.lower()
    for ext in IMAGE_EXTENSIONS:
        if lower.endswith(ext) and len(name) > len(ext):
            return name[: -len(ext)]
    stem, dot, _ = name.rpartition(".")
    return stem if dot and stem else name


def sidecar_name(image_name: str) -> str:
    """The name of an image's own sidecar: ``x_bold.nii.gz`` → ``x_bold.json``.

    The one rule for it (readers, fix and correct all call this): the NIfTI
    extension, in any case, gives way to ``.json`` (BIDS: a data file's own
    sidecar shares its stem).
    """
    return image_stem(image_name) + ".json"


def sidecar_path(run_path: str) -> str:
    """The own sidecar of a run given as a ``/``-separated path (relative or not)."""
    found = _SIDECAR_PATHS.get(run_path)
    if found is None:  # asked several times per run as the audit goes: the last few kept
        if len(_SIDECAR_PATHS) >= 256:
            _SIDECAR_PATHS.clear()
        folder, slash, name = run_path.rpartition("/")
        found = _SIDECAR_PATHS[run_path] = f"{folder}{slash}{sidecar_name(name)}"
    return found


_SIDECAR_PATHS: dict[str, str] = {}


#: folders whose NIfTI files are time series (BIDS datatypes func, perf, dwi)
RUN_FOLDERS: frozenset[str] = frozenset({"func", "perf", "dwi"})
#: the suffixes of time series (BIDS): a NIfTI with one of them is a run in any folder
#: (the one table of them; :mod:`~slicetime.readers.dataset` walks by it)
TIME_SERIES_SUFFIXES: frozenset[str] = frozenset({"bold", "cbv", "phase", "asl", "dwi"})
#: suffixes never treated as runs, even with SliceTiming in their sidecar or given by
#: name: why each is not a time series (``dataset.not_a_run``)
NOT_RUN_SUFFIXES: Mapping[str, str] = {
    "sbref": "a single-band reference (sbref): one reference volume, not a time series",
}
#: suffixes of images that go with a series and are runs only when their own sidecar
#: has SliceTiming (an arterial spin labelling series' M0 calibration scan)
COMPANION_SUFFIXES: frozenset[str] = frozenset({"m0scan"})
#: any of those suffixes as a word of a name: a file meant as (or beside) a run
_SERIES_WORD = re.compile(
    r"(?:^|[^A-Za-z0-9])(?:"
    + "|".join(sorted(TIME_SERIES_SUFFIXES | set(NOT_RUN_SUFFIXES) | COMPANION_SUFFIXES))
    + r")(?:[^A-Za-z0-9]|$)",
    re.IGNORECASE,
)
_ALNUM = re.compile(r"[A-Za-z0-9]+\Z")
#: a valid run name but for a repeated key (``run_name_problem``'s rules in one pattern)
_VALID_RUN = re.compile(
    r"sub-[A-Za-z0-9]+(?:_[A-Za-z0-9]+-[A-Za-z0-9]+)*_[A-Za-z0-9]+\.nii(?:\.gz)?\Z")


def looks_like_run(name: str, folder: str) -> bool:
    """True for a NIfTI name that is meant as a functional run: it sits in a ``func``,
    ``perf`` or ``dwi`` folder, or a word of its name is a suffix of the tables above
    (``bold``, ``cbv``, ``phase``, ``asl``, ``dwi``, ``sbref``, ``m0scan``; ``_bold (copy)``,
    ``task-rest-eyes_bold``). Hidden names (``.``, e.g. ``._`` metadata forks) never are.
    Whether the name is valid is :func:`run_name_problem`."""
    if name.startswith("."):
        return False
    stem = image_stem(name)
    if stem == name:  # not a NIfTI name
        return False
    return folder in RUN_FOLDERS or _SERIES_WORD.search(stem) is not None


@functools.lru_cache(maxsize=1024)
def run_name_problem(name: str) -> str | None:
    """Why ``name`` is not a valid BIDS name for a NIfTI run, or None when it is.

    A valid name is ``sub-<label>[_<key>-<label>...]_<suffix>`` plus ``.nii`` or
    ``.nii.gz``; keys, labels and the suffix are letters and digits, a key appears
    once (BIDS file naming, from memory).
    """
    if _VALID_RUN.match(name):  # the common case at once (tested equal to the rest)
        keys = [pair.partition("-")[0] for pair in name.split("_")[:-1]]
        if len(set(keys)) == len(keys):
            return None
    stem = image_stem(name)
    if stem == name:
        return "not a NIfTI name (.nii or .nii.gz)"
    extension = name[len(stem):]
    if extension not in IMAGE_EXTENSIONS:
        return f"the extension '{extension}' is not .nii or .nii.gz"
    if "." in stem:
        part = next(p for p in stem.split("_") if "." in p)
        return f"'{part}' holds a '.': labels are letters and digits only, and a name has " \
            "one extension"
    *pairs, suffix = stem.split("_")
    seen: set[str] = set()
    for pair in pairs:
        key, dash, value = pair.partition("-")
        if not dash:
            return f"'{pair}' is not a key-value entity (key-label)"
        if "-" in value:
            return f"'{pair}' holds more than one '-': a label is letters and digits only"
        if not _ALNUM.match(key) or not _ALNUM.match(value):
            return f"'{pair}': keys and labels are letters and digits only"
        if key in seen:
            return f"the entity '{key}' appears twice"
        seen.add(key)
    if not _ALNUM.match(suffix):
        return f"the suffix '{suffix}' is not letters and digits only"
    if not pairs or not pairs[0].startswith("sub-"):
        return "a run's name starts with sub-<label>"
    return None
