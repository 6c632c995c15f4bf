"""Assemble a :class:`RunRecord` for one run: header, inherited metadata, schedule.

This is the only place where the readers' pieces meet. :func:`build_record`
reads the header bytes and (through the shared :class:`SidecarIndex`) the
applicable sidecars; :func:`assemble_record` is the pure part that resolves
the schedule and infers the scheme from values already read.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from slicetime.model import Finding, HeaderInfo, ResolvedTiming, RunRecord, Scheme, assembled
from slicetime.readers.entities import parse_name
from slicetime.readers.errors import ReadError, annex_target
from slicetime.readers.inheritance import SidecarIndex, relative_posix
from slicetime.readers.nifti import read_header
from slicetime.schemes.resolve import infer_run_scheme, resolve_timing

#: timing fields with a dedicated rule; their type problems are reported there
_DEDICATED_FIELDS = frozenset({"SliceTiming", "SliceEncodingDirection"})
DATATYPES = frozenset({"func", "perf", "dwi", "anat", "fmap"})
#: (metadata, sources, header, display, merged) -> the run's timing and scheme; ``merged``
#: is ``Resolution.merged`` (what the metadata was merged from), or None when not known
TimingOf = Callable[[Mapping[str, Any], Mapping[str, str], HeaderInfo | None, str,
                     Sequence[tuple[str, Any]] | None],
                    tuple[ResolvedTiming, Scheme | None]]


def relative_display(path: Path, root: Path) -> str:
    """How reports name a file: relative to the dataset root, forward slashes."""
    return relative_posix(path, root)


def assemble_record(
    *,
    display: str,
    abs_path: str,
    root: str,
    header: HeaderInfo | None,
    metadata: Mapping[str, Any],
    sources: Mapping[str, str],
    chain: Sequence[str] = (),
    findings: Iterable[Finding] = (),
    overridden: Mapping[str, tuple[tuple[str, Any], ...]] | None = None,
    content_missing: str | None = None,
    timing_of: TimingOf | None = None,
    merged: Sequence[tuple[str, Any]] | None = None,
) -> RunRecord:
    """Resolve the schedule and infer the scheme from values already read (pure).
    ``timing_of`` (metadata, sources, header, display, merged) gives the timing and
    scheme in place of :func:`resolve_timing` and :func:`infer_run_scheme` (the audit's
    content memo, which gives the same); ``merged``: the sidecars and parsed values the
    metadata was merged from (``Resolution.merged``), when known."""
    name = display.rsplit("/", 1)[-1]
    parent = display.rsplit("/", 2)[-2] if display.count("/") >= 1 else ""
    parsed = parse_name(name)
    kept = [
        f for f in findings
        if not (f.code == "sidecar/wrong-type" and f.field in _DEDICATED_FIELDS)
    ]
    common: dict[str, Any] = {
        "path": display,
        "abs_path": abs_path,
        "root": root,
        "entities": dict(parsed.entities) if parsed else {},
        "suffix": parsed.suffix if parsed else "",
        "datatype": parent if parent in DATATYPES else None,
        "header": header,
        "metadata": dict(metadata),
        "metadata_sources": dict(sources),
        "sidecar_chain": tuple(chain),
        "findings": tuple(kept),
        "overridden": dict(overridden or {}),
        "content_missing": content_missing,
    }
    if header is None and content_missing is None:
        return RunRecord(**common)
    if timing_of is not None:
        common["timing"], common["scheme"] = timing_of(metadata, sources, header, display,
                                                       merged)
    else:
        common["timing"] = timing = resolve_timing(metadata, sources, header, display)
        common["scheme"] = infer_run_scheme(timing)
    common["source"] = None
    return assembled(RunRecord, common)  # RunRecord(**common), once per run


def build_record(root: Path, path: Path, index: SidecarIndex | None = None,
                 timing_of: TimingOf | None = None) -> RunRecord:
    """Read one run. Never raises for a bad file: problems become findings.
    ``timing_of``: see :func:`assemble_record`."""
    index = index if index is not None else SidecarIndex(root)
    display = relative_display(path, root)
    findings: list[Finding] = []
    header: HeaderInfo | None = None
    missing: str | None = None
    # the header first: a file it reads is neither absent nor empty, so only a file it
    # cannot read costs the extra look of content_missing (whose answer then replaces
    # the read error; the same outcome as asking it first, one stat less per run)
    try:
        # plain: the walk listed it as a regular file, not a link (no lstat before the open)
        header, header_findings = read_header(
            path, display, root=root, plain=index.store.known_plain(str(path)))
        findings.extend(header_findings)
    except ReadError as exc:
        missing = content_missing(path)
        if missing is None:
            findings.append(exc.to_finding())
    resolution = index.resolve(path, root)
    findings.extend(resolution.findings)
    return assemble_record(
        display=display,
        abs_path=str(path),
        root=str(root),
        header=header,
        metadata=resolution.metadata,
        sources=resolution.sources,
        chain=resolution.chain,
        findings=findings,
        overridden=resolution.overridden,
        content_missing=missing,
        timing_of=timing_of,
        merged=resolution.merged,
    )


def content_missing(path: Path) -> str | None:
    """Why a run's image content is not here, or None when it may be read: "annex" for a
    link into an annex object store whose object is absent (a clone before its content
    is fetched), "placeholder" for a 0-byte regular file. Other problems are the header
    reader's to report."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return "annex" if annex_target(str(path)) is not None else None
    except OSError:
        return None
    return "placeholder" if stat.S_ISREG(st.st_mode) and st.st_size == 0 else None
