"""runlog: run catalogue and shot statistics for neutral-atom experiments.

The public API is small: :func:`open` a catalogue, then ingest files and ask it about
runs and shots. Everything else is internal and may change.

The names are loaded on first use (module ``__getattr__``), so that ``import runlog``
and the command line's ``--help`` do not pay for pandas, SQLAlchemy and pyarrow.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

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

if TYPE_CHECKING:
    from runlog.catalogue import Catalogue, RunInfo
    from runlog.figures.base import Figure
    from runlog.ingest import IngestResult

    def open(url: str | None = None, *, create: bool = True) -> Catalogue: ...  # noqa: A001

__version__ = "0.1.0"

# Public name -> (module, attribute), imported on first use.
_LAZY = {
    # runlog.open(url) reads naturally, like sqlite3.connect
    "open": ("runlog.catalogue", "open_catalogue"),
    "Catalogue": ("runlog.catalogue", "Catalogue"),
    "RunInfo": ("runlog.catalogue", "RunInfo"),
    "IngestResult": ("runlog.ingest", "IngestResult"),
    "Figure": ("runlog.figures.base", "Figure"),
}

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


def __getattr__(name: str) -> Any:
    try:
        module, attribute = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'runlog' has no attribute '{name}'") from None
    value = getattr(importlib.import_module(module), attribute)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
