"""``correct --omit-leading N`` restates the run's events table beside the output (a
follow-up of issue 25, item 4).

The rule is the BIDS specification's, read from the test-only ``bidsschematools``
(the schema's text of the ``onset`` column and of ``NumberOfVolumesDiscardedByUser``):
onsets count from the first volume *stored* in the file, whatever was discarded before
it, and negative onsets are allowed for events before that volume. So the output's
onsets are the input's less N x RepetitionTime (exactly, in decimal), and an event that
now falls before the first volume is kept with a negative onset. pybids reads the
derivative and finds the table as the one that applies to the output image.
"""

from __future__ import annotations

import json
import warnings
from decimal import Decimal
from pathlib import Path

import jsonschema
import pytest
from click.testing import CliRunner

from slicetime.interfaces.cli import cli
from slicetime.readers.events import EVENTS_ENTITIES, events_name, shift_onsets
from slicetime.readers.shipped_schemas import load_schema
from tests.helpers_bids import symlink, write_description
from tests.test_correct import TR, build_run, interleaved, output_of

REL = "sub-01/func/sub-01_task-hum_bold.nii.gz"
EVENTS = "sub-01/func/sub-01_task-hum_events.tsv"
OUT_EVENTS = "sub-01/func/sub-01_task-hum_desc-timealigned_events.tsv"
TABLE = ("onset\tduration\ttrial_type\n"
         "1.0\t2.0\tcue\n"
         "10.3\t2.0\ttarget\n"
         "n/a\t1.5\tlost\n"
         "30\t2.0\tcue\n")


def run(*args: object) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, [str(a) for a in args])
    return result.exit_code, result.stdout, result.stderr


def _rows(text: str) -> list[list[str]]:
    return [line.split("\t") for line in text.splitlines()]


@pytest.fixture()
def ds(tmp_path: Path) -> Path:
    root = tmp_path / "ds"
    write_description(root)
    build_run(root, REL, interleaved(8))
    return root


def test_the_bids_rule_for_onsets_after_discarded_volumes() -> None:
    from bidsschematools import schema

    bids = schema.load_schema()
    onset = " ".join(bids.objects.columns.onset.description.split())
    discarded = " ".join(bids.objects.metadata.NumberOfVolumesDiscardedByUser.description.split())
    assert "Negative onsets are allowed" in onset
    assert "a time of 0 corresponds to the first stored data point" in onset
    assert "independent of the value of" in discarded
    # the entities an MRI events file may carry (rules.files.raw.events.events__mri)
    rule = bids.rules.files.raw.events.events__mri
    short = {name: bids.objects.entities[name].name for name in rule.entities}
    assert set(EVENTS_ENTITIES) == set(short.values())


def test_omit_leading_writes_the_events_with_onsets_from_the_first_volume_kept(
        ds: Path, tmp_path: Path) -> None:
    (ds / EVENTS).write_text(TABLE)
    out = tmp_path / "out"
    code, text, err = run("correct", ds, "--out", out, "--omit-leading", 4)
    assert code == 0, err
    assert "events tables restated beside 1 output" in text
    written = (out / OUT_EVENTS).read_text()
    shift = 4 * Decimal(repr(TR))  # BIDS: onsets from the first volume stored
    before, after = _rows(TABLE), _rows(written)
    assert after[0] == before[0] and len(after) == len(before)
    for old, new in zip(before[1:], after[1:], strict=True):
        assert new[1:] == old[1:]  # duration and trial_type untouched
        if old[0] == "n/a":
            assert new[0] == "n/a"
        else:
            assert Decimal(new[0]) == Decimal(old[0]) - shift  # exactly, no float residue
    # the cue at 1 s was before the fifth volume: kept, with a negative onset (BIDS)
    assert after[1][0] == "-7.0"
    # pybids (the reference BIDS reader) finds it as the table of the output image
    from bids import BIDSLayout

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        layout = BIDSLayout(out, validate=False, is_derivative=True)
        image = str(output_of(out, REL))
        found = layout.get_nearest(image, suffix="events", extension=".tsv", all_=True,
                                   strict=False)
        assert found == [str(out / OUT_EVENTS)]
        table = layout.get_file(found[0]).get_entities()
        bold = layout.get_file(image).get_entities()
        assert {k: v for k, v in table.items() if k not in ("suffix", "extension")}.items() \
            <= bold.items()
    # recorded in the output's provenance and the provenance file, which its schema admits
    sidecar = json.loads(output_of(out, REL).with_name(
        "sub-01_task-hum_desc-timealigned_bold.json").read_text())
    record = sidecar["SliceTimeAlignment"]
    assert record["Events"] == {"Source": EVENTS, "Output": OUT_EVENTS,
                                "OnsetShift": float(shift), "Events": 3,
                                "BeforeFirstVolume": 1}
    assert record["Inputs"]["Events"]["Path"] == EVENTS
    provenance = json.loads((out / "slicetime-provenance.json").read_text())
    jsonschema.validate(provenance, load_schema("provenance"))
    assert next(iter(provenance["Runs"].values()))["Events"] == record["Events"]


def test_the_events_follow_the_output_as_it_is_remade_or_withdrawn(ds: Path,
                                                                    tmp_path: Path) -> None:
    (ds / EVENTS).write_text(TABLE)
    out = tmp_path / "out"
    assert run("correct", ds, "--out", out, "--omit-leading", 4)[0] == 0
    # a changed table makes the output out of date: it is remade with the new onsets
    (ds / EVENTS).write_text(TABLE.replace("10.3", "12.3"))
    code, text, _ = run("correct", ds, "--out", out, "--omit-leading", 4)
    assert code == 0 and text.startswith("corrected")
    assert "4.3\t2.0\ttarget" in (out / OUT_EVENTS).read_text()
    # without leading volumes left out the input's table holds: the restated one goes
    assert run("correct", ds, "--out", out)[0] == 0
    assert not (out / OUT_EVENTS).exists()
    assert run("correct", ds, "--out", out, "--omit-leading", 2)[0] == 0
    assert (out / OUT_EVENTS).exists()
    # a run refused now loses its earlier output, and the table beside it
    sidecar = ds / REL.replace(".nii.gz", ".json")
    content = json.loads(sidecar.read_text())
    del content["SliceTiming"]
    sidecar.write_text(json.dumps(content))
    assert run("correct", ds, "--out", out, "--omit-leading", 2)[0] == 1
    assert not (out / OUT_EVENTS).exists()


def test_a_rerun_that_reuses_the_output_leaves_its_events_table_alone(
        ds: Path, tmp_path: Path) -> None:
    # an up-to-date output is reused: its restated table, already right, is neither
    # rewritten nor replaced (same inode, same modification time, os.stat); one changed
    # or removed since is put back
    (ds / EVENTS).write_text(TABLE)
    out = tmp_path / "out"
    assert run("correct", ds, "--out", out, "--omit-leading", 4)[0] == 0
    table = out / OUT_EVENTS
    right = table.read_bytes()
    before = table.stat()
    code, text, _ = run("correct", ds, "--out", out, "--omit-leading", 4)
    assert code == 0 and "up-to-date" in text
    after = table.stat()
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)
    table.write_bytes(right + b"extra\t1\tx\n")
    assert run("correct", ds, "--out", out, "--omit-leading", 4)[0] == 0
    assert table.read_bytes() == right
    table.unlink()
    assert run("correct", ds, "--out", out, "--omit-leading", 4)[0] == 0
    assert table.read_bytes() == right


def test_with_volume_timing_the_shift_is_the_time_of_the_first_volume_kept(
        tmp_path: Path) -> None:
    # BIDS VolumeTiming: the onset of each volume; the output's first volume is the
    # input's fourth, so its events move by VolumeTiming[3] - VolumeTiming[0] (6.5 s here)
    from tests.test_correct_outputs import _volume_timing

    ds = tmp_path / "ds"
    write_description(ds)
    _volume_timing(ds)
    (ds / EVENTS).write_text(TABLE)
    out = tmp_path / "out"
    code, _, err = run("correct", ds, "--out", out, "--method", "cubic", "--omit-leading", 3)
    assert code == 0, err
    sidecar = json.loads(output_of(out, REL).with_name(
        "sub-01_task-hum_desc-timealigned_bold.json").read_text())
    volumes = json.loads((ds / REL.replace(".nii.gz", ".json")).read_text())["VolumeTiming"]
    shift = Decimal(repr(volumes[3])) - Decimal(repr(volumes[0]))
    assert shift == Decimal("6.5")
    assert sidecar["SliceTimeAlignment"]["Events"]["OnsetShift"] == float(shift)
    onsets = [row[0] for row in _rows((out / OUT_EVENTS).read_text())[1:]]
    assert onsets == ["-5.5", "3.8", "n/a", "23.5"]


def test_an_inherited_table_is_restated_for_each_run(ds: Path, tmp_path: Path) -> None:
    # BIDS inheritance principle: a top-level task-hum_events.tsv applies to every run
    build_run(ds, REL.replace("01", "02"), interleaved(8))
    (ds / "task-hum_events.tsv").write_text(TABLE)
    out = tmp_path / "out"
    assert run("correct", ds, "--out", out, "--omit-leading", 1)[0] == 0
    for sub in ("01", "02"):
        written = (out / OUT_EVENTS.replace("01", sub)).read_text()
        assert _rows(written)[1][0] == str(Decimal("1.0") - Decimal(repr(TR)))


@pytest.mark.parametrize(("content", "why"), [
    ("onset\tduration\nsoon\t1\n", "'soon' is not a number"),
    ("duration\ttrial_type\n1\tcue\n", "no onset column"),
])
def test_a_table_that_cannot_be_restated_is_a_warning_not_a_wrong_file(
        ds: Path, tmp_path: Path, content: str, why: str) -> None:
    (ds / EVENTS).write_text(content)
    out = tmp_path / "out"
    code, text, _ = run("correct", ds, "--out", out, "--omit-leading", 2)
    assert code == 0  # the run is corrected; the warning says the onsets were not moved
    assert why in text and "not restated" in text
    assert not (out / OUT_EVENTS).exists()


def test_two_tables_at_one_level_are_ambiguous(ds: Path, tmp_path: Path) -> None:
    # BIDS inheritance principle: no more than one applicable file per folder level
    (ds / EVENTS).write_text(TABLE)
    (ds / "sub-01/func/sub-01_events.tsv").write_text(TABLE)  # applies too (a subset)
    out = tmp_path / "out"
    code, text, _ = run("correct", ds, "--out", out, "--omit-leading", 2)
    assert code == 0 and "two events tables apply at one level" in text
    assert not (out / OUT_EVENTS).exists()


def test_a_table_linked_from_outside_the_dataset_is_not_read(ds: Path, tmp_path: Path) -> None:
    outside = tmp_path / "elsewhere.tsv"
    outside.write_text(TABLE)
    symlink(ds / EVENTS, outside)
    out = tmp_path / "out"
    code, text, _ = run("correct", ds, "--out", out, "--omit-leading", 2)
    assert code == 0 and "outside the dataset" in text
    assert not (out / OUT_EVENTS).exists()


def test_shift_onsets_keeps_every_other_byte() -> None:
    text = "onset\tduration\r\n2.50\t1\r\n\r\n-1\tn/a\r\n"
    shifted = shift_onsets(text, Decimal("1.5"), "x_events.tsv")
    assert shifted.text == "onset\tduration\r\n1.0\t1\r\n\r\n-2.5\tn/a\r\n"
    assert (shifted.events, shifted.before_first) == (2, 1)


def test_the_table_name_keeps_the_entities_an_events_file_may_carry() -> None:
    # echo and part are not events entities (BIDS schema): echoes share one table
    assert events_name("sub-01_ses-2_task-hum_acq-fast_run-1_echo-2_part-mag_desc-a_bold.nii.gz") \
        == "sub-01_ses-2_task-hum_acq-fast_run-1_desc-a_events.tsv"
