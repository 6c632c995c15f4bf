"""What ``correct`` may act on, and the judgements behind the codes it gives a run it
refuses for its own reasons.

Those codes (``correct/*``, declared in the catalogue, ``slicetime/data/codes.toml``)
are not audit checks: the audit never reports them. ``correct`` attaches them to a
refused run (its ``blocking_findings``) so that ``slicetime explain`` documents every
reason a run was not corrected.

The judgements, each with one owner here (pure, no I/O):

* :func:`timing_doubts` / :func:`judge_trust`: whether the run's timing stands in
  doubt (a finding whose code is declared with ``timing_in_doubt``, at warning
  level or above) and which doubts the user accepted (``--accept``, ``[[accept]]``);
* :func:`undecided_doubt`: whether ``fix`` may change the run's timing fields (not
  while a doubt stands that only a person can settle);
* :func:`interpolation_refusal`: whether the run's volumes may be interpolated at
  all (BOLD-type series only);
* :data:`MIN_VOLUMES` / :func:`too_few_volumes`: the shortest run worth correcting
  (from the measured edge error); :func:`shape_refusal`: an image that is not one
  4-D time series;
* :func:`doubt_refusal`: the refusal of a run whose doubts still stand, naming them and
  how to accept each (in the command line's words or the Python API's).

The ``correct`` command (``pipelines.correct``) and the Python API
(``slicetime.correct_image``/``correct_array``) both ask these functions.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

from slicetime.codes import RULES
from slicetime.model import Finding, HeaderInfo, RunRecord, Severity
from slicetime.policy.model import AcceptEntry
from slicetime.policy.patterns import path_pattern_problem

#: the fewest volumes a run needs to be corrected: from the measured whole-run error
#: (benchmarks/bench_edges.py; README "The run's ends"), 6 volumes is the first count at
#: which fourier, sinc and cubic come down to about a fifth of the uncorrected error
#: (0.19 to 0.21; 0.24 to 0.28 at 5)
MIN_VOLUMES = 6

#: the suffixes whose volumes sample one slowly varying signal (BIDS: func datatype)
BOLD_TYPE_SUFFIXES = frozenset({"bold", "cbv", "phase"})

#: each other kind of series: what it is, and why interpolating across its volumes is wrong
_NOT_INTERPOLABLE = {
    "dwi": ("a diffusion series", "its volumes differ in b-value and gradient direction, so "
            "interpolating across them mixes contrasts"),
    "asl": ("an arterial spin labelling series", "label and control volumes alternate and "
            "their difference is the signal, which interpolating across them destroys"),
    "sbref": ("a single-band reference image", "not a time series"),
    "m0scan": ("an M0 calibration scan", "not a BOLD time series"),
}
_FOLDER_KINDS = {"dwi": "dwi", "perf": "asl"}
_WORD = re.compile(r"[A-Za-z0-9]+")


def series_kind(record: RunRecord) -> str | None:
    """The kind of series that may not be interpolated (``dwi``, ``asl``, ``sbref``,
    ``m0scan`` or another non-BOLD suffix), or None for a BOLD-type series. A name that
    is not a valid BIDS name is judged by its words and its folder."""
    if record.suffix:
        return None if record.suffix in BOLD_TYPE_SUFFIXES else record.suffix
    words = {w.lower() for w in _WORD.findall(record.path.rsplit("/", 1)[-1])}
    for kind in _NOT_INTERPOLABLE:
        if kind in words:
            return kind
    if words & BOLD_TYPE_SUFFIXES:
        return None
    return _FOLDER_KINDS.get(record.datatype or "")


def interpolation_refusal(record: RunRecord) -> str | None:
    """Why the run's volumes may not be interpolated, or None when they may: the one
    owner of "may this run be corrected at all" (``correct/not-interpolable``)."""
    return suffix_refusal(series_kind(record))


def suffix_refusal(suffix: str | None) -> str | None:
    """:func:`interpolation_refusal` for a series known only by its BIDS suffix (None:
    not known, nothing to refuse)."""
    if suffix is None or suffix in BOLD_TYPE_SUFFIXES:
        return None
    what, why = _NOT_INTERPOLABLE.get(suffix, (f"suffix {suffix!r}", "not a BOLD-type time "
                                               "series (bold, cbv, phase)"))
    return f"not corrected: {what}: {why}"


def not_bold_series(kind: str | None) -> str | None:
    """What a series of ``kind`` (:func:`series_kind`, or a BIDS suffix) is when it is
    not a BOLD-type series (``a diffusion series``), or None: ``verify`` leaves such a
    series undecided in these words, as ``correct`` refuses it (:func:`suffix_refusal`)."""
    if kind is None or kind in BOLD_TYPE_SUFFIXES:
        return None
    return _NOT_INTERPOLABLE.get(kind, (f"a {kind} series, not a BOLD-type one", ""))[0]


def too_few_volumes(n_volumes: int) -> str | None:
    """Why a run of ``n_volumes`` is too short to correct, or None: the one owner of
    :data:`MIN_VOLUMES` and of its message (``correct/too-few-volumes``)."""
    if n_volumes >= MIN_VOLUMES:
        return None
    return (f"the run has {_volumes(n_volumes)}; correction needs at least {MIN_VOLUMES} (the "
            "error near a run's ends is too large below that, so it is refused even with "
            "--force; slicetime explain correct/too-few-volumes)")


def _volumes(count: int) -> str:
    return f"{count} volume" if count == 1 else f"{count} volumes"


def too_few_volumes_of(header: HeaderInfo | None) -> str | None:
    """:func:`too_few_volumes` of an image's header: its volume count
    (``HeaderInfo.n_volumes``) when it is a 4-D series (``HeaderInfo.is_four_d``: 4-D,
    or more dimensions all of extent 1 past the fourth); a 3-D image is one volume
    (said so). None for a header not read and for more dimensions than a time series
    has (:func:`shape_refusal`). The one reading of the count that ``correct`` and the
    API's gate share."""
    if header is None:
        return None
    if len(header.shape) < 4:
        return (f"the image is {len(header.shape)}-D {list(header.shape)} (dim), a single "
                f"volume; correction needs a time series of at least {MIN_VOLUMES} volumes, "
                "so it is refused even with --force (slicetime explain correct/too-few-volumes)")
    if not header.is_four_d:
        return None
    return too_few_volumes(header.n_volumes)


def shape_refusal(header: HeaderInfo | None) -> str | None:
    """Why an image with more dimensions than one time series has (``dim[0]`` above 4
    with an extent past the fourth above 1: echoes, components or several series
    stacked) may not be interpolated along its fourth axis, or None: the one owner of
    that judgement (``correct/not-interpolable``, refused even with --force)."""
    if header is None or len(header.shape) < 4 or header.is_four_d:
        return None
    return (f"not corrected: the image has {len(header.shape)} dimensions "
            f"{list(header.shape)} (dim), not one 4-D time series, so its fourth axis "
            "cannot be interpolated even with --force")


def timing_doubts(findings: Iterable[Finding]) -> list[Finding]:
    """The findings that put the run's slice times in doubt: of a code registered with
    ``timing_in_doubt``, at warning level or above. The one owner of "does this run's
    timing stand in doubt" (``correct`` reads it; ``slicetime explain`` says it)."""
    return [f for f in findings
            if f.severity.rank >= Severity.WARNING.rank and doubts_timing(f.code)]


#: the fields a doubt about the timing is about: no repair changes them while it stands
DOUBTED_FIELDS = frozenset({"SliceTiming", "SliceEncodingDirection",
                            "MultibandAccelerationFactor"})


def undecided_doubt(findings: Iterable[Finding], repaired: Iterable[str] = ()) -> Finding | None:
    """The doubt (:func:`timing_doubts`) that ``fix`` may not settle by taking a side,
    or None: the one owner of "may a repair change this run's timing". A doubt raised
    by the run's source series (a rule ``checked="source"``) is settled by the
    scanner's own record, and so is every doubt of a run that a repair rebuilds from it
    (``repaired``: the codes of the run's repairs); any other doubt sets two sources
    against each other, and a person must decide which is right."""
    if any(_from_source(code) for code in repaired):
        return None
    return next((f for f in timing_doubts(findings) if not _from_source(f.code)), None)


def _from_source(code: str) -> bool:
    rule = RULES.get(code)
    return rule is not None and rule.checked == "source"


def undecided_reason(finding: Finding) -> str:
    """Why no repair touches the run's timing while ``finding`` stands (fix's "not planned")."""
    return f"the timing is in doubt ({finding.code}): a person must decide which source is right"


def doubts_timing(code: str) -> bool:
    rule = RULES.get(code)
    return rule is not None and rule.timing_in_doubt


@dataclass(frozen=True)
class TrustVerdict:
    """The doubts of one run: those still standing, and those accepted (with by whom)."""

    standing: tuple[Finding, ...] = ()
    accepted: tuple[tuple[Finding, AcceptEntry], ...] = ()


def judge_trust(path: str, findings: Iterable[Finding],
                accepts: Sequence[AcceptEntry]) -> TrustVerdict:
    """Split the run's doubts (:func:`timing_doubts`) into those an entry of ``accepts``
    covers for this run (``path``: relative to its dataset root) and the others."""
    standing: list[Finding] = []
    accepted: list[tuple[Finding, AcceptEntry]] = []
    for finding in timing_doubts(findings):
        entry = next((a for a in accepts if a.covers(path, finding.code)), None)
        if entry is None:
            standing.append(finding)
        else:
            accepted.append((finding, entry))
    return TrustVerdict(tuple(standing), tuple(accepted))


def doubt_refusal(verdict: TrustVerdict, path: str,
                  how: Callable[[list[str]], str]) -> str | None:
    """Why a run whose doubts (:func:`judge_trust`) still stand is refused, naming each
    doubt and how to accept it, or None when none stands: the one owner of that message
    (``correct/timing-in-doubt``). ``how`` puts the acceptances (``CODE:PATH``, the run
    ``path`` relative to its dataset root) in the caller's words: ``--accept ...`` on
    the command line, ``accept=[...]`` in the Python API."""
    if not verdict.standing:
        return None
    specs = [f"{code}:{path}" for code in sorted({f.code for f in verdict.standing})]
    return (f"its slice times are in doubt ({'; '.join(f.message for f in verdict.standing)}); "
            f"resolve it (slicetime show), or if you know the run's own timing is right, "
            f"accept it: {how(specs)}")


def accept_problem(code: str) -> str | None:
    """Why ``code`` cannot be accepted (it must name one code that doubts timing)."""
    if code not in RULES:
        return f"{code!r} is not a finding code (slicetime explain lists them)"
    if not doubts_timing(code):
        doubting = ", ".join(sorted(c for c in RULES if doubts_timing(c)))
        return (f"{code} does not put the timing in doubt, so there is nothing to accept "
                f"(--force is for errors); the codes that do: {doubting}")
    return None


def parse_accept(text: str) -> AcceptEntry:
    """``CODE`` or ``CODE:PATTERN`` (a run path pattern, as in the lab policy) as an
    :class:`AcceptEntry`; :class:`ValueError` with a one-line reason otherwise."""
    code, colon, pattern = text.strip().partition(":")
    problem = accept_problem(code)
    if problem is None and colon:
        why = path_pattern_problem(pattern)
        problem = f"path pattern {pattern!r} {why}" if why else None
    if problem is not None:
        raise ValueError(problem)
    return AcceptEntry(index=-1, codes=(code,), reason="accepted on the command line",
                       paths=(pattern,) if colon else ("**",), given=f"--accept {text.strip()}")
