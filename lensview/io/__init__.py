"""Files in and out.

`fits` (cutouts and deflection maps, with every validation), `regions`
(region lists of curves and knots), `catalogues` (knot lists read back from
region files and user catalogues), `knots` (the in-memory knot table they
share), `tables` (measurement tables in ECSV, CSV and VOTable), `sessions`
(versioned JSON session files) and `files` (suffixes, atomic writes).
"""

from .catalogues import PIXEL_COLUMNS, SKY_COLUMNS, read_candidates
from .fits import Cutout, DeflectionMaps, read_cutout, read_deflection, zero_point_from_header
from .knots import as_candidate_table
from .regions import vertex_table, write_regions
from .sessions import (SESSION_FORMAT, SESSION_VERSION, Candidate, FileStatus, InputFile,
                       ModelInputs, Session, check_session_files, load_session, save_session)
from .tables import read_table, write_table

__all__ = [
    "Candidate", "Cutout", "DeflectionMaps", "FileStatus", "InputFile", "ModelInputs",
    "PIXEL_COLUMNS", "SESSION_FORMAT", "SESSION_VERSION", "SKY_COLUMNS", "Session",
    "as_candidate_table", "check_session_files", "load_session", "read_candidates", "read_cutout",
    "read_deflection", "read_table", "save_session", "vertex_table", "write_regions", "write_table",
    "zero_point_from_header",
]
