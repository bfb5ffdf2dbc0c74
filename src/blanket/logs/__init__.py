"""Parquet trajectory logs: writer, reader, schema (plots, inspection and video beside).

See :mod:`blanket.logs.schema` for the folder layout and the column naming pattern.
"""

from __future__ import annotations

from blanket.logs.reader import open_dataset, read_metadata, read_run
from blanket.logs.schema import SCHEMA_VERSION, LogError
from blanket.logs.writer import RunWriter

__all__ = ["RunWriter", "read_run", "open_dataset", "read_metadata", "LogError", "SCHEMA_VERSION"]
