"""The BIDS inheritance principle: which sidecars apply to a data file, merged how.

A sidecar applies to a data file when it is a ``.json`` file in a folder from
the dataset root down to the data file's own folder, has the same suffix, and
its entities are a subset (same keys, same values) of the data file's
entities. Values from higher folders are inherited unless a deeper sidecar
sets the same key; the data file's own sidecar (same stem) is the deepest.
Merging is per top-level key (a deeper object value replaces a higher one
whole). Separate echoes (``echo-N``) and parts (``part-mag``/``part-phase``)
are separate runs and resolve independently through the subset rule.

The standard allows at most one applicable sidecar per folder level. When
there are several, ``inherit/ambiguous`` is reported: a **warning** when they
agree on every timing field (:data:`~slicetime.readers.sidecar.TIMING_FIELDS`)
that two of them set, an **error** per timing field on which they disagree,
naming the files and the field. They are still merged, deterministically: at
one level fewer entities first and ties by file name, so the more specific
file overrides the less specific one; the data file's own sidecar always last.

:class:`SidecarIndex` caches folder listings and parsed sidecars for one walk,
so a top-level sidecar inherited by a thousand runs is parsed once.

Memory: parsed values are shared, never copied per run. Nested arrays and objects
come from the parser frozen (:class:`~slicetime.readers.sidecar.FrozenList`,
:class:`~slicetime.readers.sidecar.FrozenDict`), each run's merged metadata is a
new top-level dict holding the same value objects, so a 13 MB ``SliceTiming``
inherited by 400 runs is held once. A :class:`SidecarStore` holds the parsed
shared (inherited) sidecars for a whole walk, across the chunks of runs and,
through pickling, once per worker process; sidecars of 1 MiB and more
(:data:`LARGE_SIDECAR_BYTES`) count against a total budget per walk
(:data:`SHARED_BUDGET_BYTES`, bytes on disk). One that no longer fits is not
parsed: every run inheriting it gets a ``sidecar/over-budget`` error instead.
"""

from __future__ import annotations

import copy
import os
import weakref
from collections import OrderedDict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

from slicetime.codes import make_finding
from slicetime.model import Finding, Severity, assembled

from .entities import ParsedName, parse_name, sidecar_name
from .sidecar import (
    MAX_SIDECAR_BYTES,
    TIMING_FIELDS,
    FrozenDict,
    FrozenList,
    check_types,
    load_sidecar,
    parse_sidecar_bytes,
    quick_checks,
    read_sidecar_bytes,
)

__all__ = [
    "LARGE_SIDECAR_BYTES",
    "SHARED_BUDGET_BYTES",
    "Resolution",
    "SidecarIndex",
    "SidecarStore",
    "ValueSharer",
    "folder_chain",
    "relative_posix",
    "share_equal_values",
]

_OWN_CACHE_SIZE = 256
#: level choices remembered per folder (a flat folder of many runs stops adding)
_CHOICES_KEPT = 4096
#: values that passed the quick type check, remembered per index
_PASSED_KEPT = 4096
#: folder listings a walk's store keeps for all its chunks (see SidecarStore)
LISTINGS_KEPT = 4096
#: own sidecars kept by content (see SidecarStore.parsed): how many, and how large
_CONTENTS_KEPT = 4096
_CONTENT_KEPT_BYTES = 1 << 16
#: and how many bytes of such content in all (their parse holds several times as much)
_CONTENTS_KEPT_BYTES = 4 << 20
#: shared sidecars of this size on disk or more count against the walk's budget
LARGE_SIDECAR_BYTES = 1 << 20
#: bytes on disk of large shared sidecars parsed and held in one walk (per process)
SHARED_BUDGET_BYTES = 64 << 20

Loaded = tuple[dict[str, Any] | None, tuple[Finding, ...]]


class SidecarStore:
    """The parsed shared sidecars of one walk, under a memory budget.

    Each shared sidecar is parsed once per walk and process, and its value is
    handed to every run that inherits it. Large sidecars (at least
    :data:`LARGE_SIDECAR_BYTES` on disk) count against ``budget``; one that does not
    fit in what is left is not parsed and reads as a ``sidecar/over-budget`` error,
    remembered like a parsed file (so it is never tried again in the walk).

    Pickling a store (to send a job to a worker process) sends only its identity:
    in the worker it becomes that process's store for the same walk, so the chunks
    a worker audits share one store too.
    """

    def __init__(self, budget: int = SHARED_BUDGET_BYTES, *, token: str | None = None,
                 listings: dict[str, tuple[str, ...]] | None = None,
                 not_plain: dict[str, frozenset[str]] | None = None) -> None:
        self.budget = budget
        #: folder → sidecar names, as the walk listed them (``iter_runs(listings=...)``);
        #: each is taken once, then kept with the listings the store remembers
        self.walked = listings if listings is not None else {}
        #: folder → names its listing in the walk gave as not regular files or as links
        #: (``iter_runs(not_plain=...)``); not sent to worker processes, which then ask
        self.not_plain = not_plain if not_plain is not None else {}
        self.token = token if token is not None else os.urandom(8).hex()
        self.used = 0
        self.parse_count = 0
        self._entries: dict[tuple[str, str], Loaded] = {}
        #: sidecar bytes -> their parse, for content without findings (see ``parsed``)
        self._contents: dict[bytes, Loaded] = {}
        self._content_bytes = 0
        self._listings: OrderedDict[tuple[str, str | None], _Listing] = OrderedDict()
        _STORES[self.token] = self

    def __reduce__(self) -> tuple[Any, ...]:
        return (_store_for, (self.token, self.budget))

    def __len__(self) -> int:
        return len(self._entries)

    def known_plain(self, path: str) -> bool:
        """Whether the walk listed ``path``'s folder and did not see ``path`` as a link
        or anything but a regular file there (:func:`.errors.open_regular`'s ``plain``:
        whatever is found at the open that is not a regular file is checked then)."""
        folder, _, name = path.rpartition(os.sep)
        odd = self.not_plain.get(folder)
        return odd is not None and name not in odd

    def listing(self, key: str, base: str | None) -> _Listing | None:
        """The remembered listing of folder ``key`` (problems shown relative to ``base``)."""
        found = self._listings.get((key, base))
        if found is not None:
            self._listings.move_to_end((key, base))
        return found

    def remember_listing(self, key: str, base: str | None, listing: _Listing) -> None:
        """Keep a folder listing for every chunk of the walk. Bounded (least recently
        used first out): the folders every run passes (the root, a subject's) stay, and
        a 25,000-entry root is listed once per walk, not once per chunk of runs."""
        self._listings[(key, base)] = listing
        if len(self._listings) > LISTINGS_KEPT:
            self._listings.popitem(last=False)

    def get(self, path: str, display: str, root: str | None = None) -> tuple[Loaded, bool]:
        """The parsed sidecar at ``path`` and whether it was parsed by this call
        (``root``: its dataset root, see :func:`.sidecar.load_sidecar`)."""
        key = (path, display)
        cached = self._entries.get(key)
        if cached is not None:
            return cached, False
        try:
            size = os.stat(path).st_size
        except OSError:
            size = 0  # load_sidecar reports the problem
        if LARGE_SIDECAR_BYTES <= size <= MAX_SIDECAR_BYTES:
            if self.used + size > self.budget:
                value: Loaded = (None, (self._over_budget(display, size),))
                self._entries[key] = value
                return value, False
            self.used += size
        data, findings = load_sidecar(path, display, root=root)
        self.parse_count += 1
        value = (data, tuple(findings))
        self._entries[key] = value
        return value, True

    def parsed(self, raw: bytes, shown: str) -> tuple[Loaded, bool]:
        """``raw`` parsed (:func:`parse_sidecar_bytes`; ``shown`` names it in findings).
        Content parsed without a finding is kept by its bytes: the runs' own sidecars
        of a study are often byte for byte alike (one per run, the same fields), and
        they share one parsed (never changed) value. Content with findings is parsed
        again each time, since the findings name the file. Also says whether this
        call parsed."""
        found = self._contents.get(raw)
        if found is not None:
            return found, False
        data, findings = parse_sidecar_bytes(raw, shown)
        value: Loaded = (data, tuple(findings))
        if not findings and len(raw) <= _CONTENT_KEPT_BYTES \
                and len(self._contents) < _CONTENTS_KEPT \
                and self._content_bytes + len(raw) <= _CONTENTS_KEPT_BYTES:
            self._contents[raw] = value
            self._content_bytes += len(raw)
        return value, True

    def _over_budget(self, shown: str, size: int) -> Finding:
        return make_finding(
            "sidecar/over-budget",
            f"{shown}: this inherited sidecar has {size} bytes, and the large inherited "
            f"sidecars parsed in this audit already hold {self.used} of the {self.budget} "
            "bytes allowed; not read",
            file=shown,
            evidence={"size": size, "used": self.used, "budget": self.budget},
            hint="move bulk data out of the sidecars; audit fewer datasets at once",
        )


#: the stores of this process by walk token (weak: a store lives as long as its walk)
_STORES: weakref.WeakValueDictionary[str, SidecarStore] = weakref.WeakValueDictionary()
#: in a worker process, the stores made for recent walks (kept between jobs)
_RECENT: list[SidecarStore] = []


def _store_for(token: str, budget: int) -> SidecarStore:
    store = _STORES.get(token)
    if store is None:
        store = SidecarStore(budget, token=token)
        _RECENT.append(store)
        del _RECENT[:-2]  # a worker serves one walk at a time; keep the last two at most
    return store


class ValueSharer:
    """Make equal large metadata values of different runs one object again, as records
    arrive.

    Records that come back from worker processes hold their own copy of an inherited
    value per chunk (pickling copies). :meth:`add` replaces a record's value by the
    first equal one seen from the same sidecar and key, so the parent holds each
    inherited value once however many chunks carried it. Only frozen values (never
    changed after parsing) of at least 64 items are considered.
    """

    def __init__(self) -> None:
        self._first: dict[tuple[str, str], Any] = {}
        self.replaced = 0

    def add(self, record: Any) -> None:
        metadata = record.metadata
        sources = record.metadata_sources
        for key, value in metadata.items():
            if type(value) not in _FROZEN or len(value) < _SHARE_MIN_ITEMS:
                continue
            where = (sources.get(key, ""), key)
            seen = self._first.setdefault(where, value)
            if seen is not value and seen == value:
                metadata[key] = seen
                self.replaced += 1


def share_equal_values(records: Iterable[Any]) -> int:
    """:class:`ValueSharer` over ``records``; returns how many values were replaced."""
    sharer = ValueSharer()
    for record in records:
        sharer.add(record)
    return sharer.replaced


def relative_posix(path: Path, root: Path | None) -> str:
    """``path`` relative to ``root`` with forward slashes, else ``path`` as posix."""
    if root is not None:
        if os.sep == "/":  # the common case without pathlib's part-by-part comparison
            below = _strip_root(str(path), str(root))
            if below is not None:
                return below
        try:
            return path.relative_to(root).as_posix()
        except ValueError:
            pass
    return path.as_posix()


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


#: fields whose overriding by a deeper sidecar is worth reporting
OVERRIDE_TRACKED = frozenset({
    "SliceTiming", "RepetitionTime", "SliceEncodingDirection", "MultibandAccelerationFactor",
    "DelayTime", "VolumeTiming",
})


@dataclass(frozen=True)
class Resolution:
    """The metadata of one data file after the inheritance principle.

    ``metadata`` is a fresh top-level dict (keys may be added or removed); nested
    arrays and objects are frozen and shared with every run that inherits them
    (copy before changing them); ``sources`` maps each key to
    the sidecar (relative posix path) that supplied the winning value;
    ``chain`` lists the applicable sidecars top-down in merge order;
    ``findings`` holds the parse problems of applicable sidecars (attributed
    to the sidecar), ``inherit/ambiguous`` findings and, when the index checks
    types, ``sidecar/wrong-type`` errors for the merged timing fields
    (attributed to the sidecar that supplied the bad value).
    """

    metadata: dict[str, Any]
    sources: dict[str, str]
    chain: tuple[str, ...]
    findings: tuple[Finding, ...]
    name: ParsedName | None = None
    levels: tuple[tuple[str, ...], ...] = field(default=())
    #: timing fields whose inherited value a deeper sidecar replaced with a different
    #: one: key -> ((sidecar, value), ...) of the shadowed values, top-down
    overridden: dict[str, tuple[tuple[str, Any], ...]] = field(default_factory=dict)
    #: each applicable sidecar in merge order with its parsed value (the very object the
    #: store holds, None when unreadable): ``metadata``, ``sources``, ``chain`` and
    #: ``overridden`` follow from it alone, so the audit's content memo keys on the
    #: names and the identities of these values instead of on every key and value
    merged: tuple[tuple[str, dict[str, Any] | None], ...] = ()


@dataclass
class _Listing:
    jsons: list[tuple[str, ParsedName | None]]
    problem: Finding | None = None


class SidecarIndex:
    """Folder listings and parsed sidecars of one walk, with :meth:`resolve`.

    ``root`` is the default dataset root for :meth:`resolve`. With
    ``check_field_types`` (default) each resolution includes the
    ``sidecar/wrong-type`` findings of the merged metadata.
    ``parse_count`` counts sidecar files actually read and parsed.
    """

    def __init__(
        self,
        root: Path | None = None,
        *,
        check_field_types: bool = True,
        store: SidecarStore | None = None,
    ) -> None:
        # an index is cheap to make (one per chunk of runs, or per run): no Path until asked
        self._root_text = os.path.abspath(root) if root is not None else None
        self.check_field_types = check_field_types
        self.parse_count = 0
        #: parsed shared sidecars: the walk's store when given (shared between chunks)
        self.store = store if store is not None else SidecarStore()
        self._listings: dict[str, _Listing] = {}
        self._folders: dict[tuple[str, str | None], _Folder] = {}
        self._chains: dict[tuple[str, str | None], tuple[_Folder, ...]] = {}
        self._checked: dict[tuple[str, str], tuple[Finding, ...]] = {}
        #: (shared sidecar, key) or (key, id of a frozen value) -> the value that passed
        #: the quick type check
        self._passed: dict[tuple[str, Any], Any] = {}
        self._own: OrderedDict[
            tuple[str, str], tuple[dict[str, Any] | None, tuple[Finding, ...]]
        ] = OrderedDict()

    @property
    def root(self) -> Path | None:
        """The default dataset root (absolute), or None."""
        return Path(self._root_text) if self._root_text is not None else None

    # -- caches ---------------------------------------------------------------------------

    def listing(self, directory: Path | str, root: Path | str | None = None) -> _Listing:
        """The ``.json`` names in ``directory`` (parsed), cached."""
        key = os.fspath(directory)
        cached = self._listings.get(key)
        if cached is not None:
            return cached
        base = os.fspath(root) if root is not None else self._root_text
        cached = self.store.listing(key, base)
        if cached is not None:
            self._listings[key] = cached
            return cached
        walked = self.store.walked.pop(key, None)
        if walked is not None:  # listed by the walk a moment ago: not listed again
            cached = self._listings[key] = _Listing([(n, parse_name(n)) for n in walked])
            self.store.remember_listing(key, base, cached)
            return cached
        jsons: list[tuple[str, ParsedName | None]] = []
        problem: Finding | None = None
        try:
            with os.scandir(key) as it:
                for entry in it:
                    if not entry.name.endswith(".json") or entry.name.startswith("."):
                        continue
                    # a folder with a sidecar's name is listed too: load_sidecar reports
                    # it (file/unreadable), a link loop likewise
                    jsons.append((entry.name, parse_name(entry.name)))
        except FileNotFoundError:
            pass
        except OSError as exc:
            shown = _relative_text(key, base) or "."
            problem = make_finding(
                "file/unreadable",
                f"{shown}: cannot list the folder to find sidecars ({exc.strerror or exc})",
                file=shown,
            )
        jsons.sort()
        result = _Listing(jsons, problem)
        self._listings[key] = result
        self.store.remember_listing(key, base, result)
        return result

    def _folder(self, directory: str, root: str | None) -> _Folder:
        """The sidecars of ``directory`` with their paths and display names, cached."""
        key = (directory, root)
        cached = self._folders.get(key)
        if cached is None:
            listing = self.listing(directory, root)
            if not listing.jsons:  # most folders on the way down hold no sidecar: one object
                cached = self._folders[key] = _NO_SIDECARS if listing.problem is None \
                    else _Folder((), listing.problem)
                return cached
            candidates = []
            for name, pn in listing.jsons:
                path = os.path.join(directory, name)
                candidates.append(_Candidate(
                    name, pn, pn is not None and pn.extension == ".json",
                    len(pn.entities) if pn is not None else 0, path,
                    _relative_text(path, root)))
            keys = sorted({k for c in candidates if c.inheritable and c.parsed is not None
                           for k in c.parsed.entities})
            cached = _Folder(tuple(candidates), listing.problem, tuple(keys),
                             frozenset(c.name for c in candidates))
            self._folders[key] = cached
        return cached

    def _chain(self, folder: str, root: str | None) -> tuple[_Folder, ...]:
        """The folders from ``root`` down to ``folder`` (only ``folder`` when outside root)."""
        key = (folder, root)
        cached = self._chains.get(key)
        if cached is None:
            parent = _parent_within(folder, root)
            # the parent's chain (remembered: the runs of a subject's folders share it)
            # and this folder; the folders are folder_chain's (tests/test_perf_equivalence.py)
            cached = (self._folder(folder, root),) if parent is None \
                else (*self._chain(parent, root), self._folder(folder, root))
            self._chains[key] = cached
        return cached

    def load(
        self, path: Path | str, display: str, *, shared: bool = True, root: str | None = None
    ) -> tuple[dict[str, Any] | None, tuple[Finding, ...]]:
        """Parse the sidecar at ``path`` once; shared sidecars go through the walk's
        :class:`SidecarStore`; ``shared=False`` uses a small LRU cache (for a data file's
        own sidecar, which no other run inherits). ``root``: the dataset root, whose
        links out are not read (:func:`.sidecar.load_sidecar`)."""
        key = (os.fspath(path), display)
        if shared:
            value, parsed = self.store.get(key[0], display, root)
            self.parse_count += parsed
            return value
        if key in self._own:
            self._own.move_to_end(key)
            return self._own[key]
        raw, problem = read_sidecar_bytes(key[0], display, root=root,
                                          plain=self.store.known_plain(key[0]))
        if raw is None:
            value = (None, (problem,) if problem is not None else ())
        else:
            value, parsed = self.store.parsed(raw, display)
            self.parse_count += parsed
        self._own[key] = value
        if len(self._own) > _OWN_CACHE_SIZE:
            self._own.popitem(last=False)
        return value

    def _type_findings(
        self, metadata: dict[str, Any], sources: dict[str, str], own_names: set[str]
    ) -> list[Finding]:
        """Type checks of the merged timing fields; a shared sidecar's value is checked once."""
        out: list[Finding] = []
        quick = quick_checks()
        passed = self._passed
        for key in sorted(TIMING_FIELDS.intersection(metadata)):
            value = metadata[key]
            source = sources[key]
            if passed.get((source, key)) is value or passed.get((key, id(value))) is value:
                continue  # this very (frozen, shared) value passed the check before
            if quick[key](value):
                # certainly valid (the same predicate check_types starts with); a shared
                # sidecar's value is remembered, so its runs do not check it again, and so
                # is a parsed array or object of an own sidecar (one object for the runs
                # whose own sidecars hold the same bytes: SidecarStore.parsed)
                if source not in own_names:
                    passed[(source, key)] = value
                elif type(value) in _FROZEN and len(passed) < _PASSED_KEPT:
                    passed[(key, id(value))] = value  # held: the id is not reused meanwhile
                continue
            memo_key = (source, key)
            cached = self._checked.get(memo_key)
            if cached is None:
                cached = tuple(check_types({key: metadata[key]}, source, sources))
                if source not in own_names:
                    self._checked[memo_key] = cached
            out.extend(cached)
        return out

    # -- resolution -----------------------------------------------------------------------

    def applicable(self, data_file: Path, root: Path | None = None) -> list[list[Path]]:
        """The applicable sidecars per folder level, top-down, each level in merge order."""
        data_path = os.path.abspath(data_file)
        root_path = os.path.abspath(root) if root is not None else self._root_text
        levels, _problems = self._levels(data_path, root_path, parse_name(_basename(data_path)))
        return [[Path(c.path) for c, _own in level] for level in levels]

    def _levels(
        self, data_path: str, root: str | None, parsed: ParsedName | None
    ) -> tuple[list[list[tuple[_Candidate, bool]]], list[Finding]]:
        """The applicable sidecars of the data file at ``data_path`` (absolute, normalised)."""
        folder, data_name = os.path.split(data_path)
        folders = self._chain(folder, root)
        own_name = sidecar_name(data_name)
        levels: list[list[tuple[_Candidate, bool]]] = []
        problems: list[Finding] = []
        deepest = len(folders) - 1
        entities = parsed.entities if parsed is not None else None
        suffix = parsed.suffix if parsed is not None else None
        for i, entry in enumerate(folders):
            if entry.problem is not None:
                problems.append(entry.problem)
            if not entry.candidates:  # most folders on the way down hold no sidecar
                levels.append([])
                continue
            # the choice at one level depends only on what the test below reads: the run's
            # suffix, its values of the entities this folder's sidecars name, and whether the
            # run's own name or own sidecar's name is among them (checked against the
            # uncached choice in tests/test_perf_equivalence.py)
            names = entry.names
            memo = (
                suffix,
                None if entities is None else tuple([entities.get(k) for k in entry.keys]),
                data_name if data_name in names else None,
                own_name if i == deepest and own_name in names else None,
            )
            level = entry.choices.get(memo)
            if level is None:
                level = self._choose(entry, data_name, own_name if i == deepest else None,
                                     parsed)
                if len(entry.choices) < _CHOICES_KEPT:
                    entry.choices[memo] = level
            levels.append(list(level))
        return levels, problems

    @staticmethod
    def _choose(entry: _Folder, data_name: str, own_name: str | None,
                parsed: ParsedName | None) -> tuple[tuple[_Candidate, bool], ...]:
        """The sidecars of one folder that apply to a data file, in merge order (its own
        sidecar ``own_name`` only at the deepest level, else None)."""
        chosen: list[tuple[tuple[int, int, str], _Candidate, bool]] = []
        for candidate in entry.candidates:
            name = candidate.name
            if name == data_name:
                continue
            own = name == own_name
            if own or (
                parsed is not None
                and candidate.inheritable
                and candidate.parsed is not None
                and candidate.parsed.applies_to(parsed)
            ):
                chosen.append(((int(own), candidate.n_entities, name), candidate, own))
        if len(chosen) > 1:
            chosen.sort(key=lambda t: t[0])
        return tuple([(candidate, own) for _k, candidate, own in chosen])

    def resolve(self, data_file: Path, root: Path | None = None) -> Resolution:
        """Merge the applicable sidecars of ``data_file`` under dataset ``root``."""
        data_path = _absolute(data_file)
        root_path = _absolute(root) if root is not None else self._root_text
        parsed = parse_name(_basename(data_path))
        levels, findings = self._levels(data_path, root_path, parsed)
        metadata: dict[str, Any] = {}
        sources: dict[str, str] = {}
        chain: list[str] = []
        level_names: list[tuple[str, ...]] = []
        own_names: set[str] = set()
        overridden: dict[str, list[tuple[str, Any]]] = {}
        merged: list[tuple[str, dict[str, Any] | None]] = []
        for level in levels:
            loaded: list[tuple[str, dict[str, Any] | None]] = []
            for candidate, own in level:
                shown = candidate.shown
                if own:
                    own_names.add(shown)
                data, problems = self.load(candidate.path, shown, shared=not own,
                                           root=root_path)
                findings.extend(problems)
                chain.append(shown)
                loaded.append((shown, data))
                merged.append((shown, data))
                if data:
                    for key, value in data.items():
                        if key in OVERRIDE_TRACKED and key in metadata \
                                and metadata[key] != value:
                            overridden.setdefault(key, []).append(
                                (sources[key], metadata[key]))
                        metadata[key] = value
                        sources[key] = shown
            level_names.append(tuple(name for name, _ in loaded))
            if len(loaded) > 1:
                findings.extend(_ambiguity(loaded, _relative_text(data_path, root_path)))
        if self.check_field_types and metadata:
            findings.extend(self._type_findings(metadata, sources, own_names))
        return assembled(Resolution, {  # Resolution(...) without its per-field setattr
            "metadata": metadata,  # a new dict; its values are shared (frozen, never copied)
            "sources": sources,
            "chain": tuple(chain),
            "findings": tuple(findings),
            "name": parsed,
            "levels": tuple(level_names),
            "overridden": {k: tuple(v) for k, v in overridden.items()},
            "merged": tuple(merged),
        })


class _Candidate(NamedTuple):
    """A sidecar in one folder, as seen from one dataset root (a named tuple: one is
    made for every sidecar of every folder a walk passes, and a tuple is made faster
    than a frozen dataclass)."""

    name: str
    parsed: ParsedName | None
    #: a BIDS name with exactly the ``.json`` extension (so it may be inherited)
    inheritable: bool
    n_entities: int
    path: str
    shown: str


@dataclass(frozen=True)
class _Folder:
    """One folder on the way down from a dataset root: its sidecars, or why it could not
    be listed."""

    candidates: tuple[_Candidate, ...]
    problem: Finding | None
    #: the entity keys its inheritable sidecars name, sorted
    keys: tuple[str, ...] = ()
    #: the names of its sidecars
    names: frozenset[str] = frozenset()
    #: the choice of :meth:`SidecarIndex._choose` per what it depends on (see ``_levels``)
    choices: dict[Any, tuple[tuple[_Candidate, bool], ...]] = field(
        default_factory=dict, compare=False, hash=False, repr=False)


#: a folder on the way down that holds no sidecar (most of them): one shared object
_NO_SIDECARS = _Folder((), None)


def _absolute(path: str | os.PathLike[str]) -> str:
    """``os.path.abspath(path)``, without its normalisation for a path that needs none (the
    walk's: absolute, no ``//``, no part starting with a dot, no trailing ``/``; tested
    equal to ``os.path.abspath``)."""
    text = os.fspath(path)
    if text[:1] == "/" and "//" not in text and "/." not in text and text[-1:] != "/" \
            and os.sep == "/":
        return text
    return os.path.abspath(text)


def _basename(path: str) -> str:
    return os.path.split(path)[1]


def _strip_root(path: str, root: str) -> str | None:
    """``path`` relative to ``root`` when it is ``root`` or below it, else None (POSIX
    path strings as pathlib prints them: no doubled or trailing separators)."""
    if path == root:
        return "."
    prefix = root if root.endswith("/") else root + "/"
    return path[len(prefix) :] if path.startswith(prefix) else None


def _relative_text(path: str, root: str | None) -> str:
    """:func:`relative_posix` for absolute, normalised path strings (no pathlib objects)."""
    if os.sep != "/":  # pragma: no cover - slicetime runs on POSIX; keep the general form
        return relative_posix(Path(path), Path(root) if root is not None else None)
    below = _strip_root(path, root) if root is not None else None
    return below if below is not None else path


def _parent_within(folder: str, root: str | None) -> str | None:
    """The folder before ``folder`` in :func:`folder_chain`, None when that chain is
    ``folder`` alone (paths absolute and normalised)."""
    if root is None or folder == root:
        return None
    prefix = root if root.endswith(os.sep) else root + os.sep
    if not folder.startswith(prefix):
        return None
    return folder.rpartition(os.sep)[0] or os.sep


def folder_chain(folder: str, root: str | None) -> tuple[str, ...]:
    """``root`` and each folder below it down to ``folder``; just ``folder`` when it is the
    root or lies outside it (paths absolute and normalised)."""
    if root is None or folder == root:
        return (folder,)
    prefix = root if root.endswith(os.sep) else root + os.sep
    if not folder.startswith(prefix):
        return (folder,)
    chain = [root]
    for part in folder[len(prefix) :].split(os.sep):
        chain.append(os.path.join(chain[-1], part))
    return tuple(chain)


_IMMUTABLE: frozenset[type] = frozenset({str, int, float, bool, type(None)})
_FROZEN: frozenset[type] = frozenset({FrozenList, FrozenDict})
#: values shorter than this are not worth sharing after the fact
_SHARE_MIN_ITEMS = 64


def fresh_copy(value: Any) -> Any:
    """A deep copy of a JSON value: every list and dict is new, immutable scalars are
    shared (cheaper than :func:`copy.deepcopy`, same result for JSON data)."""
    kind = type(value)
    if kind in _IMMUTABLE:
        return value
    if kind is list:
        return [v if type(v) in _IMMUTABLE else fresh_copy(v) for v in value]
    if kind is dict:
        return {k: v if type(v) in _IMMUTABLE else fresh_copy(v) for k, v in value.items()}
    return copy.deepcopy(value)


def _ambiguity(
    loaded: Sequence[tuple[str, dict[str, Any] | None]], data_shown: str
) -> list[Finding]:
    """Findings for several applicable sidecars at one level (``loaded`` in merge order)."""
    files = [name for name, _ in loaded]
    listed = ", ".join(files)
    winner_of: dict[str, str] = {}
    values_of: dict[str, dict[str, Any]] = {}
    for name, data in loaded:
        for key, value in (data or {}).items():
            values_of.setdefault(key, {})[name] = value
            winner_of[key] = name
    disagree = sorted(
        key
        for key, per_file in values_of.items()
        if len(per_file) > 1 and any(v != next(iter(per_file.values())) for v in per_file.values())
    )
    timing = [k for k in disagree if k in TIMING_FIELDS]
    others = [k for k in disagree if k not in TIMING_FIELDS]
    out: list[Finding] = []
    for key in timing:
        per_file = values_of[key]
        shown_values = "; ".join(f"{f}: {_short(v)}" for f, v in per_file.items())
        out.append(
            make_finding(
                "inherit/ambiguous",
                f"{listed} all apply to {data_shown} at one folder level and disagree on {key} "
                f"({shown_values}); {winner_of[key]} is used",
                severity=Severity.ERROR,
                file=winner_of[key],
                field=key,
                evidence={
                    "files": files,
                    "values": {f: per_file[f] for f in per_file},
                    "used": winner_of[key],
                    "data_file": data_shown,
                },
                hint="merge the files, or add entities so that each applies to different runs",
            )
        )
    if not timing:
        tail = f"; they also differ on {', '.join(others)}" if others else ""
        out.append(
            make_finding(
                "inherit/ambiguous",
                f"{listed} all apply to {data_shown} at one folder level; they agree on every "
                f"timing field, merged with the more specific file last{tail}",
                file=files[-1],
                field=None,
                evidence={"files": files, "differing_fields": others, "data_file": data_shown},
                hint="merge the files, or add entities so that each applies to different runs",
            )
        )
    return out
