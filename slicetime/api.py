"""The public Python API (re-exported by ``slicetime``; stable names).

Everything here composes the lower layers the same way the command line does;
no function has an implementation of its own that the commands do not share.

* :func:`correct_array` / :func:`correct_image` — slice-timing correction of
  an array or a nibabel image (the engines the ``correct`` command runs);
* :func:`reference_time` — the reference a correction aligns to (write it as
  ``StartTime``);
* :func:`slice_times` — ``SliceTiming`` for a protocol (``slicetime timing``);
* :func:`infer_scheme` — the acquisition scheme a list of times describes;
* :func:`audit` — every run under dataset folders, with its findings
  (``slicetime audit``);
* :func:`inspect` — one run with exactly the findings the audit gives it
  (``slicetime show``).

Times follow BIDS: seconds from the start of each volume, listed along the
``SliceEncodingDirection`` (so with ``k-`` the list runs from the last slice
index down to 0), exactly as in a sidecar's ``SliceTiming``.

The corrections apply the ``correct`` command's gate, from the same owners
(``slicetime.rules.correction``): an image read from a file is audited with its
sidecars, dataset and lab policy, and a run whose timing stands in doubt raises
:class:`TimingInDoubt` (accept a doubt with ``accept=["CODE"]`` or
``["CODE:PATTERN"]``, as ``--accept``); a series that may not be interpolated or is
too short raises :class:`CorrectionRefused`. A bare array is checked for what it
can show (see :func:`correct_array`).
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any, Literal, cast

from slicetime.pipelines.errors import CorrectionRefused, TimingInDoubt
from slicetime.words import count

if TYPE_CHECKING:  # the heavy imports happen only when a function is called
    import numpy as np

    from slicetime.engines.plan import ReferenceChoice
    from slicetime.model import Axis, Direction, Scheme, SliceSchedule
    from slicetime.pipelines.audit import AuditResult, RunResult

_DIRECTIONS = ("i", "j", "k", "i-", "j-", "k-")


def _schedule(
    slice_timing: Sequence[float],
    repetition_time: float | None,
    slice_encoding_direction: str,
    volume_timing: Sequence[float] | None,
    delay_time: float | None,
) -> SliceSchedule:
    from slicetime.model import SliceSchedule

    if slice_encoding_direction not in _DIRECTIONS:
        raise ValueError(
            f"slice_encoding_direction must be one of {', '.join(_DIRECTIONS)}, "
            f"not {slice_encoding_direction!r}"
        )
    times = [float(t) for t in slice_timing]
    if not times or not all(math.isfinite(t) for t in times):
        raise ValueError("slice_timing must be a non-empty list of finite numbers (seconds)")
    if repetition_time is None and volume_timing is None:
        raise ValueError("give repetition_time (seconds) or volume_timing")
    if repetition_time is not None and not (math.isfinite(repetition_time)
                                            and repetition_time > 0):
        raise ValueError(f"repetition_time must be a positive number of seconds, "
                         f"not {repetition_time!r}")
    direction: Direction = "-" if slice_encoding_direction.endswith("-") else "+"
    return SliceSchedule(
        times=tuple(times if direction == "+" else times[::-1]),
        axis=cast("Axis", slice_encoding_direction[0]),  # checked above
        direction=direction,
        repetition_time=None if repetition_time is None else float(repetition_time),
        volume_times=None if volume_timing is None else tuple(float(t) for t in volume_timing),
        delay_time=None if delay_time is None else float(delay_time),
    )


def _choice(reference: float | str | ReferenceChoice) -> ReferenceChoice:
    from slicetime.engines.plan import ReferenceChoice

    if isinstance(reference, ReferenceChoice):
        return reference
    if isinstance(reference, (int, float)) and not isinstance(reference, bool):
        return ReferenceChoice.parse(repr(float(reference)))
    if isinstance(reference, str):
        return ReferenceChoice.parse(reference)
    raise TypeError(f"reference must be seconds, a word or a ReferenceChoice, not {reference!r}")


def reference_time(
    slice_timing: Sequence[float],
    repetition_time: float | None = None,
    reference: float | str | ReferenceChoice = "middle",
    *,
    slice_encoding_direction: str = "k",
    volume_timing: Sequence[float] | None = None,
    delay_time: float | None = None,
) -> float:
    """The time, in seconds from the start of each volume, that a correction aligns to.

    Parameters
    ----------
    slice_timing, repetition_time, slice_encoding_direction, volume_timing, delay_time
        The run's BIDS fields (see :func:`correct_array`).
    reference
        Seconds (``1.0``), ``"first"``, ``"middle"`` (halfway between the first
        and the last excitation), ``"last"``, or ``"slice:N"`` (slice N,
        0-based in data-array order).

    Returns
    -------
    float
        The reference time; a corrected run's ``StartTime``.

    Raises
    ------
    ValueError
        When the reference lies outside the acquisition window.
    """
    from slicetime.engines.plan import reference_time as plan_reference

    schedule = _schedule(slice_timing, repetition_time, slice_encoding_direction,
                         volume_timing, delay_time)
    return plan_reference(_choice(reference), schedule)


def correct_array(
    data: np.ndarray,
    slice_timing: Sequence[float],
    repetition_time: float | None = None,
    *,
    slice_encoding_direction: str = "k",
    method: str = "fourier",
    reference: float | str | ReferenceChoice = "middle",
    volume_timing: Sequence[float] | None = None,
    delay_time: float | None = None,
    threads: int = 1,
    suffix: str | None = None,
) -> np.ndarray:
    """Align every slice of a 4-D array to one reference time.

    A bare array comes without its sidecar, header or dataset, so of the ``correct``
    command's gate only this is checked: the number of volumes (at least 6; the
    error near a run's ends is too large below that) and, when ``suffix`` says what
    the series is, that it may be interpolated. What cannot be checked here: whether
    the times agree with the image header's ``slice_code``, the slice axis and
    direction with the header and the other runs of the task, the dataset's lab
    policy, or the source DICOM series. To have those checked, correct the image
    read from its file in the dataset (:func:`correct_image` on ``nibabel.load(path)``)
    or look first with :func:`inspect`.

    Parameters
    ----------
    data : array, shape (x, y, z, time)
        The run, time last (nibabel's order). Any real dtype; it is not changed.
    slice_timing : sequence of float
        ``SliceTiming``: seconds from the start of each volume, one per slice,
        listed along ``slice_encoding_direction``.
    repetition_time : float, optional
        ``RepetitionTime`` in seconds (or give ``volume_timing``).
    slice_encoding_direction : {"i", "j", "k", "i-", "j-", "k-"}
        ``SliceEncodingDirection``: the slice axis, and with ``-`` a list that
        runs from the last slice index down to 0.
    method : {"fourier", "sinc", "cubic", "linear"}
        The interpolation engine (see ``slicetime correct --help``).
    reference : float or str
        See :func:`reference_time`.
    volume_timing : sequence of float, optional
        ``VolumeTiming`` (uneven volume onsets; only ``cubic`` and ``linear``).
    delay_time : float, optional
        ``DelayTime`` of a sparse run: the slices lie within ``TR - DelayTime``.
    threads : int
        Slices resampled at once.
    suffix : str, optional
        The run's BIDS suffix. Only BOLD-type series (``bold``, ``cbv``, ``phase``)
        are corrected; ``dwi``, ``asl``, ``m0scan``, ``sbref`` and other suffixes are
        refused. Not given: the series kind is not checked.

    Returns
    -------
    ndarray, float32, same shape as ``data``
        The aligned run. Constant series are copied; non-finite samples keep
        their place and the rest of their series is corrected around them.

    Raises
    ------
    CorrectionRefused
        (a ``ValueError``) fewer than 6 volumes (``code`` is
        ``correct/too-few-volumes``), or a ``suffix`` whose volumes may not be
        interpolated (``correct/not-interpolable``).
    ValueError
        Inconsistent inputs: wrong number of slice times, times outside the
        acquisition window, a reference outside it, an engine that needs even
        volume spacing given ``volume_timing``.

    Examples
    --------
    >>> import numpy as np, slicetime
    >>> data = np.random.default_rng(0).normal(size=(4, 4, 3, 20)).astype("float32")
    >>> out = slicetime.correct_array(data, [0.0, 0.4, 0.8], 1.2)
    >>> out.shape, out.dtype.name
    ((4, 4, 3, 20), 'float32')
    """
    import numpy as np

    from slicetime.engines.align import align_array
    from slicetime.engines.interpolate import get_engine
    from slicetime.engines.plan import make_plan
    from slicetime.pipelines.correct_gate import check_array

    array = np.asarray(data)
    if array.ndim != 4:
        raise ValueError(f"data must be 4-D (x, y, z, time), got shape {array.shape}")
    check_array(array.shape[3], suffix)
    schedule = _schedule(slice_timing, repetition_time, slice_encoding_direction,
                         volume_timing, delay_time)
    if len(schedule.times) != array.shape[schedule.axis_index]:
        raise ValueError(
            f"slice_timing has {count(len(schedule.times), 'entry')} but the data have "
            f"{count(array.shape[schedule.axis_index], 'slice')} along {schedule.axis}"
        )
    plan = make_plan(schedule, array.shape[3], _choice(reference))
    return align_array(array, plan, get_engine(method), threads=threads)


def correct_image(
    img: Any,
    slice_timing: Sequence[float] | None = None,
    repetition_time: float | None = None,
    *,
    slice_encoding_direction: str | None = None,
    method: str = "fourier",
    reference: float | str | ReferenceChoice = "middle",
    volume_timing: Sequence[float] | None = None,
    delay_time: float | None = None,
    threads: int = 1,
    accept: Sequence[str] = (),
    policy: str | os.PathLike[str] | None = None,
    suffix: str | None = None,
) -> Any:
    """Align a nibabel NIfTI image; returns a new float32 image.

    An image read from a file (``nibabel.load``) goes through the ``correct``
    command's gate first: the run is audited as :func:`inspect` audits it (its
    sidecars, the other runs of its dataset, the lab policy), and it is refused when
    its timing stands in doubt (:class:`TimingInDoubt`: the header's ``slice_code``
    against ``SliceTiming``, a slice direction against the header or the task's other
    runs, ...) unless ``accept`` (or the policy's ``[[accept]]``) accepts every doubt,
    when its series may not be interpolated (``dwi``, ``asl``, ``m0scan``, ``sbref``),
    when it has fewer than 6 volumes, or when its dataset's own lab policy is broken
    (:class:`CorrectionRefused`). The audit reads the headers and sidecars of the
    run's dataset once per call, as :func:`inspect` does. An image made in memory has
    no file, sidecar or dataset: it is checked as :func:`correct_array` checks an
    array.

    Parameters
    ----------
    img : nibabel.Nifti1Image or nibabel.Nifti2Image
        A 4-D image. Its data are read with scaling applied.
    slice_timing : sequence of float, optional
        ``SliceTiming`` (see :func:`correct_array`). When omitted, the times
        encoded by the header's ``slice_code``/``slice_duration``/``dim_info``
        are used (and the axis is the header's slice dimension).
    repetition_time : float, optional
        Seconds. When omitted, the header's ``pixdim[4]`` (after ``xyzt_units``).
    slice_encoding_direction, method, reference, volume_timing, delay_time, threads, suffix
        As in :func:`correct_array`. The direction defaults to the header's
        slice dimension when the times come from the header, else ``k``.
    accept : sequence of str
        Doubts about the timing accepted for an image read from a file, as the
        command's ``--accept``: ``"CODE"`` (this run) or ``"CODE:PATTERN"`` (runs
        whose path from the dataset root matches). The :class:`TimingInDoubt`
        message prints the exact ``accept=[...]`` for the run.
    policy : path, optional
        A lab policy file instead of the dataset's own ``slicetime-policy.toml``.

    Returns
    -------
    image of the same class
        Same affine and header, data float32 without scaling, ``slice_code``
        and ``slice_duration`` cleared (the slices are no longer staggered).

    Raises
    ------
    TimingInDoubt
        The run's timing stands in doubt; ``findings`` are the doubts, ``codes``
        their codes; the message says how to accept them.
    CorrectionRefused
        (a ``ValueError``; :class:`TimingInDoubt` is one) the series may not be
        interpolated, has too few volumes, or its dataset's lab policy is broken
        (``code`` says which).
    ValueError
        Inconsistent inputs (see :func:`correct_array`), or an ``accept`` entry that
        names no code that puts the timing in doubt.
    """
    import numpy as np

    from slicetime.pipelines.correct_gate import check_file

    file = _source_file(img)
    if file is not None:
        from pathlib import Path

        check_file(Path(file), accept, None if policy is None else Path(policy))
    header = img.header
    axis_letter: str | None = None
    if slice_timing is None:
        slice_timing, axis_letter = _header_times(header)
    if slice_encoding_direction is None:
        slice_encoding_direction = axis_letter or "k"
    if repetition_time is None and volume_timing is None:
        repetition_time = _header_tr(header)
    data = np.asarray(img.dataobj, dtype=np.float32)
    aligned = correct_array(
        data, slice_timing, repetition_time,
        slice_encoding_direction=slice_encoding_direction, method=method,
        reference=reference, volume_timing=volume_timing, delay_time=delay_time,
        threads=threads, suffix=suffix,
    )
    new_header = header.copy()
    new_header.set_data_dtype(np.float32)
    new_header["slice_code"] = 0
    new_header["slice_duration"] = 0
    out = img.__class__(aligned, img.affine, new_header)
    out.header.set_slope_inter(1.0, 0.0)
    return out


def _source_file(img: Any) -> str | None:
    """The file the image was read from (``nibabel.load``), or None for one made in
    memory. A file that is gone since cannot be checked: ValueError."""
    get = getattr(img, "get_filename", None)
    file = get() if callable(get) else None
    if file is None:
        return None
    if not os.path.lexists(file):
        raise ValueError(f"{file}: the image was read from this file, which is gone, so its "
                         "sidecars and dataset cannot be checked; load it again, or correct "
                         "its array with correct_array")
    return os.fspath(file)


def _header_times(header: Any) -> tuple[list[float], str]:
    """SliceTiming (along +axis) and the axis letter from a nibabel header."""
    try:
        _, _, slice_dim = header.get_dim_info()
        times = header.get_slice_times()
    except Exception as exc:  # nibabel raises HeaderDataError for unset fields
        raise ValueError(
            "give slice_timing: the header does not encode slice times "
            f"(slice_code/slice_duration/dim_info): {exc}"
        ) from None
    if slice_dim is None or any(t is None for t in times):
        raise ValueError("give slice_timing: the header's slice_code does not cover every slice")
    return [float(t) for t in times], "ijk"[slice_dim]


def _header_tr(header: Any) -> float:
    zooms = header.get_zooms()
    if len(zooms) < 4 or not zooms[3] > 0:
        raise ValueError("give repetition_time: the header's pixdim[4] is unset")
    unit = header.get_xyzt_units()[1]
    factor = {"msec": 1e-3, "usec": 1e-6}.get(unit, 1.0)
    return float(zooms[3]) * factor


def slice_times(
    n_slices: int,
    repetition_time: float,
    *,
    order: Literal["sequential", "interleaved"] = "sequential",
    descending: bool = False,
    step: int = 2,
    first: int | Literal["auto"] | None = None,
    multiband: int = 1,
    slice_encoding_direction: str = "k",
    delay_time: float | None = None,
    decimals: int | None = 6,
) -> list[float]:
    """``SliceTiming`` for a protocol, as ``slicetime timing`` prints it.

    Parameters
    ----------
    n_slices : int
        Slices along the slice axis.
    repetition_time : float
        Seconds.
    order : {"sequential", "interleaved"}
        Order of excitation along the slice encoding direction.
    descending : bool
        Start from the last slice along the encoding direction.
    step : int
        Distance between successive slices of an interleaved order.
    first : int or "auto", optional
        First base slice of an interleaved order (``0 .. step-1`` ascending);
        ``"auto"`` starts at 1 when the number of excitation groups is even.
    multiband : int
        Slices excited together, spaced ``n_slices / multiband`` apart.
    slice_encoding_direction : str
        The run's ``SliceEncodingDirection``; with ``-`` the list is reversed.
    delay_time : float, optional
        ``DelayTime`` (sparse runs): the slices are spread over
        ``repetition_time - delay_time``.
    decimals : int, optional
        Round to this many decimals (default: microseconds).

    Examples
    --------
    >>> import slicetime
    >>> slicetime.slice_times(4, 2.0, order="interleaved")
    [0.0, 1.0, 0.5, 1.5]
    """
    from slicetime.schemes.generate import Protocol, slice_timing

    if slice_encoding_direction not in _DIRECTIONS:
        raise ValueError(f"slice_encoding_direction must be one of {', '.join(_DIRECTIONS)}")
    window = None
    if delay_time is not None:
        window = repetition_time - delay_time
    protocol = Protocol(
        n_slices=n_slices, order=order, ascending=not descending, step=step, start=first,
        multiband=multiband, repetition_time=repetition_time, active_time=window,
        direction="-" if slice_encoding_direction.endswith("-") else "+", decimals=decimals,
    )
    return slice_timing(protocol)


def infer_scheme(slice_timing: Sequence[float], *,
                 slice_encoding_direction: str = "k") -> Scheme:
    """The acquisition scheme that ``SliceTiming`` describes.

    Parameters
    ----------
    slice_timing : sequence of float
        Seconds, listed along ``slice_encoding_direction`` (as in a sidecar).
    slice_encoding_direction : str
        With ``-`` the list is reversed into data-array order first, so the
        scheme's slice indices are array indices.

    Returns
    -------
    Scheme
        ``label`` (e.g. ``"interleaved ascending from 1"``), ``groups`` (the
        excitation groups in acquisition order, array indices),
        ``multiband_factor``, ``step``, ``start`` and, for an irregular list,
        ``evidence`` saying why.

    Examples
    --------
    >>> import slicetime
    >>> slicetime.infer_scheme([0.0, 1.0, 0.5, 1.5]).label
    'interleaved ascending from 0'
    """
    from slicetime.schemes.infer import infer_scheme as infer

    times = [float(t) for t in slice_timing]
    if slice_encoding_direction.endswith("-"):
        times.reverse()
    return infer(times)


def audit(
    paths: str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    *,
    policy: str | os.PathLike[str] | None = None,
    include_derivatives: bool = False,
    include_sourcedata: bool = False,
    include_hidden: bool = False,
    source: bool | None = None,
    verify: bool = False,
    jobs: int = 1,
) -> AuditResult:
    """Audit every run under ``paths``, as ``slicetime audit`` does.

    Parameters
    ----------
    paths : path or sequence of paths
        Dataset roots, subject folders or run files.
    policy : path, optional
        A lab policy file (TOML); by default each dataset's
        ``slicetime-policy.toml``, if any.
    include_derivatives, include_sourcedata, include_hidden : bool
        Also walk ``derivatives/``, ``sourcedata/``, hidden folders.
    source : bool, optional
        Check runs against their DICOM series under ``sourcedata/``: ``None``
        (default) when that folder exists, ``True`` always, ``False`` never.
    verify : bool
        Also read each run's image data and check its slice order (slower).
    jobs : int
        Local worker processes.

    Returns
    -------
    AuditResult
        ``runs``: one ``RunResult`` per run in report order, each with its
        ``record`` (``path``, ``schedule``, ``scheme``, ``metadata``, ...),
        ``findings`` and ``ignored`` (by the policy); ``dataset_findings``;
        ``counts()`` by severity; ``exit_code(fail_on)`` as the command's.

    Raises
    ------
    slicetime.readers.errors.ReadError
        A given path that does not exist.
    slicetime.pipelines.errors.NoRunsError
        A given path that holds no run.

    Examples
    --------
    >>> import slicetime
    >>> result = slicetime.audit("my-dataset")  # doctest: +SKIP
    >>> [(r.record.path, [f.code for f in r.findings]) for r in result.runs]  # doctest: +SKIP
    """
    from pathlib import Path

    from slicetime.pipelines.audit import audit_paths
    from slicetime.pipelines.executor import make_executor
    from slicetime.readers.source import SourceOptions

    given: Sequence[str | os.PathLike[str]] = (
        [paths] if isinstance(paths, (str, os.PathLike)) else paths)
    mode: Literal["auto", "on", "off"] = "auto" if source is None else "on" if source else "off"
    executor = make_executor(jobs, None, light=not verify)
    try:
        return audit_paths(
            [Path(p) for p in given],
            include_derivatives=include_derivatives,
            include_sourcedata=include_sourcedata,
            include_hidden=include_hidden,
            policy_file=None if policy is None else Path(policy),
            executor=executor,
            verify=verify,
            source=SourceOptions(mode=mode),
        )
    finally:
        executor.close()


def inspect(run: str | os.PathLike[str], *,
            policy: str | os.PathLike[str] | None = None) -> RunResult:
    """One run with exactly the findings :func:`audit` gives it (``slicetime show``).

    Parameters
    ----------
    run : path
        The run's image (``*_bold.nii.gz``). Its dataset is audited from the
        header bytes (so dataset-wide checks and the lab policy apply).
    policy : path, optional
        A lab policy file instead of the dataset's own.

    Returns
    -------
    RunResult
        ``record`` (the resolved schedule with the source of every value in
        ``record.schedule.sources``, the scheme, the merged sidecar metadata),
        ``findings`` and ``ignored``. A file that cannot be read gives a
        result with that one finding.
    """
    from pathlib import Path

    from slicetime.pipelines.audit import inspect_run

    return inspect_run(Path(run), policy_file=None if policy is None else Path(policy))


__all__ = ["CorrectionRefused", "TimingInDoubt", "audit", "correct_array", "correct_image",
           "infer_scheme", "inspect", "reference_time", "slice_times"]


def __dir__() -> list[str]:
    """The public names only (PEP 562): not the typing helpers this module imports."""
    return sorted(__all__)
