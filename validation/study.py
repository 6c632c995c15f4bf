"""The validation study: correction accuracy, downstream GLM effect, scheme inference.

Each function returns plain numbers (and is small enough for the tests to run
a reduced version); ``validation/make_report.py`` runs the full study, draws
the figures and writes ``docs/validation.md``.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from slicetime import correct_array
from slicetime.pipelines.simulate import RunSimulation, simulate_run, truth_at
from slicetime.schemes.generate import Protocol, array_groups, array_times, validate_protocol
from slicetime.schemes.infer import infer_scheme

METHODS = ("fourier", "sinc", "cubic", "linear")


def protocol_times(n_slices: int, tr: float, scheme: str) -> list[float]:
    """Array-order slice times for the study's named schemes."""
    if scheme == "sequential":
        p = Protocol(n_slices=n_slices, order="sequential", repetition_time=tr)
    elif scheme == "interleaved":
        p = Protocol(n_slices=n_slices, order="interleaved", start="auto", repetition_time=tr)
    elif scheme.startswith("multiband"):
        factor = int(scheme.removeprefix("multiband"))
        p = Protocol(n_slices=n_slices, order="interleaved", multiband=factor, start="auto",
                     repetition_time=tr)
    else:
        raise ValueError(scheme)
    return list(array_times(p))


@dataclass(frozen=True)
class AccuracyRow:
    tr: float
    n_slices: int
    scheme: str
    method: str
    interior: float  # mean |corrected - truth| / mean |uncorrected - truth|, interior
    edge: float  # the same over the first and last 10 % of volumes


def accuracy(trs: Iterable[float], slice_counts: Iterable[int], schemes: Iterable[str],
             *, volumes: int = 200, plane: int = 4, seed: int = 1) -> list[AccuracyRow]:
    """Correction error against the noiseless truth, per method and protocol."""
    rows: list[AccuracyRow] = []
    for tr, n, scheme in itertools.product(trs, slice_counts, schemes):
        if scheme.startswith("multiband") and n % int(scheme.removeprefix("multiband")):
            continue
        times = protocol_times(n, tr, scheme)
        reference = (min(times) + max(times)) / 2
        sim = RunSimulation(shape=(plane, plane, n, volumes), repetition_time=tr,
                            slice_times=times, amplitude=20.0, drift=5.0, seed=seed)
        data, onsets, phases = simulate_run(sim)
        truth = truth_at(sim, onsets, phases, reference)  # (i, j, k, t)
        edge = max(2, volumes // 10)
        inner = slice(edge, volumes - edge)
        outer = np.r_[0:edge, volumes - edge:volumes]
        base = np.abs(data.astype(np.float64) - truth)
        for method in METHODS:
            err = np.abs(correct_array(data, times, tr, method=method, reference=reference) - truth)
            rows.append(AccuracyRow(
                tr, n, scheme, method,
                float(err[..., inner].mean() / base[..., inner].mean()),
                float(err[..., outer].mean() / base[..., outer].mean()),
            ))
    return rows


@dataclass(frozen=True)
class GlmRow:
    tr: float
    corrected: bool
    early_bias: float  # (beta - truth) / truth, mean of the earliest slices
    late_bias: float
    early_t: float
    late_t: float


def glm_effect(trs: Iterable[float], *, n_slices: int = 9, volumes: int = 180, seed: int = 7,
               noise: float = 4.0) -> list[GlmRow]:
    """Effect estimates and t statistics of early and late slices, with and without
    correction, from nilearn's first-level GLM (test-only consumer, optional here)."""
    import nibabel as nib
    import pandas as pd
    from nilearn.glm.first_level import FirstLevelModel
    from nilearn.maskers import NiftiMasker

    rows: list[GlmRow] = []
    for tr in trs:
        times = protocol_times(n_slices, tr, "interleaved")
        reference = (min(times) + max(times)) / 2
        sim = RunSimulation(shape=(4, 4, n_slices, volumes), repetition_time=tr,
                            slice_times=times, amplitude=20.0, drift=0.0, noise=noise,
                            seed=seed)
        data, onsets, _ = simulate_run(sim)
        events = pd.DataFrame({"onset": onsets, "duration": np.full(len(onsets), 1.0),
                               "trial_type": "task"})
        corrected = correct_array(data, times, tr, method="fourier", reference=reference)
        order = np.argsort(times, kind="stable")
        early, late = order[:2], order[-2:]
        mask = nib.Nifti1Image(np.ones(data.shape[:3], dtype=np.uint8), np.eye(4))
        # the true effect size: the regressor built by nilearn has peak ~1 per unit
        # amplitude of our double-gamma response (both are the canonical shape)
        for is_corrected, values in ((False, data), (True, corrected)):
            model = FirstLevelModel(t_r=tr, slice_time_ref=reference / tr, hrf_model="glover",
                                    drift_model="cosine", mask_img=NiftiMasker(mask).fit(),
                                    signal_scaling=False, noise_model="ols",
                                    minimize_memory=True)
            model.fit(nib.Nifti1Image(values, np.eye(4)), events=events)
            beta = model.compute_contrast("task", output_type="effect_size").get_fdata()
            stat = model.compute_contrast("task", output_type="stat").get_fdata()
            per_slice = beta.mean(axis=(0, 1))
            t_slice = stat.mean(axis=(0, 1))
            truth = _true_beta(sim, onsets, model)
            rows.append(GlmRow(
                tr, is_corrected,
                float(np.mean(per_slice[early] - truth) / truth),
                float(np.mean(per_slice[late] - truth) / truth),
                float(np.mean(t_slice[early])), float(np.mean(t_slice[late])),
            ))
    return rows


def _true_beta(sim: RunSimulation, onsets: Sequence[float], model: object) -> float:
    """The effect size a perfectly timed voxel gives: regress the noiseless response at
    the model's frame times on the model's own task regressor."""
    design = model.design_matrices_[0]  # type: ignore[attr-defined]
    frame_times = design.index.to_numpy()
    from slicetime.pipelines.simulate import response

    signal = sim.amplitude * response(frame_times, onsets, sim.event_duration)
    x = design.to_numpy()
    coef, *_ = np.linalg.lstsq(x, signal, rcond=None)
    return float(coef[list(design.columns).index("task")])


@dataclass(frozen=True)
class InferenceRow:
    rounding: str
    protocols: int
    correct: int

    @property
    def accuracy(self) -> float:
        return self.correct / self.protocols if self.protocols else math.nan


def generated_protocols(limit: int | None = None, seed: int = 3) -> list[Protocol]:
    """Valid protocols over slice counts, orders, steps, starts, multiband and TRs."""
    rng = np.random.default_rng(seed)
    out: list[Protocol] = []
    for n in range(8, 73, 4):
        for multiband in (1, 2, 3, 4):
            if n % multiband:
                continue
            groups = n // multiband
            for order, ascending in itertools.product(("sequential", "interleaved"),
                                                      (True, False)):
                steps = (1,) if order == "sequential" else tuple(
                    s for s in (2, 3, 4) if s < groups)
                for step in steps:
                    starts = [None] if order == "sequential" else (
                        list(range(step)) if ascending else list(range(groups - step, groups)))
                    for start in starts:
                        tr = float(rng.choice([0.5, 0.7, 0.8, 1.0, 1.5, 2.0, 2.5, 3.0]))
                        p = Protocol(n_slices=n, order=order, ascending=ascending,
                                     step=max(step, 2), start=start, multiband=multiband,
                                     repetition_time=tr)
                        try:
                            validate_protocol(p)
                        except ValueError:
                            continue
                        out.append(p)
    if limit is not None and len(out) > limit:
        picks = rng.choice(len(out), size=limit, replace=False)
        out = [out[i] for i in sorted(picks)]
    return out


def _round(times: Sequence[float], step: float | None) -> list[float]:
    if step is None:
        return list(times)
    return [round(round(t / step) * step, 6) for t in times]


def inference(protocols: Sequence[Protocol],
              roundings: Sequence[tuple[str, float | None]] = (
                  ("exact", None), ("1 ms", 0.001), ("2.5 ms", 0.0025))) -> list[InferenceRow]:
    """How often inference recovers the generating protocol's excitation groups (in
    acquisition order) and multiband factor, after rounding the times."""
    rows = []
    for name, step in roundings:
        correct = 0
        usable = 0
        for p in protocols:
            spacing = p.window / p.n_groups
            if step is not None and spacing < 3 * step:
                continue  # groups closer than the rounding cannot be told apart
            usable += 1
            scheme = infer_scheme(_round(array_times(p), step))
            expected = tuple(tuple(sorted(g)) for g in array_groups(p))
            if scheme.groups == expected and scheme.multiband_factor == p.multiband:
                correct += 1
        rows.append(InferenceRow(name, usable, correct))
    return rows


__all__ = ["METHODS", "AccuracyRow", "GlmRow", "InferenceRow", "accuracy",
           "generated_protocols", "glm_effect", "inference", "protocol_times"]
