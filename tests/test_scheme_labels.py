"""Scheme labels are written and read in one module (schemes/labels.py): the
label of every scheme inference can produce reads back to the same parts, and
every label reads back to itself (round trips over generated schemes)."""

from __future__ import annotations

from hypothesis import given
from hypothesis import strategies as st

from slicetime.schemes.generate import Protocol, slice_timing
from slicetime.schemes.infer import infer_scheme
from slicetime.schemes.labels import (
    SPECIAL_LABELS,
    LabelParts,
    format_label,
    label_multiband,
    label_problem,
    parse_label,
    scheme_family,
)


@st.composite
def label_parts(draw: st.DrawFn) -> LabelParts:
    step = draw(st.integers(1, 9))
    ascending = draw(st.booleans())
    multiband = draw(st.integers(1, 8))
    if step == 1:
        return LabelParts(1, ascending, None, None, multiband)
    if step >= 3 and draw(st.booleans()):
        residues = tuple(draw(st.permutations(range(step))))
        return LabelParts(step, ascending, None, residues, multiband)
    return LabelParts(step, ascending, draw(st.integers(0, 200)), None, multiband)


@given(label_parts())
def test_parse_reads_back_what_format_writes(parts: LabelParts) -> None:
    label = format_label(parts)
    parsed = parse_label(label)
    assert parsed == parts
    assert isinstance(parsed, LabelParts) and format_label(parsed) == label
    assert label_problem(label) is None
    # "ascending" and "descending" are also the names of families (any multiband)
    expected = None if scheme_family(label) is not None else parts.multiband
    assert label_multiband(label) == expected


@given(
    n_slices=st.integers(3, 64),
    order=st.sampled_from(["sequential", "interleaved"]),
    ascending=st.booleans(),
    multiband=st.sampled_from([1, 2, 3, 4]),
)
def test_every_inferred_label_round_trips(
    n_slices: int, order: str, ascending: bool, multiband: int
) -> None:
    groups = max(3, n_slices // multiband)  # interleaving needs 3 excitation groups
    n_slices = groups * multiband
    times = slice_timing(Protocol(n_slices=n_slices, order=order, ascending=ascending,
                                  multiband=multiband, repetition_time=2.0))
    scheme = infer_scheme(times)
    parsed = parse_label(scheme.label)
    assert parsed is not None, scheme.label
    assert format_label(parsed) == scheme.label if isinstance(parsed, LabelParts) else (
        parsed == scheme.label)
    if isinstance(parsed, LabelParts):
        # the parts agree with what inference found
        assert parsed.multiband == scheme.multiband_factor
        assert parsed.ascending == scheme.ascending
        assert parsed.step == scheme.step


@given(st.text(alphabet="abcdefghilmnoprstuvx×0123456789 ,", max_size=40))
def test_any_text_that_parses_prints_back_unchanged(text: str) -> None:
    parsed = parse_label(text)
    if isinstance(parsed, LabelParts):
        assert format_label(parsed) == text
    elif parsed is not None:
        assert parsed in SPECIAL_LABELS


def test_labels_slicetime_never_prints_are_refused_with_a_reason() -> None:
    # a step-2 order is printed without "step 2", and multiband ×1 is never printed
    assert parse_label("interleaved step 2 ascending from 0") is None
    assert "step 2" in (label_problem("interleaved step 2 ascending from 0") or "")
    assert parse_label("multiband ×1, ascending") is None
    assert "multiband ×1" in (label_problem("multiband ×1, ascending") or "")
    assert parse_label("interleaved ascending from 01") is None
    assert scheme_family("interleaved descending") is not None
    assert parse_label("interleaved descending") is None
