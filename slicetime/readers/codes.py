"""The registration of every code the readers raise while opening files.

The checks themselves live in :mod:`slicetime.readers` (they need the bytes), and
every reader that makes a finding imports this module, so its codes are in the
catalogue (:mod:`slicetime.codes`) before :func:`~slicetime.codes.make_finding`
is called; ``slicetime explain`` and the report schema cover them too.
"""

from __future__ import annotations

from slicetime.codes import declare as reader_code
from slicetime.model import Severity

E, W, N = Severity.ERROR, Severity.WARNING, Severity.NOTE

reader_code(
    "file/missing",
    title="the file does not exist or is a broken link",
    severity=E,
    rationale="A run named on the command line, or a link in the dataset, points nowhere.",
    fix="Check the path; restore the file or remove the dangling link.",
)
reader_code(
    "file/no-content",
    title="the file is a link into an annex object store whose content is not here",
    severity=E,
    rationale=(
        "Datasets managed with a large-file annex keep images as symbolic links into an "
        "object store. When the content has not been retrieved the link points at a missing "
        "object: the run exists in the dataset but cannot be read on this machine."
    ),
    fix="Retrieve the content with your annex tool's get command, then audit again.",
)
reader_code(
    "file/not-retrieved",
    title="the run's image content is not retrieved; it was audited from its sidecars only",
    severity=W,
    rationale=(
        "A clone of a dataset whose large files live in an annex holds its images as links "
        "into an object store that is empty until the content is fetched; some copies hold "
        "0-byte placeholders instead. Such a run still has its sidecars: its schedule, scheme, "
        "sidecar checks and the dataset-wide comparisons are done from them. What needs the "
        "image's header (dimensions, units, TR and slice fields in the header, the source "
        "cross-check's geometry) is not, and the finding lists those checks."
    ),
    fix="Fetch the content (for an annexed dataset: git annex get PATH, from the dataset's "
    "top folder), or copy the real file over the placeholder; then audit again.",
)
reader_code(
    "file/link-loop",
    title="a symbolic link loops back on itself",
    severity=E,
    rationale="Following the link never reaches a file.",
    fix="Replace the link with the file it was meant to point at.",
)
reader_code(
    "file/unreadable",
    title="the file cannot be read",
    severity=E,
    rationale="The operating system refused to read it (permissions, a folder with a run's name).",
    fix="Check permissions and that the path is a regular file.",
)
reader_code(
    "file/not-nifti",
    title="the file is not a NIfTI-1 or NIfTI-2 image",
    severity=E,
    rationale="The header size field and magic string do not identify a NIfTI image.",
    fix="Re-export the image from the original data; check the file was not truncated to zero.",
)
reader_code(
    "file/truncated",
    title="the file holds less image data than its header describes",
    severity=E,
    rationale=(
        "An interrupted copy or conversion leaves a file whose header promises more voxels "
        "than the file contains; the later volumes are missing or garbage."
    ),
    fix="Copy or convert the run again from its source.",
)
reader_code(
    "file/bad-dimensions",
    title="the header's dimensions are impossible",
    severity=E,
    rationale=(
        "dim[0] must be 1..7 and every used dimension positive; the size they imply must be "
        "possible for the file on disk. slicetime checks this before allocating anything."
    ),
    fix="The header is corrupt: regenerate the file from its source.",
)
reader_code(
    "file/unsupported",
    title="the image cannot be corrected (data type or dimensions)",
    severity=E,
    rationale=(
        "Correction resamples real-valued 4-D images. Complex, RGB and bit images, and images "
        "with fewer or more than four dimensions, are audited but not corrected."
    ),
    fix="Convert the run to a real-valued 4-D image, or leave it out of the correction.",
)
reader_code(
    "file/bad-data-offset",
    title="a single-file image's vox_offset points inside its header",
    severity=E,
    rationale=(
        "In a .nii file the voxels start after the header and its 4 extension-flag bytes "
        "(byte 352 for NIfTI-1, 544 for NIfTI-2; nifti1.h, nifti2.h). With a smaller "
        "vox_offset, 0 included, readers disagree: some refuse the file, some read the data "
        "from byte 0 (the header bytes become voxels), some from the end of the header. A run "
        "whose voxels depend on the reader cannot be audited or corrected with confidence, so "
        "correct refuses it (even with --force)."
    ),
    fix="Rewrite the image with a reference NIfTI library, which sets vox_offset after the "
    "header, and check the data.",
    standard="NIfTI-1 / NIfTI-2 header: vox_offset",
)
reader_code(
    "file/bad-extensions",
    title="the chain of header extensions is broken",
    severity=E,
    rationale=(
        "When the byte after the header is set, extensions follow it up to vox_offset; each "
        "starts with its size (esize) and code, and esize must be a positive multiple of 16 "
        "(nifti1.h). An esize below 8, not a multiple of 16, or running past vox_offset or "
        "the end of the file makes readers fail or read the voxels as extension bytes, and "
        "correct would copy the broken chain into its output. correct refuses the run (even "
        "with --force)."
    ),
    fix="Rewrite the image with a reference NIfTI library, or clear the extension flag when "
    "the extensions are not needed.",
    standard="NIfTI-1 header extensions (esize, ecode)",
)
reader_code(
    "sidecar/bad-json",
    title="a JSON sidecar has a syntax error",
    severity=E,
    rationale="An unparsable sidecar contributes no metadata; every run inheriting it loses it.",
    fix="Fix the syntax at the line and column given.",
)
reader_code(
    "sidecar/duplicate-key",
    title="a JSON sidecar repeats a key",
    severity=W,
    rationale=(
        "JSON parsers keep the last of repeated keys, silently dropping the others; which one "
        "a given tool keeps is not guaranteed. An error when the copies differ on a timing field."
    ),
    also_severities=(E,),
    fix="Keep one copy of the key with the intended value.",
)
reader_code(
    "sidecar/non-finite-number",
    title="a JSON sidecar contains NaN or Infinity",
    severity=E,
    rationale="NaN and Infinity are not JSON; strict parsers reject the whole file.",
    fix="Replace the value with a number, or remove the key.",
)
reader_code(
    "sidecar/not-object",
    title="a JSON sidecar's top level is not an object",
    severity=E,
    rationale="BIDS sidecars are key-value objects.",
    fix="Wrap the content in an object with the proper keys.",
)
reader_code(
    "sidecar/bad-encoding",
    title="a JSON sidecar is not valid UTF-8",
    severity=E,
    rationale=(
        "JSON text exchanged between systems must be UTF-8 (RFC 8259). A warning for lone "
        "surrogate escapes (the file is still read); a note for a UTF-8 byte-order mark, "
        "which RFC 8259 lets a parser ignore (the file is read, and fix keeps the mark)."
    ),
    also_severities=(W, N),
    fix="Re-save the file as UTF-8.",
)
reader_code(
    "sidecar/too-deep",
    title="a JSON sidecar nests too deeply",
    severity=E,
    rationale="Absurd nesting is a sign of a corrupt or hostile file and is not read.",
    fix="Flatten the structure; BIDS metadata is at most a few levels deep.",
)
reader_code(
    "sidecar/too-large",
    title="a JSON sidecar is too large to be metadata",
    severity=E,
    rationale="Sidecars are kilobytes; a huge one is not read so the audit stays bounded.",
    fix="Move bulk data out of the sidecar.",
)
reader_code(
    "sidecar/over-budget",
    title="a large inherited sidecar was not read: the audit's memory budget is spent",
    severity=E,
    rationale=(
        "Inherited sidecars are parsed once per audit and their values shared by every run "
        "that inherits them. Sidecars of 1 MiB or more count against a total of 64 MiB per "
        "audit (and worker process), so that a dataset of huge metadata files cannot exhaust "
        "memory; one that no longer fits is not read, and the runs inheriting it lack its "
        "values."
    ),
    fix="Move bulk data (long lists) out of the sidecars, or audit fewer datasets at once.",
)
reader_code(
    "sidecar/wrong-type",
    title="a timing field has the wrong type or an impossible value",
    severity=E,
    rationale="The BIDS specification defines the type and range of every metadata field.",
    fix="Write the value with the type the standard defines.",
    standard="BIDS objects.metadata field definitions",
)
reader_code(
    "inherit/ambiguous",
    title="more than one sidecar applies at one folder level",
    severity=W,
    rationale=(
        "The inheritance principle allows at most one applicable sidecar per level; with "
        "several, which value wins depends on the tool. An error when they disagree on a "
        "timing field."
    ),
    also_severities=(E,),
    fix="Merge the files, or add entities so that each applies to a distinct set of runs.",
    standard="BIDS inheritance principle",
)
reader_code(
    "source/unreadable",
    checked="source",
    title="the source series cannot be read",
    severity=W,
    rationale=(
        "The series matched to the run (or named in the source map) is not usable DICOM: "
        "not DICOM at all, truncated, missing a tag needed to place the slices, or carrying "
        "a vendor private header too large to trust. Nothing is compared."
    ),
    fix="Copy the series again from the scanner or archive, or correct the source map.",
)
reader_code(
    "source/bad-map",
    checked="source",
    title="the --source-map file cannot be used",
    severity=E,
    rationale="The map must be a TSV with two columns per line: run path and series folder.",
    fix="Fix the line named in the message.",
)
reader_code(
    "file/link-leaves-dataset",
    title="a folder link leads out of the dataset and is not followed",
    severity=W,
    rationale=(
        "A symbolic link inside a dataset that points at a folder outside it (another "
        "study, a mounted store, the file-system root, /proc) would take the walk, and "
        "every write a repair makes, out of the data the command was given. The link is "
        "reported once and not followed, so the runs behind it are not audited."
    ),
    fix="Give the linked folder as a path of its own to include it, or replace the link "
        "with the folder it points at.",
)
