"""Report stage: tables (CSV, Parquet), per-cell figures, the day's page, the run record.

Only reads results; never recomputes them. Every file is written atomically.
"""

from pipeline.report.atomic import atomic_path, atomic_write_bytes, atomic_write_text
from pipeline.report.figures import FigureSettings, cell_figure, figure_names, safe_name
from pipeline.report.page import render_page, write_page
from pipeline.report.tables import (
    cells_frame,
    read_table_csv,
    spikes_frame,
    sweeps_frame,
    write_run_json,
    write_tables,
)

__all__ = [
    "FigureSettings",
    "atomic_path",
    "atomic_write_bytes",
    "atomic_write_text",
    "cell_figure",
    "cells_frame",
    "figure_names",
    "read_table_csv",
    "render_page",
    "safe_name",
    "spikes_frame",
    "sweeps_frame",
    "write_page",
    "write_run_json",
    "write_tables",
]
