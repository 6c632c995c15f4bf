"""The validation study's headline numbers, on reduced versions of its studies."""

from __future__ import annotations

import numpy as np
import pytest

from slicetime.pipelines.simulate import double_gamma
from validation.study import accuracy, generated_protocols, glm_effect, inference


def test_the_response_shape_is_the_canonical_double_gamma() -> None:
    # nilearn's "glover" model is the reference implementation of the shape of
    # Glover 1999 (NeuroImage 9:416-429); nilearn samples it with a small offset
    from nilearn.glm.first_level.hemodynamic_models import glover_hrf

    step = 0.1
    reference = glover_hrf(step, oversampling=1, time_length=32.0)
    ours = double_gamma(np.arange(reference.size) * step)
    assert np.corrcoef(reference, ours)[0, 1] > 0.99
    assert abs(np.argmax(ours) - np.argmax(reference)) * step <= 0.2  # peak near 5 s


def test_correction_accuracy_at_short_and_long_tr() -> None:
    rows = accuracy([0.7, 2.0], [24], ["interleaved", "multiband3"], volumes=160)
    by = {(r.tr, r.scheme, r.method): r for r in rows}
    for scheme in ("interleaved", "multiband3"):
        # Whittaker-Shannon (textbook): at TR 0.7 s the response is nearly band-limited,
        # so the band-limited methods recover it almost exactly
        assert by[(0.7, scheme, "fourier")].interior < 0.02
        assert by[(0.7, scheme, "sinc")].interior < 0.02
        for tr in (0.7, 2.0):
            errors = {m: by[(tr, scheme, m)].interior for m in ("fourier", "sinc", "cubic",
                                                                "linear")}
            # every method beats doing nothing; linear is the worst (common practice,
            # no source: linear interpolation low-passes the signal)
            assert max(errors.values()) < 1.0
            assert errors["linear"] == max(errors.values())


def test_glm_bias_grows_with_tr_and_correction_removes_it() -> None:
    # Sladky et al. 2011 (NeuroImage 58:588-594): slice-timing effects grow with TR
    # and correction recovers the late slices' estimates and sensitivity
    rows = glm_effect([1.0, 3.0])
    raw = {r.tr: r for r in rows if not r.corrected}
    fixed = {r.tr: r for r in rows if r.corrected}
    assert abs(raw[3.0].late_bias) > abs(raw[1.0].late_bias)
    for tr in (1.0, 3.0):
        assert abs(fixed[tr].late_bias) < abs(raw[tr].late_bias) / 3
        assert fixed[tr].late_t > raw[tr].late_t
    assert abs(fixed[3.0].late_bias) < 0.1


@pytest.mark.parametrize("rounding", ["exact", "1 ms", "2.5 ms"])
def test_scheme_inference_recovers_generated_protocols(rounding: str) -> None:
    # common practice (no source): converters round slice times to 1 ms or 2.5 ms;
    # inference must still return the generating protocol's groups and factor
    protocols = generated_protocols(limit=400)
    row = next(r for r in inference(protocols) if r.rounding == rounding)
    assert row.protocols >= 390
    assert row.accuracy == 1.0
