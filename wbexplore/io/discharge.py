"""Gauged outlet discharge: kept for callers of `read_discharge`; the reader is `wbexplore.io.stations`."""

from __future__ import annotations

from .stations import DuplicateRowsWarning, read_discharge, read_discharge_series

__all__ = ["read_discharge", "read_discharge_series", "DuplicateRowsWarning"]
