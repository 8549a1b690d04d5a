"""The results folder, ``results/<sweep name>/``: its file names, columns, writer and readers.

trials/ writes a results folder through this package and report/ reads it through it; neither
spells a file name, a column list or a temporary-file dance of its own.
"""

from kablate.results.columns import (
    CURVE_COLUMNS,
    PREDICTION_COLUMNS,
    TRIAL_COLUMNS,
    VARIANT_COLUMNS,
)
from kablate.results.data_record import DataRecord
from kablate.results.folder import ResultsFolder, read_json, read_records
from kablate.results.paths import checkpoint_path, trial_dir
from kablate.results.write import atomic_write, write_csv, write_json, write_text

__all__ = [
    "CURVE_COLUMNS",
    "DataRecord",
    "PREDICTION_COLUMNS",
    "TRIAL_COLUMNS",
    "VARIANT_COLUMNS",
    "ResultsFolder",
    "atomic_write",
    "checkpoint_path",
    "read_json",
    "read_records",
    "trial_dir",
    "write_csv",
    "write_json",
    "write_text",
]
