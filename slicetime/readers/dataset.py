"""Finding dataset roots and the runs to audit under the paths a user gives.

:func:`iter_runs` yields ``(root, data_file)`` for every candidate run, as
absolute paths (symlinks are not resolved, so runs keep their dataset names).
A file is a candidate run when its name ends in ``.nii`` or ``.nii.gz`` and

* its suffix is a time-series suffix (:data:`TIME_SERIES_SUFFIXES`: ``bold``,
  ``cbv``, ``phase``, ``asl``, ``dwi``), in any folder; or
* its own sidecar (same stem, ``.json``) has a top-level ``SliceTiming`` key,
  unless it sits in an ``anat`` or ``fmap`` folder (structural scans and field
  maps often carry ``SliceTiming`` but are not time series); or
* it is meant as a run but its name is not a valid BIDS run name
  (:func:`~slicetime.readers.entities.looks_like_run`: any NIfTI in a ``func``,
  ``perf`` or ``dwi`` folder, or with a time-series suffix, ``sbref`` or
  ``m0scan`` as a word of its name, e.g. ``task-rest-eyes``, ``acq-1.5mm``,
  ``_bold (copy)``), so the audit reports the name instead of dropping the run.

A validly named single-band reference (``sbref``) is never a run: one reference
volume, not a time series (:func:`not_a_run`); found in a folder or given by name,
it is not audited (a file given alone is "no functional runs", exit 2, saying why).

Entries that *look* like runs by name but are broken symlinks (an annexed
file without local content, a dangling link), symlink loops or folders are
yielded too, so that reading them turns into a finding (``file/no-content``,
``file/link-loop``, ``file/unreadable``) rather than a silently missing run.

``derivatives``, ``sourcedata`` and ``code`` folders and hidden names
(starting with a dot) are skipped at any depth below a given folder unless
included. A walk is confined to the dataset of the folder it was given: folder
symlinks to folders inside the given folder are aliases (or loops) and are not
followed, so each run keeps its real name; symlinks that lead out of the given
folder's dataset root (another study, ``/``, ``/proc``) are not followed either
and are reported once each (``file/link-leaves-dataset``: a subject kept on other
storage is included by giving its folder as a path of its own); links to other
folders of the same dataset are followed. File links are judged the same way
(:func:`~slicetime.readers.errors.link_leaving`, the one decision): a run image or
sidecar that is a link out of its dataset is reported (``file/link-leaves-dataset``)
by the reader given the root, and what it points at is never read. A folder whose
real path was already visited is never entered again, so loops end. Runs come out
sorted by root, then by path components; each run once.
"""

from __future__ import annotations

import errno
import operator
import os
import stat
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from pathlib import Path

from slicetime.codes import make_finding
from slicetime.model import Finding

from .atomic import check_write_target, within
from .entities import (
    IMAGE_EXTENSIONS,
    NOT_RUN_SUFFIXES,
    TIME_SERIES_SUFFIXES,
    looks_like_run,
    parse_name,
    run_name_problem,
    sidecar_name,
)
from .errors import (
    ReadError,
    annex_target,
    check_regular_file,
    link_leaves_error,
    link_leaving,
)
from .sidecar import load_sidecar

__all__ = [
    "SKIPPED_FOLDERS",
    "TIME_SERIES_SUFFIXES",
    "check_writes",
    "find_root",
    "given_run",
    "is_image_name",
    "iter_runs",
    "not_a_run",
]

_NOT_RUN_FOLDERS: frozenset[str] = frozenset({"anat", "fmap"})
#: Folders not searched unless included (``code`` goes with ``sourcedata``).
SKIPPED_FOLDERS: frozenset[str] = frozenset({"derivatives", "sourcedata", "code"})
_DESCRIPTION = "dataset_description.json"


def _abs(path: Path) -> Path:
    return Path(os.path.abspath(path))


def is_image_name(name: str) -> bool:
    """True for ``*.nii`` and ``*.nii.gz`` names (case-insensitive extension)."""
    lower = name.lower()
    # each extension tested in turn, without a generator (asked of every name a walk meets)
    for ext in IMAGE_EXTENSIONS:
        if lower.endswith(ext) and len(name) > len(ext):
            return True
    return False


def find_root(path: Path) -> Path:
    """The dataset root for ``path`` (absolute, symlinks not resolved).

    The nearest ancestor of ``path`` (or ``path`` itself, when a folder) that
    holds ``dataset_description.json``; else the parent of the topmost
    ``sub-*`` folder in the path; else the folder itself (a file's folder for
    a file).
    """
    return _RootFinder().find(path)


def check_writes(
    paths: Sequence[Path],
    files: Mapping[str, Path | None] = {},
    *,
    folders: Mapping[str, Path | None] = {},
    inputs: Sequence[Path | None] = (),
) -> None:
    """Refuse, before anything is read or written, a command's output file or folder
    that could touch its inputs (``WriteRefused``: exit 2, one line naming the path).

    ``paths``: what the command was given; their dataset roots (:func:`find_root`)
    and the paths themselves are the inputs, with the other files it reads
    (``inputs``: a policy, a source map). ``files`` and ``folders`` map each output's
    option name to its path (None: not asked for). The decision itself is
    :func:`slicetime.readers.atomic.check_write_target`, the one every command uses.
    """
    roots = [find_root(Path(p)) for p in paths]
    given = [*paths, *(p for p in inputs if p is not None)]
    for what, path in files.items():
        if path is not None:
            check_write_target(path, roots, given, what=what)
    for what, path in folders.items():
        if path is not None:
            check_write_target(path, roots, given, what=what, folder=True)


#: BIDS files that accompany runs (not runs themselves), by the end of their name
_COMPANIONS: tuple[tuple[str, str], ...] = (
    ("_events.tsv", "its events table"), ("_physio.tsv.gz", "its physiological recording"),
    ("_stim.tsv.gz", "its stimulus recording"), ("_scans.tsv", "a session's scans table"),
    ("participants.tsv", "the participants table"), (".tsv", "a BIDS table"),
    (".tsv.gz", "a compressed BIDS table"), (".bval", "a diffusion b-value list"),
    (".bvec", "a diffusion gradient list"),
)


def given_run(path: Path) -> Path:
    """The run a path given on the command line means, for every command.

    A folder or a run image is returned as given; a run's own sidecar
    (``x_bold.json``) stands for the image beside it (``x_bold.nii.gz`` or
    ``x_bold.nii``). A file that accompanies runs (``.bval``, ``.bvec``,
    ``_events.tsv``, ...), a sidecar with no image beside it, or any other file whose
    name is not a NIfTI image's is no run: raises ``ReadError("file/not-a-run")``, one
    line naming the file. A path that does not
    exist is returned as given (the callers report it as missing).
    """
    name = path.name
    lower = name.lower()
    if not os.path.lexists(path) or os.path.isdir(path) or is_image_name(name):
        return path
    shown = str(path)
    for end, kind in _COMPANIONS:
        if lower.endswith(end):
            raise ReadError("file/not-a-run", shown, None,
                            f"{shown}: not a run but {kind} (a BIDS file that accompanies "
                            "runs); give a run's image (.nii, .nii.gz) or its own sidecar"
                            + _run_beside(path))
    if lower.endswith(".json"):
        stem = name[: -len(".json")]
        for ext in IMAGE_EXTENSIONS:
            image = path.with_name(stem + ext)
            if os.path.lexists(image):
                return image
        raise ReadError("file/not-a-run", shown, None,
                        f"{shown}: not a run: a sidecar without a run image beside it (no "
                        f"{stem}.nii.gz or {stem}.nii); an inherited sidecar serves several "
                        "runs: give one of them, or the folder")
    # any other name is no NIfTI image: the walk would never take it for a run either
    raise ReadError("file/not-a-run", shown, None,
                    f"{shown}: not a run: a run is a NIfTI image (.nii or .nii.gz) or its "
                    "own sidecar (.json)")


def _run_beside(file: Path) -> str:
    """``; the run it belongs to: X`` when the image of the same name parts is there,
    with a time-series suffix (:data:`TIME_SERIES_SUFFIXES`, the one table of them)."""
    stem, _, _ = file.name.rpartition("_")
    if not stem:
        return ""
    for suffix in sorted(TIME_SERIES_SUFFIXES):
        for extension in IMAGE_EXTENSIONS:
            image = file.with_name(f"{stem}_{suffix}{extension}")
            if image.exists():
                return f"; the run it belongs to: {image}"
    return ""


#: errors that :meth:`pathlib.Path.is_file` treats as "not a file" (others propagate)
_NOT_A_FILE_ERRNOS = frozenset({errno.ENOENT, errno.ENOTDIR, errno.EBADF, errno.ELOOP})


def _path_is_file(path: str) -> bool:
    """:meth:`pathlib.Path.is_file` for a path string."""
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except OSError as exc:
        if exc.errno not in _NOT_A_FILE_ERRNOS:
            raise
        return False
    except ValueError:
        return False


class _RootFinder:
    """:func:`find_root` that remembers, for one walk, which folders hold a description."""

    def __init__(self) -> None:
        self._described: dict[str, bool] = {}
        self._root: dict[str, str] = {}  # folder -> the root found for it
        self._paths: dict[str, Path] = {}  # a root found -> its one Path

    def _has_description(self, folder: str) -> bool:
        known = self._described.get(folder)
        if known is None:
            known = _path_is_file(os.path.join(folder, _DESCRIPTION))
            self._described[folder] = known
        return known

    def find(self, path: Path) -> Path:
        p = _abs(Path(path))
        return self.find_folder(str(p if p.is_dir() else p.parent))

    def find_folder(self, start: str) -> Path:
        """The dataset root of the folder ``start``: the nearest folder (``start`` or
        above) that holds a dataset description, else the parent of the outermost
        ``sub-*`` folder, else ``start``. Every folder passed on the way up remembers
        the root found, so the runs of one dataset cost one look each."""
        found = self._find(start)
        if isinstance(found, Path):
            return found
        made = self._paths.get(found)  # one Path per root found, not one per folder asked
        if made is None:
            made = self._paths[found] = Path(found)
        return made

    def _find(self, start: str) -> str | Path:
        """:meth:`find_folder`; the root's path text when a description was found."""
        start = os.fspath(_abs(Path(start))) if not os.path.isabs(start) else start
        folder, passed = start, []
        found: str | None = None
        while True:  # start, then each parent up to the file-system root
            known = self._root.get(folder)
            if known is not None:
                found = known
                break
            passed.append(folder)
            if self._has_description(folder):
                found = folder
                break
            parent = os.path.dirname(folder)
            if parent == folder:
                break
            folder = parent
        if found is not None:
            for each in passed:
                self._root[each] = found
            return found
        begin = Path(start)
        for candidate in reversed((begin, *begin.parents)):
            if candidate.name.startswith("sub-"):
                return candidate.parent
        return begin


def _time_series_by_name(name: str) -> bool:
    parsed = parse_name(name)
    return parsed is not None and parsed.suffix in TIME_SERIES_SUFFIXES


def not_a_run(name: str) -> str | None:
    """Why a validly named image is never a run (a single-band reference), or None:
    the one owner of that judgement, for the walk and for a file given by name alike."""
    parsed = parse_name(name)
    return NOT_RUN_SUFFIXES.get(parsed.suffix) if parsed is not None else None


def _misnamed_run(name: str, folder: str) -> bool:
    """A NIfTI meant as a run whose name is not a valid BIDS run name: yielded so the
    audit reports the name (``file/bad-run-name``) instead of dropping the run."""
    return looks_like_run(name, folder) and run_name_problem(name) is not None


def _has_slice_timing(folder: Path, name: str, listing: set[str], confine: str) -> bool:
    if not_a_run(name) is not None:
        return False
    if folder.name in _NOT_RUN_FOLDERS:
        return False
    own = sidecar_name(name)
    if own not in listing:
        return False
    data, _findings = load_sidecar(folder / own, root=confine)
    return data is not None and "SliceTiming" in data


class _Walker:
    def __init__(
        self,
        skip: set[str],
        include_hidden: bool,
        on_error: Callable[[Finding], None] | None,
        listings: dict[str, tuple[str, ...]] | None = None,
        described: dict[str, bool] | None = None,
        not_plain: dict[str, frozenset[str]] | None = None,
    ) -> None:
        self.skip = skip
        self.include_hidden = include_hidden
        self.on_error = on_error
        self.visited: set[str] = set()
        #: per folder listed: its sidecar names (see ``iter_runs``), and whether it holds
        #: a dataset description (for the root finder); the walk has read them already
        self.listings = listings
        self.described = described
        #: per folder listed: the names of its entries that its listing says are not
        #: regular files, or are links (see ``iter_runs``)
        self.not_plain = not_plain

    def _remember(self, key: str, entries: list[os.DirEntry[str]]) -> None:
        """The folder's sidecar names as ``SidecarIndex.listing`` would list them (a
        ``.json`` name, not hidden), and whether it holds a description."""
        assert self.listings is not None and self.described is not None
        jsons: list[str] = []
        described: bool | None = False
        for entry in entries:
            name = entry.name
            if not name.endswith(".json") or name.startswith("."):
                continue
            jsons.append(name)  # a folder or a link loop with that name: reading it reports it
            if name == _DESCRIPTION:
                try:
                    described = entry.is_file()  # follows links, as the root finder does
                except OSError:
                    described = None  # the root finder looks for itself
        self.listings[key] = tuple(jsons)
        if described is not None:
            self.described[key] = described
        if self.not_plain is not None:
            # the few names that are not plain files (most folders: none), so that a
            # large walk keeps little
            self.not_plain[key] = frozenset(e.name for e in entries if not _is_plain(e))

    def _report(self, folder: Path, exc: OSError) -> None:
        if self.on_error is not None:
            shown = str(folder)
            self.on_error(
                make_finding(
                    "file/unreadable",
                    f"{shown}: cannot list the folder ({exc.strerror or exc}); "
                    "its runs are skipped",
                    file=shown,
                )
            )

    def _report_link(self, path: Path, target: str) -> None:
        if self.on_error is not None:
            self.on_error(link_leaves_error(
                str(path), target, "not followed, so the runs behind it are not audited",
            ).to_finding())

    def walk(
        self, folder: str, top_real: str | None = None, real: str | None = None,
        confine: str | None = None,
    ) -> Iterator[str]:
        """Depth-first, sorted by name; ``real`` is the real path of ``folder`` when known;
        ``confine``: the real path of the dataset root that folder links may not leave
        (default: the folder's own). Paths are strings (absolute, normalised), a run's
        made from its folder's and its name as the walk meets them."""
        if real is None:
            try:
                real = os.path.realpath(folder)
            except OSError as exc:  # pragma: no cover - realpath rarely raises
                self._report(Path(folder), exc)
                return
        if top_real is None:
            top_real = real
        if confine is None:
            confine = top_real
        if real in self.visited:
            return
        self.visited.add(real)
        try:
            with os.scandir(folder) as it:
                entries = sorted(it, key=_entry_name)
        except OSError as exc:
            self._report(Path(folder), exc)
            return
        if self.listings is not None:
            self._remember(folder, entries)
        names: set[str] | None = None
        base = folder if folder.endswith(os.sep) else folder + os.sep
        folder_name = os.path.basename(folder)
        for entry in entries:
            name = entry.name
            if name.startswith(".") and not self.include_hidden:
                continue
            try:
                is_dir = entry.is_dir()  # follows symlinks
            except OSError:
                is_dir = False  # a link loop
            if is_image_name(name):
                if is_dir or not _is_regular(entry):
                    if _time_series_by_name(name) or _misnamed_run(name, folder_name):
                        yield base + name  # reading it reports what is wrong
                    continue
                if _time_series_by_name(name) or _misnamed_run(name, folder_name):
                    yield base + name
                    continue
                if names is None:
                    names = {e.name for e in entries}
                if _has_slice_timing(Path(folder), name, names, confine):
                    yield base + name
                continue
            if is_dir:
                if name in self.skip:
                    continue
                path = base + name
                if entry.is_symlink():
                    leaving = link_leaving(path, confine)  # the readers' decision for files
                    if leaving is not None:
                        self._report_link(Path(path), leaving)
                        continue
                    child_real = os.path.realpath(path)
                    if within(child_real, top_real):
                        continue  # an alias of a folder in this tree (or a loop): reached by name
                else:  # not a link: its real path is its name under this folder's real path
                    child_real = os.path.join(real, name)
                yield from self.walk(path, top_real, child_real, confine)


#: a folder entry's name, read in C (a Python key function cost 3 % of an audit)
_entry_name = operator.attrgetter("name")


def _is_plain(entry: os.DirEntry[str]) -> bool:
    """A regular file that is not a link (the entry's type: no system call where the
    file system gives it, as Linux's and macOS's do)."""
    try:
        return entry.is_file(follow_symlinks=False)
    except OSError:
        return False


def _is_regular(entry: os.DirEntry[str]) -> bool:
    """A regular file, following symlinks (the entry's type needs no system call)."""
    try:
        return entry.is_file()
    except OSError:
        return False


def iter_runs(
    paths: Sequence[Path],
    *,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    on_error: Callable[[Finding], None] | None = None,
    listings: dict[str, tuple[str, ...]] | None = None,
    not_plain: dict[str, frozenset[str]] | None = None,
) -> Iterator[tuple[Path, Path]]:
    """Yield ``(root, data_file)`` for every candidate run under ``paths``.

    ``listings``, when given, receives the sidecar names of every folder the walk
    listed (absolute folder path → sorted ``.json`` names that are not hidden; a folder
    with such a name is listed, and reading it reports it), so that the sidecar
    resolution need not list those folders again (``SidecarStore(listings=...)``).
    ``not_plain``, given with ``listings``, receives per folder listed the names of its
    entries that the listing says are not regular files or are links, so that reading
    any other file of the folder needs no ``lstat`` first
    (``SidecarStore(not_plain=...)``, :func:`.errors.open_regular`).

    A path that is a file is resolved by :func:`given_run` (a run's own sidecar
    stands for its image; a file that accompanies runs raises ``file/not-a-run``)
    and yielded made absolute, whatever its name, except a name that is never a run
    (:func:`not_a_run`: a single-band reference), which is not yielded either way. A
    folder is searched as described in the module docstring; each run's root is
    :func:`find_root` of the run. A path that does not exist (including a broken
    symlink) raises ``ReadError("file/missing")`` before anything is yielded.
    ``include_sourcedata`` also includes ``code``.
    Folders that cannot be listed are skipped and, when ``on_error`` is
    given, reported to it as ``file/unreadable`` findings.
    """
    given = [_abs(given_run(Path(p))) for p in paths]
    for p in given:
        if not os.path.lexists(p) or (os.path.islink(p) and not os.path.exists(p)):
            if annex_target(p) is not None:
                continue  # an annexed run whose content is absent: audited from its sidecars
            shown = str(p)
            if os.path.islink(p):
                check_regular_file(p, shown)  # tells an annexed file from a dangling link
            raise ReadError("file/missing", shown, None, f"{shown}: path does not exist")
    skip = set(SKIPPED_FOLDERS)
    if include_derivatives:
        skip.discard("derivatives")
    if include_sourcedata:
        skip -= {"sourcedata", "code"}
    finder = _RootFinder()
    walker = _Walker(skip, include_hidden, on_error, listings,
                     finder._described if listings is not None else None,
                     not_plain if listings is not None else None)
    roots: dict[str, tuple[str, Path]] = {}

    def root_of(run: str) -> tuple[str, Path]:
        key = os.path.dirname(run)
        found = roots.get(key)
        if found is None:
            root = finder.find_folder(key)
            found = roots[key] = (str(root), root)
        return found

    found: dict[tuple[str, str], tuple[Path, str]] = {}
    for p in given:
        if not p.is_dir() and not_a_run(p.name) is not None:
            continue  # never a run, given by name or found (NoRunsError says why)
        runs: Iterable[str]
        if p.is_dir():
            top = os.path.realpath(p)
            confine = os.path.realpath(finder.find_folder(os.fspath(p)))
            runs = walker.walk(os.fspath(p), top, top, confine if within(top, confine) else top)
        else:
            runs = (os.fspath(p),)
        for run in runs:
            root_text, root = root_of(run)
            key = (root_text, run)
            if key not in found:
                found[key] = (root, run)

    def order(item: tuple[tuple[str, str], tuple[Path, str]]) -> tuple[str, tuple[str, ...]]:
        (root_text, run_text), (root, _run) = item
        prefix = root_text if root_text.endswith(os.sep) else root_text + os.sep
        if os.sep == "/" and run_text.startswith(prefix):
            # what run.relative_to(root).parts gives, for absolute normalised paths
            return (root_text, tuple(run_text[len(prefix) :].split("/")))
        run = Path(run_text)
        try:
            parts = run.relative_to(root).parts
        except ValueError:
            parts = run.parts
        return (root_text, parts)

    for _key, (root, run) in sorted(found.items(), key=order):
        yield root, Path(run)
