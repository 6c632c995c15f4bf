"""Documentation of the codes that ``slicetime verify`` (and ``audit --verify``) raises.

The check reads image data, so it lives in :mod:`slicetime.pipelines.verify`
(scoring in :mod:`slicetime.engines.verify`); these entries make ``slicetime
explain`` and the report schema cover its codes.
"""

from __future__ import annotations

from slicetime.model import Severity
from slicetime.rules.registry import reader_code

_HOW = (
    "A signal shared by the slices (global fluctuations, a widespread response, abrupt "
    "events, respiration, cardiac pulsation) reaches every slice delayed by that slice's "
    "acquisition time. verify aligns the slices' mean time courses with the claimed "
    "schedule and with plausible alternatives (sequential and interleaved orders, multiband "
    "variants, the claim flipped or reversed, no offsets; each named by its scheme label) "
    "frequency by frequency, allowing "
    "for aliasing (a component seen at f may truly lie at f + k/TR, up to 1.6 Hz), and "
    "compares how coherent they become. Every frequency bin counts by its coherence, not "
    "its power, so a narrow-band peak cannot carry the verdict; a block bootstrap over "
    "frequency bins and orders made by shuffling the claimed times calibrate the "
    "differences, and two halves of the image are scored independently. Both ends of every "
    "course are tapered first (a delay is a circular shift of a finite course's transform, "
    "so an untapered drift or slow wander would favour 'no offsets'), and abrupt level "
    "steps, which no schedule can align once sampled, are taken out of every course alike. "
    "A constant offset added to every slice time cannot be seen in the data. "
)

reader_code(
    "verify/contradicted",
    timing_in_doubt=True,
    checked="data",
    title="the image data fit another slice order clearly better than the claimed one",
    severity=Severity.WARNING,
    rationale=_HOW + (
        "A named alternative aligns the slices better than the claim by a clear margin, "
        "spread over the spectrum and in both halves of the image (evidence: effect, the "
        "share of the timing evidence the claim loses; z_rival, the bootstrap z of the "
        "difference, and its 95 % interval; z_regions, the z in each half; z_signs, the z "
        "when every slice may carry its own sign of the shared signal, which must agree, so "
        "physiology of opposite signs in different slices cannot cause this). The message names "
        "the order to adopt by its scheme label; evidence.best_slice_times holds its slice "
        "times (the sidecar's order, seconds). When the better fit is no offsets, the message "
        "says the data look already slice-time corrected. Anything that delays the signal "
        "differently from slice to slice can also cause this, e.g. strong regional latency "
        "differences or slice-wise motion."
    ),
    fix="Check the slice order against the protocol or the scanner export before correcting; "
        "the order named in the message fits the data better (its times: "
        "evidence.best_slice_times).",
)
reader_code(
    "verify/supported",
    checked="data",
    title="the image data support the claimed slice order",
    severity=Severity.NOTE,
    rationale=_HOW + (
        "The claim aligns the slices clearly better than shuffled orders and better than "
        "every materially different alternative (bootstrap z of at least 2 over the best "
        "of them). Alternatives nearly identical in time to the claim cannot be told apart "
        "and are listed as equivalent."
    ),
)
reader_code(
    "verify/consistent",
    title="the image data fit the claimed slice order but do not single it out",
    severity=Severity.NOTE,
    rationale=_HOW + (
        "The claim aligns the slices clearly better than shuffled orders and no alternative "
        "beats it, but the alternative named in the message fits about as well, so the "
        "data cannot tell the two apart (typical of schedules close in time, short runs "
        "or short TRs). Weaker than verify/supported; not a problem."
    ),
)
reader_code(
    "verify/undecidable",
    checked="data",
    title="the image data cannot tell whether the claimed slice order is right",
    severity=Severity.NOTE,
    rationale=_HOW + (
        "No verdict: the shared signal is too weak or too slow for slice delays to matter "
        "(e.g. noise-dominated data, short runs), the evidence points both ways (across "
        "frequencies or between the two halves of the image, as physiology can make it), or "
        "the order named differs from the claim too little in time to be told apart, or the run "
        "cannot be checked (no schedule, VolumeTiming, fewer "
        "than 30 volumes or 3 slices, slice times outside the acquisition window)."
    ),
    fix="Nothing to repair; longer runs or runs with more shared signal give more evidence.",
)
