"""Report stage: tables (CSV, Parquet), per-cell figures, the day's page, the run record.

Only reads results; never recomputes them. Every file is written atomically.

The names below are loaded on first use (PEP 562): importing ``pipeline.report.atomic`` or
``pipeline.report.tables`` must not import matplotlib, which a tables-only run never needs.
"""

from __future__ import annotations

import importlib
from typing import Any

_WHERE = {
    "atomic_path": "atomic",
    "atomic_write_bytes": "atomic",
    "atomic_write_text": "atomic",
    "FigureSettings": "figures",
    "cell_figure": "figures",
    "figure_names": "figures",
    "safe_name": "figures",
    "render_page": "page",
    "write_page": "page",
    "Table": "tables",
    "cells_frame": "tables",
    "cells_table": "tables",
    "read_table_csv": "tables",
    "spikes_frame": "tables",
    "spikes_table": "tables",
    "sweeps_frame": "tables",
    "sweeps_table": "tables",
    "table_to_csv": "tables",
    "write_parquet": "tables",
    "write_run_json": "tables",
    "write_tables": "tables",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(importlib.import_module(f"{__name__}.{module}"), name)


def __dir__() -> list[str]:
    return sorted({*globals(), *_WHERE})
