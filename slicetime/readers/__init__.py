"""readers layer: NIfTI headers, JSON sidecars, the inheritance principle, dataset walking.

Everything here reads files; nothing writes. Fatal problems with one file
raise :class:`ReadError` (turn it into a finding with ``to_finding()``);
non-fatal ones come back as :class:`~slicetime.model.Finding` lists.
"""

from .dataset import SKIPPED_FOLDERS, TIME_SERIES_SUFFIXES, find_root, is_image_name, iter_runs
from .entities import ParsedName, image_stem, parse_name
from .errors import ReadError
from .inheritance import Resolution, SidecarIndex, relative_posix
from .nifti import read_header
from .sidecar import TIMING_FIELDS, check_types, load_schema, load_sidecar, parse_sidecar_bytes

__all__ = [
    "SKIPPED_FOLDERS",
    "TIME_SERIES_SUFFIXES",
    "TIMING_FIELDS",
    "ParsedName",
    "ReadError",
    "Resolution",
    "SidecarIndex",
    "check_types",
    "find_root",
    "image_stem",
    "is_image_name",
    "iter_runs",
    "load_schema",
    "load_sidecar",
    "parse_name",
    "parse_sidecar_bytes",
    "read_header",
    "relative_posix",
]
