"""runlog: run catalogue and shot statistics for neutral-atom experiments.

The public API is small: :func:`open` a catalogue, then ingest files and ask it about
runs and shots. Everything else is internal and may change.
"""

from runlog.catalogue import Catalogue, RunInfo, open_catalogue
from runlog.errors import (
    ConfigError,
    ContractError,
    ExportError,
    FilterError,
    FitError,
    NotFoundError,
    RunlogError,
    SchemaVersionError,
    StoreError,
)
from runlog.figures.base import Figure
from runlog.ingest import IngestResult

__version__ = "0.1.0"

open = open_catalogue  # noqa: A001 - runlog.open(url) reads naturally, like sqlite3.connect

__all__ = [
    "__version__",
    "open",
    "Catalogue",
    "RunInfo",
    "IngestResult",
    "Figure",
    "RunlogError",
    "ContractError",
    "ConfigError",
    "FitError",
    "FilterError",
    "NotFoundError",
    "ExportError",
    "StoreError",
    "SchemaVersionError",
]
