"""Where a correction's outputs go: their names, the ``--out`` checks, the runs that
would collide, and the temporary files of interrupted batches.

An output is the input's path relative to its dataset root, under ``--out``,
with ``desc-<label>`` added (BIDS derivatives); its sidecar is named by
:func:`slicetime.readers.entities.sidecar_name`.
"""

from __future__ import annotations

import contextlib
import os
import re
from collections.abc import Iterable, Sequence
from pathlib import Path

from slicetime.codes import make_finding
from slicetime.model import Finding, RunRecord
from slicetime.pipelines.errors import CLASH_CODE
from slicetime.readers.atomic import (
    WriteRefused,
    check_write_target,
    link_between,
    real_within,
    stale_temporary,
    within,
)
from slicetime.readers.entities import parse_name, sidecar_name

DEFAULT_DESC = "timealigned"
_DESC_RE = re.compile(r"[A-Za-z0-9]+\Z")


def check_desc(desc: str) -> None:
    """Refuse a ``--desc`` label that is not letters and digits (a BIDS label)."""
    if not _DESC_RE.match(desc):
        raise ValueError(f"--desc {desc!r} must be letters and digits only")


def output_name(name: str, desc: str) -> str:
    """``sub-01_task-x_bold.nii.gz`` → ``sub-01_task-x_desc-<desc>_bold.nii.gz``.

    ``desc`` goes last among the entities, as BIDS derivatives order it; an
    existing ``desc`` value is replaced.
    """
    parsed = parse_name(name)
    if parsed is None:  # a name BIDS would not accept: desc still goes before the suffix
        stem, dot, ext = name.partition(".")
        head, under, suffix = stem.rpartition("_")
        if under:
            return f"{head}_desc-{desc}_{suffix}{dot}{ext}"
        return f"{stem}_desc-{desc}{dot}{ext}"
    entities = {k: v for k, v in parsed.entities.items() if k != "desc"}
    entities["desc"] = desc
    parts = [f"{k}-{v}" for k, v in entities.items()]
    return "_".join([*parts, parsed.suffix]) + parsed.extension


def output_path(record_path: str, desc: str) -> Path | None:
    """The output image of a run, relative to ``--out`` (None: the input path cannot
    be mirrored)."""
    rel_in = Path(record_path)
    if rel_in.is_absolute() or ".." in rel_in.parts or not rel_in.parts:
        return None
    return rel_in.with_name(output_name(rel_in.name, desc))


def output_files(out: Path, output: str) -> tuple[Path, Path]:
    """The image and sidecar of an output given relative to ``out``."""
    image = out / output
    return image, image.with_name(sidecar_name(image.name))


def check_output_location(
    out: Path,
    roots: Sequence[Path],
    paths: Sequence[Path] = (),
    *,
    include_derivatives: bool = False,
) -> None:
    """Refuse an output folder that would put files into an input dataset
    (:func:`~slicetime.readers.atomic.check_write_target`, the one decision).

    ``out`` may be outside every root and every given path, or inside a root's
    ``derivatives/`` folder (the BIDS convention); nowhere else inside a root or
    a given path. ``roots`` are all the roots given or found, also those that
    contribute no run. With ``include_derivatives`` even a root's derivatives
    folder is refused when a given path holds it (the outputs would become inputs).
    """
    check_write_target(out, roots, (), what="--out", folder=True, derivatives=True)
    in_derivatives = any(real_within(out, root) for root in roots)
    given = [p for p in paths if include_derivatives or not in_derivatives
             or not real_within(out, p) or real_within(p, out)]
    try:
        check_write_target(out, (), given, what="--out", folder=True)
    except WriteRefused as exc:
        if in_derivatives and include_derivatives:
            raise WriteRefused(f"{exc} (--include-derivatives would read the outputs back "
                               "as inputs)") from None
        raise


def clashing_runs(records: Iterable[RunRecord], desc: str) -> dict[str, Finding]:
    """Runs that would be written onto one output (same output sidecar: names that
    differ only in ``desc``, ``.nii``/``.nii.gz`` twins, one path in two roots):
    each gets a ``correct/output-clash`` finding naming all of them (keyed by the
    run's absolute path)."""
    groups: dict[str, list[RunRecord]] = {}
    for record in records:
        rel_out = output_path(record.path, desc)
        if rel_out is None:
            continue
        key = rel_out.with_name(sidecar_name(rel_out.name)).as_posix()
        groups.setdefault(key, []).append(record)
    clashes: dict[str, Finding] = {}
    for key, group in groups.items():
        if len(group) < 2:
            continue
        for record in group:
            others = [r for r in group if r is not record]
            named = ", ".join(
                o.path if o.root == record.root else f"{o.path} (in {o.root})" for o in others
            )
            message = (
                f"{record.path} and {named} would be written to one output "
                f"({key} in --out); none of them is corrected"
            )
            clashes[record.abs_path] = make_finding(
                CLASH_CODE, message, file=record.path,
                evidence={"inputs": [record.path, *[o.path for o in others]], "output": key},
            )
    return clashes


def remove_stale_temporaries(out: Path) -> int:
    """Delete temporary files an interrupted earlier batch left under ``out`` (not
    those of a batch that is still running). Links are not followed: nothing outside
    ``out`` is removed."""
    removed = 0
    if out.is_symlink() or not out.is_dir():
        return 0
    for dirpath, _dirs, files in os.walk(out):
        for name in files:
            if stale_temporary(name):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(os.path.join(dirpath, name))
                    removed += 1
    return removed


def prune_empty_folders(out: Path, empty_runs: Iterable[str], desc: str, *,
                        remove_out: bool) -> None:
    """Remove the folders made for runs that produced nothing (``empty_runs``: their
    input paths), so a failed batch leaves nothing behind (and ``out`` itself when
    this batch created it)."""
    for path in empty_runs:
        target = output_path(path, desc)
        if target is None:
            continue
        folder = (out / target).parent
        while folder != out and within(folder, out) and link_between(folder, out) is None:
            try:
                folder.rmdir()
            except OSError:
                break  # not empty (other outputs live there) or already gone
            folder = folder.parent
    if remove_out:
        with contextlib.suppress(OSError):
            out.rmdir()



__all__ = [
    "DEFAULT_DESC",
    "check_desc",
    "check_output_location",
    "clashing_runs",
    "output_files",
    "output_name",
    "output_path",
    "prune_empty_folders",
    "remove_stale_temporaries",
]
