"""The public API stays small and explicit (httpx-style: a test keeps __all__ honest)."""

import runlog
import runlog.errors


def test_all_lists_exactly_the_public_names():
    assert sorted(runlog.__all__) == sorted(
        [
            "__version__", "open", "Catalogue", "RunInfo", "IngestResult", "Figure",
            "RunlogError", "ContractError", "ConfigError", "FitError", "FilterError",
            "NotFoundError", "ExportError", "StoreError", "SchemaVersionError",
        ]
    )
    for name in runlog.__all__:
        assert hasattr(runlog, name), name


def test_every_error_is_a_runlog_error_and_a_builtin():
    for name in runlog.errors.__all__:
        error = getattr(runlog.errors, name)
        assert issubclass(error, runlog.RunlogError)
    assert issubclass(runlog.ContractError, ValueError)
    assert issubclass(runlog.NotFoundError, LookupError)
    assert issubclass(runlog.StoreError, RuntimeError)


def test_contract_error_message_names_file_column_and_row():
    error = runlog.ContractError("day.parquet", "negative shot index -1", column="shot", row=4)
    assert str(error) == "day.parquet (column 'shot', row 4): negative shot index -1"
    assert str(runlog.ContractError("x.parquet", "file has no rows")) == "x.parquet: file has no rows"
