"""Plain values shared by every layer: schedules, schemes, findings, sources.

Nothing here touches the file system. Every other layer builds on these types,
so they stay small, immutable and serialisable.
"""

from __future__ import annotations

import dataclasses
import enum
import itertools
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal, Protocol, TypeVar

from slicetime.numbers import json_time, json_times, plain, tidy_json

if TYPE_CHECKING:
    from slicetime.model_source import SourceEvidence

Axis = Literal["i", "j", "k"]
Direction = Literal["+", "-"]
AXES: tuple[Axis, ...] = ("i", "j", "k")

#: Seconds: the repetition times an fMRI run can physically have. A volume takes at least
#: tens of milliseconds and at most about a minute (common practice, no source); a TR
#: above the upper bound was written in milliseconds. The one owner of these bounds:
#: the audit's ``tr/units-ms``, the repairs' trusted window, the correction's
#: plausibility gate, ``verify`` and ``slicetime timing`` use them.
MIN_REPETITION_TIME = 0.05
MAX_REPETITION_TIME = 100.0


def implausible_repetition(seconds: float) -> str | None:
    """Why ``seconds`` is no repetition time an fMRI run can have (outside
    [:data:`MIN_REPETITION_TIME`, :data:`MAX_REPETITION_TIME`], or not finite), or None:
    the one judgement of the bounds, which the audit (``tr/implausible``), the
    correction's plausibility gate and ``slicetime timing`` all ask."""
    if not math.isfinite(seconds):
        return "not a finite time"
    if seconds < MIN_REPETITION_TIME:
        return f"below the shortest plausible TR ({plain(MIN_REPETITION_TIME)} s)"
    if seconds > MAX_REPETITION_TIME:
        return f"above the longest plausible TR ({plain(MAX_REPETITION_TIME)} s)"
    return None

TIME_TOLERANCE = 0.003
"""Seconds: the one tolerance for slice and repetition times (scheme inference,
the timing and dataset rules, the lab policy's default). How far a gap between
consecutive excitation groups may deviate from the median gap before the timing
counts as uneven, the upper bound of the threshold below which two slice times
count as equal, and how far two runs' times (or a run's and its source series'
slice times and TR) may differ and still agree. Converters round slice times to
1 ms or 2.5 ms (common practice, no source), which moves a gap by at most one
rounding step (2.5 ms), so 3 ms accepts rounded times while a genuinely uneven gap
of a few milliseconds or more is reported."""

#: Seconds: the floating-point slack of the one boundary rule (:func:`past_end`), far
#: below the 1 µs to which reports round times; it absorbs only arithmetic noise such
#: as ``2.0 - 0.5`` computed in another order.
BOUNDARY_SLACK = 1e-9


def past_end(time: float, end: float) -> bool:
    """The one boundary rule: a slice time at or after the end of its window (the TR,
    or the acquisition time of a sparse run) belongs to the next volume. A slice at
    exactly the end is outside; one before it is inside. Every consumer (rules,
    repairs, the correction gate, plots) asks this function."""
    return time >= end - BOUNDARY_SLACK


def before_start(time: float) -> bool:
    """The other side of the window: a slice time before the volume begins (negative)."""
    return time < -BOUNDARY_SLACK


def outside_window(times: Sequence[float], window: float | None) -> tuple[int, ...]:
    """The indices of ``times`` outside the acquisition window ``[0, window)``, by the
    one boundary rule; only negative times count when nothing bounds the window."""
    if not times or (not before_start(min(times))
                     and (window is None or not past_end(max(times), window))):
        return ()  # the common case, decided with one min() and one max()
    return tuple(i for i, t in enumerate(times)
                 if before_start(t) or (window is not None and past_end(t, window)))


class Severity(str, enum.Enum):
    """How bad a finding is. Ordered: error > warning > note."""

    ERROR = "error"
    WARNING = "warning"
    NOTE = "note"

    @property
    def rank(self) -> int:
        return {"error": 3, "warning": 2, "note": 1}[self.value]

    @classmethod
    def parse(cls, text: str) -> Severity:
        try:
            return cls(text.lower())
        except ValueError:
            raise ValueError(
                f"unknown severity {text!r}; expected one of error, warning, note"
            ) from None


class Counts(tuple[int, int, int]):
    """Findings per severity: (errors, warnings, notes). Counted once per run
    (:meth:`of`), added up for a dataset, and judged by :class:`FailOn`."""

    __slots__ = ()

    def __new__(cls, error: int = 0, warning: int = 0, note: int = 0) -> Counts:
        return super().__new__(cls, (error, warning, note))

    def __getnewargs__(self) -> tuple[int, int, int]:  # pickled as its three numbers
        return (self[0], self[1], self[2])

    @classmethod
    def of(cls, findings: Iterable[Finding]) -> Counts:
        e = w = n = 0
        for f in findings:
            if f.severity is Severity.ERROR:
                e += 1
            elif f.severity is Severity.WARNING:
                w += 1
            else:
                n += 1
        return cls(e, w, n)

    def plus(self, other: tuple[int, int, int]) -> Counts:
        return Counts(self[0] + other[0], self[1] + other[1], self[2] + other[2])

    def of_severity(self, severity: Severity) -> int:
        return self[3 - severity.rank]

    def as_dict(self) -> dict[str, int]:
        """``{"error": e, "warning": w, "note": n}`` (the reports' summary keys)."""
        return {"error": self[0], "warning": self[1], "note": self[2]}


@dataclass(frozen=True)
class FailOn:
    """The one ``--fail-on`` threshold: the least severity that fails (``error``,
    ``warning``), or ``never``. The exit codes of ``audit`` and ``show`` and the
    JUnit failures all ask it."""

    least: Severity | None  # None: never

    CHOICES = ("error", "warning", "never")

    @classmethod
    def parse(cls, text: str | FailOn) -> FailOn:
        if isinstance(text, FailOn):
            return text
        if text not in cls.CHOICES:
            raise ValueError(f"fail_on must be one of {', '.join(cls.CHOICES)}, not {text!r}")
        return cls(None if text == "never" else Severity(text))

    def fails(self, severity: Severity) -> bool:
        return self.least is not None and severity.rank >= self.least.rank

    def reached(self, counts: tuple[int, int, int]) -> bool:
        """True when any of ``counts`` (errors, warnings, notes) fails."""
        if self.least is None:
            return False
        return any(counts[3 - rank] for rank in range(self.least.rank, 4))

    def exit_code(self, counts: tuple[int, int, int]) -> int:
        """1 when ``counts`` reach the threshold, else 0."""
        return 1 if self.reached(counts) else 0

    def __str__(self) -> str:
        return "never" if self.least is None else self.least.value


@dataclass(frozen=True)
class Source:
    """Where one resolved value came from.

    kind is one of:
      sidecar  - a JSON sidecar (``file`` is its path, ``field`` the key)
      header   - the NIfTI header (``file`` is the image, ``field`` the header field)
      derived  - computed from other values (``field`` says how)
      default  - a documented default of the BIDS standard or of slicetime
      policy   - the lab policy file
      cli      - given on the command line
      dicom    - the source DICOM series under ``sourcedata/`` (``file`` is the file
                 read, ``field`` the tag or the vendor private header entry)
    """

    kind: Literal["sidecar", "header", "derived", "default", "policy", "cli", "dicom"]
    field: str
    file: str | None = None

    def describe(self) -> str:
        if self.file:
            return f"{self.file} ({self.field})" if self.kind != "sidecar" else self.file
        return f"{self.kind}: {self.field}"

    def to_json(self) -> dict[str, Any]:
        return {"kind": self.kind, "file": self.file, "field": self.field}


class WindowKind(str, enum.Enum):
    """What bounds the acquisition window (:meth:`SliceSchedule.window`), typed so that
    a decision never reads a label. The value is the BIDS name reports print for it
    (:func:`window_label` names a TR only the header gives honestly)."""

    NONE = ""
    ACQUISITION = "FrameAcquisitionDuration"
    DELAY = "RepetitionTime - DelayTime"
    REPETITION = "RepetitionTime"
    VOLUME_SPACING = "the shortest VolumeTiming interval"


#: the name of a repetition time that only the image header gives (pixdim[4])
HEADER_TR_NAME = "the TR in the header's pixdim[4]"


def window_label(kind: WindowKind, repetition_origin: str | None) -> str:
    """How findings and reports name the window: its BIDS name, except that a TR read
    from the header (no sidecar gives one) is called the header's TR, never the
    sidecar field ``RepetitionTime`` it is not."""
    if repetition_origin == "header":
        if kind is WindowKind.REPETITION:
            return HEADER_TR_NAME
        if kind is WindowKind.DELAY:
            return f"{HEADER_TR_NAME} - DelayTime"
    return kind.value


@dataclass(frozen=True)
class SliceSchedule:
    """When each slice of a volume was acquired.

    ``times`` are seconds from the start of each volume, in data-array order
    (slice index 0 first along ``axis``), i.e. after ``SliceEncodingDirection``
    has been applied: with direction ``-`` the sidecar list is reversed.
    """

    times: tuple[float, ...]
    axis: Axis = "k"
    direction: Direction = "+"
    repetition_time: float | None = None
    volume_times: tuple[float, ...] | None = None
    acquisition_duration: float | None = None  # TA when shorter than the TR (sparse)
    delay_time: float | None = None
    sources: Mapping[str, Source] = dataclasses.field(default_factory=dict)

    @property
    def n_slices(self) -> int:
        return len(self.times)

    @property
    def axis_index(self) -> int:
        return AXES.index(self.axis)

    @property
    def acquisition_window(self) -> float | None:
        """Time within which all slices must be acquired (:meth:`window`)."""
        return self.window()[0]

    def window(self) -> tuple[float | None, WindowKind]:
        """The acquisition window every slice time must fall inside, and what it is.

        The one rule (every user calls this): the acquisition time TA when given
        (``AcquisitionDuration``: ``RepetitionTime - DelayTime`` as the resolver
        derives it, or ``FrameAcquisitionDuration``), else ``RepetitionTime -
        DelayTime`` (a DelayTime not shorter than the TR leaves no window: it is
        ignored here as the resolver ignores it for the TA, and
        ``timing/exceeds-acquisition`` reports it), else ``RepetitionTime``, else the
        shortest ``VolumeTiming`` interval (a slice cannot be acquired after the next
        volume began). The
        kind is one of :class:`WindowKind` (its value the field's BIDS name);
        ``(None, WindowKind.NONE)`` when nothing bounds the window.
        """
        tr, delay = self.repetition_time, self.delay_time
        if self.acquisition_duration is not None:
            source = self.sources.get("AcquisitionDuration")
            derived = (source.kind == "derived" if source is not None else
                       tr is not None and delay is not None
                       and abs(tr - delay - self.acquisition_duration) < 1e-9)
            kind = WindowKind.DELAY if derived else WindowKind.ACQUISITION
            return self.acquisition_duration, kind
        if tr is not None:
            if delay and delay < tr:
                return tr - delay, WindowKind.DELAY
            return tr, WindowKind.REPETITION
        vt = self.volume_times
        if vt and len(vt) > 1:
            gap = min(b - a for a, b in itertools.pairwise(vt))
            return gap, WindowKind.VOLUME_SPACING
        return None, WindowKind.NONE

    def sidecar_order(self) -> tuple[float, ...]:
        """The times as a ``SliceTiming`` list for this schedule's direction."""
        return self.times if self.direction == "+" else tuple(reversed(self.times))


@dataclass(frozen=True)
class Scheme:
    """The acquisition scheme that a schedule describes.

    ``groups`` are the excitation groups in acquisition order, each a sorted
    tuple of 0-based slice indices in data-array order. ``step``, ``start``,
    ``ascending`` and ``residue_order`` describe the order of the groups'
    lowest slice ("base slice") when the order is regular, and are ``None``
    for an irregular scheme. ``evidence`` explains an irregular verdict.
    """

    groups: tuple[tuple[int, ...], ...]
    group_times: tuple[float, ...]
    multiband_factor: int
    label: str
    regular: bool
    step: int | None = None
    ascending: bool | None = None
    start: int | None = None
    residue_order: tuple[int, ...] | None = None
    spacing: float | None = None  # seconds between consecutive groups
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)

    @property
    def n_slices(self) -> int:
        return sum(len(g) for g in self.groups)

    def to_json(self) -> dict[str, Any]:
        return {
            "label": self.label,
            "multiband_factor": self.multiband_factor,
            "groups": [list(g) for g in self.groups],
            "group_times": json_times(self.group_times),
            "step": self.step,
            "regular": self.regular,
            "residue_order": list(self.residue_order) if self.residue_order else None,
            "ascending": self.ascending,
            "start": self.start,
            "spacing": None if self.spacing is None else json_time(self.spacing),
            "evidence": tidy_json(_jsonable(self.evidence)),
        }


@dataclass(frozen=True)
class Finding:
    """One problem or remark about a run or a dataset."""

    code: str
    severity: Severity
    message: str
    file: str | None = None
    field: str | None = None
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    hint: str | None = None

    def with_severity(self, severity: Severity) -> Finding:
        return Finding(
            self.code, severity, self.message, self.file, self.field, self.evidence, self.hint
        )

    def one_line(self) -> str:
        return one_line(self.severity.value, self.code, self.file, self.field, self.message)

    def to_json(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "severity": self.severity.value,
            "message": self.message,
            "file": self.file,
            "field": self.field,
            "evidence": tidy_json(_jsonable(self.evidence)),  # the values it rests on
            "hint": self.hint,
        }


def one_line(severity: str, code: str, file: str | None, field: str | None,
             message: str) -> str:
    """A finding in one line (``Finding.one_line``; the JUnit writer, from the JSON)."""
    where = file or ""
    if field:
        where = f"{where} [{field}]" if where else f"[{field}]"
    if file and message.startswith(file + ": "):  # the path once, not twice
        message = message[len(file) + 2:]
    return f"{severity}: {code}: {where}: {message}"


def _jsonable(value: Any) -> Any:
    """Turn evidence values (tuples, numpy scalars, mappings) into JSON values."""
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, bool | str | int | type(None)):
        return value
    if isinstance(value, float):
        return value if value == value and abs(value) != float("inf") else repr(value)
    if hasattr(value, "item"):  # numpy scalar
        return _jsonable(value.item())
    return str(value)


def worst(findings: list[Finding] | tuple[Finding, ...]) -> Severity | None:
    """The highest severity among findings, or None when there are none."""
    best: Severity | None = None
    for f in findings:
        if best is None or f.severity.rank > best.rank:
            best = f.severity
    return best


@dataclass(frozen=True)
class HeaderInfo:
    """What slicetime needs from a NIfTI-1 or NIfTI-2 header (header bytes only).

    Times are converted to seconds using ``xyzt_units``; the raw values are
    kept beside them for reports. Dimension indices are 0-based.
    """

    version: int  # 1 or 2
    shape: tuple[int, ...]  # dim[1..dim[0]]
    pixdim: tuple[float, ...]  # pixdim[1..dim[0]]
    datatype: int
    bitpix: int
    vox_offset: int
    byte_order: Literal["<", ">"]
    time_unit: Literal["s", "ms", "us", "unknown"]
    raw_pixdim4: float  # pixdim[4] as stored, in ``time_unit``
    repetition_time: float | None  # pixdim[4] in seconds; None when unset (0) or not 4D
    freq_dim: int | None
    phase_dim: int | None
    slice_dim: int | None  # from dim_info bits 4-5; None when 0 (unknown)
    slice_code: int
    slice_start: int
    slice_end: int
    raw_slice_duration: float  # as stored, in ``time_unit``
    slice_duration: float | None  # seconds; None when unset (0)
    scl_slope: float
    scl_inter: float
    compressed: bool
    file_size: int  # bytes on disk
    data_bytes: int  # bytes of image data the header claims

    @property
    def n_volumes(self) -> int:
        return self.shape[3] if len(self.shape) >= 4 else 1

    @property
    def is_four_d(self) -> bool:
        """Four dimensions, or more whose extents past the fourth are all 1 (``dim[0]``
        5 with ``dim[5]`` 1 stores exactly the bytes of the 4-D image, NIfTI-1: the data
        are laid out dimension by dimension, the first fastest)."""
        return len(self.shape) >= 4 and all(d == 1 for d in self.shape[4:])


@dataclass(frozen=True)
class TimingProblem:
    """A reason a run's timing could not be turned into a schedule."""

    code: str
    message: str
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)


#: the units a timing value can be written in, and the factor that makes it seconds
UNIT_FACTORS: Mapping[str, float] = {"s": 1.0, "ms": 0.001, "us": 1e-6, "unknown": 1.0}


@dataclass(frozen=True)
class UnitVerdict:
    """How one timing field was written: its unit, and what that verdict rests on.

    ``field`` is ``SliceTiming``, ``RepetitionTime``, ``VolumeTiming`` (sidecar keys)
    or ``pixdim[4]``, ``slice_duration`` (header fields, whose unit ``xyzt_units``
    states). ``unit`` is ``s``, ``ms``, ``us`` or ``unknown`` (read as seconds);
    the value as written times :attr:`factor` is seconds."""

    field: str
    unit: str
    evidence: Mapping[str, Any] = dataclasses.field(default_factory=dict)

    @property
    def factor(self) -> float:
        return UNIT_FACTORS[self.unit]

    @property
    def usable(self) -> bool:
        """False when no unit makes the value plausible (``evidence["usable"]``: a
        sidecar TR that is no TR in seconds nor read as milliseconds), so the value
        gives no time at all (``schemes.resolve.repetition_time_unit`` decides it)."""
        return bool(self.evidence.get("usable", True))


@dataclass(frozen=True)
class ResolvedTiming:
    """Everything a run's timing resolves to, decided once (``schemes.resolve``).

    ``schedule`` keeps the slice times as written, in data-array order, with the
    source of every value (``correct`` refuses what is not in seconds; ``fix``
    divides). Everything else is in seconds, after the unit verdicts in ``units``:
    ``times``, ``repetition_time`` (sidecar ``RepetitionTime``; else, without
    ``VolumeTiming``, the header's ``pixdim[4]``; BIDS: the sidecar wins, with or
    without a schedule), the acquisition ``window`` and its ``window_kind``
    (:meth:`SliceSchedule.window`; ``window_name`` names it), and ``outside``: the slices
    outside ``[0, window)`` by the one boundary rule (:func:`outside_window`).
    Rules, repairs, the correction gate, plots, reports and the API read this and
    decide none of it again."""

    schedule: SliceSchedule | None = None
    #: where the slice times came from: "sidecar", "header", or None
    origin: str | None = None
    #: why there is no schedule (empty when there is one)
    problems: tuple[TimingProblem, ...] = ()
    #: slice axis length along the resolved axis, when the header gives it
    axis_length: int | None = None
    repetition_time: float | None = None
    repetition_source: Source | None = None
    times: tuple[float, ...] | None = None
    window: float | None = None
    window_kind: WindowKind = WindowKind.NONE
    outside: tuple[int, ...] = ()
    units: Mapping[str, UnitVerdict] = dataclasses.field(default_factory=dict)

    @property
    def repetition_origin(self) -> str | None:
        """What gave ``repetition_time``: ``sidecar`` (``RepetitionTime``), ``header``
        (``pixdim[4]``: read only when no applicable sidecar gives a usable
        ``RepetitionTime`` or ``VolumeTiming``, which ``tr/missing`` reports; BIDS takes
        the TR from the sidecar, so every screen says the header's TR is the header's
        only), or None without a TR. Decided here once; screens and reports read it."""
        return None if self.repetition_source is None else self.repetition_source.kind

    @property
    def window_name(self) -> str:
        """The window's name for people (:func:`window_label`: a TR only the header
        gives is called the header's TR). Decisions read ``window_kind``."""
        return window_label(self.window_kind, self.repetition_origin)

    @property
    def repetition_unusable(self) -> bool:
        """True when the TR's source gives one that no unit makes plausible (its unit
        verdict is not :attr:`UnitVerdict.usable`): the sidecar's ``RepetitionTime``, or,
        without one, the header's ``pixdim[4]`` (2000 labelled seconds).
        ``repetition_time`` is then None, and screens say the TR is not usable rather
        than show a number."""
        verdict = self.units.get("RepetitionTime")
        if verdict is None and "VolumeTiming" not in self.units:
            verdict = self.units.get("pixdim[4]")
        return verdict is not None and not verdict.usable

    def unit(self, field: str) -> str:
        """The unit ``field`` was written in (``s`` when no verdict was needed)."""
        verdict = self.units.get(field)
        return verdict.unit if verdict is not None else "s"

    @property
    def times_factor(self) -> float:
        """The factor that turns the schedule's times as written into seconds."""
        verdict = self.units.get("SliceTiming")
        return verdict.factor if verdict is not None else 1.0

    def seconds_schedule(self) -> SliceSchedule | None:
        """The schedule with its times and repetition time in seconds (for drawings,
        ``verify`` and callers that need a schedule rather than the parts)."""
        schedule = self.schedule
        if schedule is None or self.times is None:
            return schedule
        if self.times == schedule.times and self.repetition_time == schedule.repetition_time:
            return schedule
        return dataclasses.replace(schedule, times=self.times,
                                   repetition_time=self.repetition_time)


#: a run about which nothing is resolved (no header, or built before resolving)
UNRESOLVED = ResolvedTiming()


class TimingViews:
    """The parts of a run's resolved timing read most often, as attributes of the run:
    shared by :class:`RunRecord` and the compact run view of a streamed audit."""

    __slots__ = ()
    timing: ResolvedTiming

    @property
    def schedule(self) -> SliceSchedule | None:
        """The slice times as written, with their sources (``timing.schedule``)."""
        return self.timing.schedule

    @property
    def timing_origin(self) -> str | None:
        """Where the slice times came from: "sidecar", "header" or None."""
        return self.timing.origin

    @property
    def axis_length(self) -> int | None:
        """The number of slices along the resolved slice axis, when the header gives it."""
        return self.timing.axis_length


@dataclass(frozen=True)
class RunRecord(TimingViews):
    """One run with everything resolved about it, ready for rules and reports.

    ``path`` is relative to ``root`` with forward slashes (how reports name the
    run); ``abs_path`` is the real location. ``metadata`` is the sidecar
    content after the inheritance principle, and ``metadata_sources`` says
    which sidecar (relative path) supplied each key. ``findings`` holds what
    was found while reading (bad JSON, bad header, unresolvable timing).
    """

    path: str
    abs_path: str
    root: str
    entities: Mapping[str, str] = dataclasses.field(default_factory=dict)
    suffix: str = ""
    datatype: str | None = None
    header: HeaderInfo | None = None
    metadata: Mapping[str, Any] = dataclasses.field(default_factory=dict)
    metadata_sources: Mapping[str, str] = dataclasses.field(default_factory=dict)
    sidecar_chain: tuple[str, ...] = ()
    #: the run's timing, resolved once (schedule, units, TR, window): see ResolvedTiming
    timing: ResolvedTiming = UNRESOLVED
    scheme: Scheme | None = None
    findings: tuple[Finding, ...] = ()
    #: timing fields a deeper sidecar overrode: key -> ((sidecar, shadowed value), ...)
    overridden: Mapping[str, tuple[tuple[str, Any], ...]] = dataclasses.field(
        default_factory=dict
    )
    #: what the source DICOM series says, when the source cross-check ran (see model_source)
    source: SourceEvidence | None = None
    #: why the image's content is not here ("annex": a link into an absent object store;
    #: "placeholder": a 0-byte file): the run is audited from its sidecars only
    content_missing: str | None = None

    @property
    def timing_problems(self) -> tuple[TimingProblem, ...]:
        """Why there is no schedule, when there is none."""
        return self.timing.problems


class RunView(Protocol):
    """What the dataset rules, the lab policy's protocol selection and the report
    summaries read of a run: a :class:`RunRecord`, or the compact view a streamed
    audit keeps of every run (``pipelines.audit.RunFacts``). Nothing else of a
    record may be read there; a dataset rule that needs more adds it to both."""

    @property
    def path(self) -> str: ...
    @property
    def root(self) -> str: ...
    @property
    def abs_path(self) -> str: ...
    @property
    def entities(self) -> Mapping[str, str]: ...
    @property
    def suffix(self) -> str: ...
    @property
    def datatype(self) -> str | None: ...
    @property
    def header(self) -> HeaderInfo | None: ...
    @property
    def content_missing(self) -> str | None: ...
    @property
    def timing(self) -> ResolvedTiming: ...
    @property
    def schedule(self) -> SliceSchedule | None: ...
    @property
    def axis_length(self) -> int | None: ...
    @property
    def scheme(self) -> Scheme | None: ...
    @property
    def metadata_sources(self) -> Mapping[str, str]: ...


_Frozen = TypeVar("_Frozen")
_FIELD_COUNTS: dict[type, int] = {}


def assembled(cls: type[_Frozen], fields: dict[str, Any]) -> _Frozen:
    """What ``cls(**fields)`` gives for a frozen dataclass whose ``__init__`` only stores
    its fields (no ``__post_init__``) when ``fields`` names every field, made without
    the ``object.__setattr__`` per field of a frozen class's ``__init__``: a header and
    a record are made for every run of an audit (a fifth of a microsecond instead of
    five). A number of fields other than the class's is a TypeError (the tests make each
    such instance both ways and compare)."""
    count = _FIELD_COUNTS.get(cls)
    if count is None:
        count = _FIELD_COUNTS[cls] = len(dataclasses.fields(cls))  # type: ignore[arg-type]
    if len(fields) != count:
        raise TypeError(f"{cls.__name__}: {count} fields, {len(fields)} given")
    made = object.__new__(cls)
    made.__dict__.update(fields)
    return made
