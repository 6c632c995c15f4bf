"""The lab policy's value types (model layer: no I/O). Loading builds them
(:mod:`slicetime.policy.loading`), the rules read them (:mod:`slicetime.policy.checks`)."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from slicetime.model import TIME_TOLERANCE, Severity
from slicetime.policy.patterns import code_matches, is_pattern, path_matches

__all__ = [
    "EXPECTATION_KEYS",
    "INVALID_CODE",
    "POLICY_FILENAME",
    "AcceptEntry",
    "ExpectedProtocol",
    "IgnoreEntry",
    "Policy",
]

POLICY_FILENAME = "slicetime-policy.toml"
#: the finding code of every problem with the policy's content
INVALID_CODE = "policy/invalid"
#: the keys of a protocol that state an expectation (at least one is required)
EXPECTATION_KEYS: tuple[str, ...] = (
    "repetition_time",
    "slices",
    "multiband_factor",
    "scheme",
    "slice_encoding_direction",
)


@dataclass(frozen=True)
class ExpectedProtocol:
    """One ``[[protocols]]`` entry: what the runs its ``match`` selects should look like.

    ``index`` is the entry's position in the file (0-based), for messages.
    ``match`` values are strings, except index entities, which are ints.
    ``scheme`` is normalised (``multiband ×M``, single spaces, lower case).
    """

    index: int
    match: Mapping[str, str | int] = dataclasses.field(default_factory=dict)
    name: str | None = None
    repetition_time: float | None = None
    slices: int | None = None
    multiband_factor: int | None = None
    scheme: str | None = None
    slice_encoding_direction: str | None = None
    tolerance: float = TIME_TOLERANCE

    @property
    def specificity(self) -> int:
        """How many keys the selector has; the most specific matching protocol wins."""
        return len(self.match)

    @property
    def key_path(self) -> str:
        return f"protocols[{self.index}]"

    def selector(self) -> str:
        """The selector for messages: ``task=rest, acq=mb4`` (``every run`` when empty)."""
        if not self.match:
            return "every run"
        return ", ".join(f"{k}={v}" for k, v in self.match.items())

    def describe(self) -> str:
        """``protocol "name" (task=rest)`` or ``protocols[0] (task=rest)``."""
        who = f'protocol "{self.name}"' if self.name else f"policy {self.key_path}"
        return f"{who} ({self.selector()})"

    def expectations(self) -> dict[str, Any]:
        """The expectations this protocol sets (keys of :data:`EXPECTATION_KEYS`)."""
        return {k: getattr(self, k) for k in EXPECTATION_KEYS if getattr(self, k) is not None}

    def selects(self, entities: Mapping[str, str], datatype: str | None, suffix: str) -> bool:
        """Whether a run with these name parts is selected by ``match``."""
        for key, wanted in self.match.items():
            if key == "datatype":
                found: str | None = datatype
            elif key == "suffix":
                found = suffix
            else:
                found = entities.get(key)
            if found is None:
                return False
            if isinstance(wanted, int):
                if not found.isdigit() or int(found) != wanted:
                    return False
            elif found != wanted:
                return False
        return True


@dataclass(frozen=True)
class IgnoreEntry:
    """One ``[[waive]]`` entry: drop findings whose code and run path both match
    (``codes``: the entry's ``findings``; ``paths``: its ``runs``)."""

    index: int
    codes: tuple[str, ...]
    reason: str
    paths: tuple[str, ...] = ("**",)

    def covers(self, path: str, code: str) -> bool:
        return any(code_matches(c, code) for c in self.codes) and any(
            path_matches(p, path) for p in self.paths
        )


@dataclass(frozen=True)
class AcceptEntry:
    """One ``[[accept]]`` entry (or one ``correct --accept CODE[:PATTERN]``): ``correct``
    goes ahead on the runs ``paths`` select despite findings of ``codes`` that put their
    timing in doubt (exact codes, never patterns: a doubt is accepted by name).
    ``given`` is how outputs name the acceptance (``--accept ...`` or the policy entry)."""

    index: int
    codes: tuple[str, ...]
    reason: str
    paths: tuple[str, ...] = ("**",)
    given: str = ""

    def covers(self, path: str, code: str) -> bool:
        return code in self.codes and any(path_matches(p, path) for p in self.paths)


@dataclass(frozen=True)
class Policy:
    """A loaded lab policy. ``file`` is how messages name the policy file."""

    file: str | None = None
    version: int = 1
    protocols: tuple[ExpectedProtocol, ...] = ()
    severity: Mapping[str, Severity] = dataclasses.field(default_factory=dict)
    ignores: tuple[IgnoreEntry, ...] = ()  # the [[waive]] entries
    accepts: tuple[AcceptEntry, ...] = ()
    #: sentences about former key names the file used (``policy/former-keys`` notes)
    notices: tuple[str, ...] = ()

    def severity_for(self, code: str) -> Severity | None:
        """The lab's severity for ``code``: an exact key, else the first matching pattern."""
        if code in self.severity:
            return self.severity[code]
        for pattern, severity in self.severity.items():
            if is_pattern(pattern) and code_matches(pattern, code):
                return severity
        return None

    def ignore_entry(self, path: str, code: str) -> IgnoreEntry | None:
        """The first ``[[waive]]`` entry that drops ``code`` on ``path``, if any."""
        for entry in self.ignores:
            if entry.covers(path, code):
                return entry
        return None

