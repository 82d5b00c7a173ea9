"""The day's page (index.html): every cell in a sortable table, thumbnails, summary plots, errors.

Self-contained and offline: CSS and JS are inline in the template, the summary plots are
embedded as base64 PNG, figures are linked by relative path. Everything shown comes from the
cells table and the run record; nothing is recomputed. Text from files, sheets and error
messages is HTML-escaped by Jinja2's autoescape.
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any
from urllib.parse import quote

import jinja2
import numpy as np

from pipeline.report.atomic import atomic_write_bytes, atomic_write_text
from pipeline.report.tables import Table, as_table, to_jsonable
from pipeline.report.tables import is_missing as _missing

if TYPE_CHECKING:
    import pandas as pd

TEMPLATES = Path(__file__).parent / "templates"
DEFAULT_SUMMARY = ("vrest_mv", "rin_mohm", "tau_ms", "cm_pf", "sag_ratio")
NO_GROUP = "(none)"
_LABELS = {
    "vrest_mv": "Vrest (mV)",
    "rin_mohm": "Rin (MΩ)",
    "tau_ms": "tau (ms)",
    "cm_pf": "Cm (pF)",
    "sag_ratio": "sag ratio",
    "bridge_error_mohm": "bridge error (MΩ)",
}
CAUTION = (
    "QC defaults are common practice, not a standard: each lab sets its own thresholds in the "
    "config. Cm estimated as tau/Rin underestimates the total capacitance of cells that are not "
    "isopotential (Golowasch et al. 2009, J Neurophysiol 102:2161-2175)."
)


def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATES),
        autoescape=jinja2.select_autoescape(["html"], default_for_string=True, default=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def _display(value: Any) -> str:
    """How a table value is shown: 4 significant digits, no exponent for lab-sized numbers."""
    if _missing(value):
        return "—"
    if isinstance(value, bool | np.bool_):
        return "true" if value else "false"
    if isinstance(value, float | np.floating):
        if value != 0 and (abs(value) >= 1e5 or abs(value) < 1e-4):
            return f"{value:.3e}"
        return f"{value:.4g}" if abs(value) < 1000 else f"{value:.0f}"
    return str(value)


def _sort_key(value: Any, numeric: bool) -> str:
    """The ``data-v`` the page's script sorts on; empty for missing values (sorted last)."""
    if _missing(value):
        return ""
    if numeric:
        return repr(float(value))
    return str(value)


def _figure_href(path: str | None) -> str | None:
    """A relative, URL-quoted link inside the output folder, or None when it is not one."""
    if not path:
        return None
    parts = str(path).replace("\\", "/").lstrip("/").split("/")
    if any(p in ("", ".", "..") for p in parts):
        return None
    # quoting ':' too makes 'javascript:...' or 'http://...' a harmless relative path
    return quote("/".join(parts), safe="/")


def _row_state(row: Mapping[str, Any]) -> str:
    status = row.get("status")
    if not _missing(status) and str(status) != "ok":
        return "error"
    return "pass" if bool(row.get("qc_pass", False)) else "fail"


def _display_columns(cells: Table, first: Sequence[str]) -> list[str]:
    """cell id, QC, then ``first`` (group, main properties), then the rest in table order."""
    lead = ["cell_id", "qc_pass", *first]
    cols = [c for c in dict.fromkeys(lead) if c in cells.columns]
    shown_with_qc = ("qc_reasons", "qc_flags")
    return cols + [c for c in cells.columns if c not in cols and c not in shown_with_qc]


def _qc_text(record: Mapping[str, Any], state: str) -> tuple[str, str]:
    """What is shown under the verdict: the reasons (QC, or the error of a cell not analysed)
    and the flags (rules that only flag; the cell still passes)."""
    parts = [record.get("qc_reasons")]
    if state == "error":
        parts.append(record.get("status"))
    seen = dict.fromkeys(str(p) for p in parts if not _missing(p) and str(p))
    flags = record.get("qc_flags")
    return "; ".join(seen), "" if _missing(flags) else str(flags)


def _table(cells: Table, figures: Mapping[str, str], first: Sequence[str]) -> dict[str, Any]:
    columns = _display_columns(cells, first)
    numeric = {c: cells.kinds[c] in ("int", "float") for c in columns}
    rank = {"error": "0", "fail": "1", "pass": "2"}  # sorting on QC puts problems first
    rows = []
    for record in cells.records():
        cell_id = "" if _missing(record.get("cell_id")) else str(record.get("cell_id"))
        state = _row_state(record)
        values = []
        for c in columns:
            v = record[c]
            if c == "qc_pass":
                label = {"pass": "PASS", "fail": "FAIL", "error": "ERROR"}[state]
                why, flags = _qc_text(record, state)
                qc = {"kind": "qc", "text": label, "key": rank[state], "note": why, "flags": flags}
                values.append(qc)
            else:
                kind = "num" if numeric[c] else ("wrap" if c == "status" else "text")
                values.append({"kind": kind, "text": _display(v), "key": _sort_key(v, numeric[c])})
        rows.append(
            {
                "id": cell_id,
                "state": state,
                "href": _figure_href(figures.get(cell_id)),
                "values": values,
            }
        )
    header = [
        {"name": "qc" if c == "qc_pass" else c, "num": numeric[c], "label": _LABELS.get(c, "")}
        for c in columns
    ]
    return {"header": header, "rows": rows}


def _groups(cells: Table, group_column: str | None) -> tuple[str, list[str], np.ndarray]:
    if group_column and group_column in cells.columns:
        labels = [NO_GROUP if _missing(v) else str(v) for v in cells.data[group_column]]
        order = sorted(set(labels), key=lambda g: (g == NO_GROUP, g))
        return group_column, order, np.array(labels, dtype=object)
    return "", ["all cells"], np.full(len(cells), "all cells", dtype=object)


def summary_png(
    cells: Table | pd.DataFrame,
    summary_columns: Sequence[str],
    group_column: str | None = "condition",
) -> bytes | None:
    """Distribution plots of the main properties by group: a box over the cells that passed QC,
    each cell as a dot (failed cells hollow grey, not in the box).

    Parameters
    ----------
    cells : Table or pandas.DataFrame
        The cells table (report units).
    summary_columns : sequence of str
        Columns to plot; those absent from the table are skipped.
    group_column : str or None
        Column that groups the cells (e.g. a sheet's ``condition``); one group when absent.

    Returns
    -------
    bytes or None
        PNG, or None when no summary column is in the table.
    """
    cells = as_table(cells)
    cols = [c for c in summary_columns if c in cells.columns]
    if not cols or not len(cells):
        return None
    title, order, labels = _groups(cells, group_column)
    values = {c: cells.numbers(c) for c in cols}
    # a group whose cells have no value at all (e.g. files that could not be read) gets no column
    has_value = np.any([~np.isnan(v) for v in values.values()], axis=0)
    order = [g for g in order if has_value[labels == g].any()] or order
    passed = np.array([_row_state(r) == "pass" for r in cells.records()])
    # matplotlib only here: a tables-only run (no figures, no plots) never imports it
    import matplotlib
    from matplotlib.figure import Figure

    from pipeline.report.figures import _Canvas  # the cell figures' canvas and PNG writer

    rng = np.random.default_rng(0)  # fixed jitter: the page is identical run to run
    with matplotlib.rc_context({"text.parse_math": False, "font.size": 8}):
        fig = Figure(
            figsize=(max(2.4 * len(cols), 4.0), 2.9 + 0.05 * max(len(g) for g in order)), dpi=100
        )
        _Canvas(fig)
        axes = fig.subplots(1, len(cols), squeeze=False)[0]
        for ax, col in zip(axes, cols, strict=True):
            _strip_box(ax, values[col], labels, order, passed, rng)
            ax.set_title(_LABELS.get(col, col), fontsize=9)
            ax.set_xlabel(title or "")
        fig.subplots_adjust(left=0.06, right=0.99, bottom=0.22, top=0.88, wspace=0.38)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


def _cached_summary(
    cells: Table,
    summary_columns: Sequence[str],
    group_column: str | None,
    folder: str | os.PathLike[str] | None,
) -> bytes | None:
    """:func:`summary_png`, kept in ``folder`` by a digest of all that it is drawn from."""
    if folder is None:
        return summary_png(cells, summary_columns, group_column)
    from pipeline import __version__

    # repr: NaN and inf apart (JSON would make both null), numbers exact
    table = {c: (cells.kinds[c], [repr(v) for v in cells.data[c]]) for c in cells.columns}
    key = json.dumps([__version__, list(summary_columns), group_column, list(cells.columns), table])
    path = Path(folder) / f"summary-{hashlib.sha256(key.encode('utf-8')).hexdigest()}.png"
    if path.is_file():
        return path.read_bytes()
    png = summary_png(cells, summary_columns, group_column)
    if png is not None:
        Path(folder).mkdir(parents=True, exist_ok=True)
        atomic_write_bytes(path, png)
        # one page per output folder: the plots of earlier tables will not be asked for again
        for stale in Path(folder).glob("summary-*.png"):
            if stale != path:
                stale.unlink(missing_ok=True)
    return png


def _strip_box(
    ax, values: np.ndarray, labels: np.ndarray, order: list[str], passed: np.ndarray, rng
) -> None:
    from pipeline.report.figures import EXCLUDED_COLOUR, FAIL_COLOUR, PASS_COLOUR

    positions = np.arange(len(order))
    boxes, box_pos = [], []
    for pos, group in zip(positions, order, strict=True):
        in_group = labels == group
        for ok in (True, False):
            v = values[in_group & (passed == ok)]
            v = v[~np.isnan(v)]
            x = pos + rng.uniform(-0.16, 0.16, v.size)
            if ok:
                ax.scatter(x, v, s=14, color=PASS_COLOUR, alpha=0.8, zorder=3, lw=0)
                if v.size:
                    boxes.append(v)
                    box_pos.append(pos)
            else:
                ax.scatter(x, v, s=16, facecolors="none", edgecolors=EXCLUDED_COLOUR, zorder=2)
    if boxes:
        ax.boxplot(boxes, positions=box_pos, widths=0.5, showfliers=False, zorder=1,
                   medianprops={"color": "black"}, boxprops={"color": "0.35"},
                   whiskerprops={"color": "0.35"}, capprops={"color": "0.35"})  # fmt: skip
    if np.isnan(values).all():
        ax.text(0.5, 0.5, "no values", transform=ax.transAxes, ha="center", color=FAIL_COLOUR)
    ax.set_xticks(positions)
    ax.set_xticklabels(
        [g if len(g) <= 14 else g[:13] + "…" for g in order], rotation=30, ha="right"
    )
    ax.set_xlim(-0.6, len(order) - 0.4)


def _errors(run_info: Mapping[str, Any]) -> list[dict[str, str]]:
    out = []
    for err in run_info.get("errors") or ():
        if isinstance(err, Mapping):
            out.append({
                "file": str(err.get("file", "")),
                "stage": str(err.get("stage", "")),
                "message": str(err.get("message", "")),
                "traceback": str(err.get("traceback", "") or ""),
            })  # fmt: skip
        else:
            out.append({"file": "", "stage": "", "message": str(err), "traceback": ""})
    return out


def _counts(cells: Table, run_info: Mapping[str, Any]) -> dict[str, Any]:
    states = [_row_state(r) for r in cells.records()]
    counts: dict[str, Any] = {
        "cells": len(cells),
        "pass QC": states.count("pass"),
        "fail QC": states.count("fail"),
        "not analysed": states.count("error"),
    }
    for key, value in (run_info.get("counts") or {}).items():
        if key not in ("cells", "cells_pass"):  # already counted from the table itself
            counts.setdefault(str(key).replace("_", " "), value)
    return counts


def _pretty_json(value: Any) -> str:
    return json.dumps(to_jsonable(value), indent=2, ensure_ascii=False)


def render_page(
    cells: Table | pd.DataFrame,
    *,
    run_info: Mapping[str, Any],
    figures: Mapping[str, str],
    summary_columns: Sequence[str] = DEFAULT_SUMMARY,
    group_column: str | None = "condition",
    plots: bool = True,
    plot_cache: str | os.PathLike[str] | None = None,
) -> str:
    """Render the day's page to a string (what :func:`write_page` writes).

    Parameters
    ----------
    cells, run_info, figures, summary_columns, group_column, plots, plot_cache
        As for :func:`write_page`.

    Returns
    -------
    str
        The HTML document.
    """
    cells = as_table(cells)
    png = _cached_summary(cells, summary_columns, group_column, plot_cache) if plots else None
    if png:
        no_plot = ""
    elif not plots:
        no_plot = "No summary plot: this run drew no figures (--no-figures)."
    else:
        no_plot = "No summary plot: the table has none of the summary columns, or no cells."
    context = {
        "title": f"patchbatch day summary ({len(cells)} cells)",
        "caution": CAUTION,
        "counts": _counts(cells, run_info),
        "version": str(run_info.get("version", "")),
        "started": str(run_info.get("started", "") or ""),
        "finished": str(run_info.get("finished", "") or ""),
        "group_column": group_column if group_column and group_column in cells.columns else "",
        "summary_png": base64.b64encode(png).decode("ascii") if png else "",
        "no_plot": no_plot,
        "table": _table(cells, figures, [c for c in (group_column, *summary_columns) if c]),
        "errors": _errors(run_info),
        "warnings": [str(w) for w in run_info.get("warnings") or ()],
        "inputs": [
            {
                "file": str(i.get("file", i.get("path", ""))),
                "sha256": str(i.get("sha256", "") or ""),
            }
            if isinstance(i, Mapping)
            else {"file": str(i), "sha256": ""}
            for i in run_info.get("inputs") or ()
        ],  # fmt: skip
        "config_json": _pretty_json(run_info.get("config", {})),
    }
    return _environment().get_template("index.html").render(**context)


def write_page(
    outdir: str | os.PathLike[str],
    cells: Table | pd.DataFrame,
    *,
    run_info: Mapping[str, Any],
    figures: Mapping[str, str],
    summary_columns: Sequence[str] = DEFAULT_SUMMARY,
    group_column: str | None = "condition",
    plots: bool = True,
    plot_cache: str | os.PathLike[str] | None = None,
) -> Path:
    """Write ``index.html`` for the day into ``outdir`` (atomically).

    Parameters
    ----------
    outdir : str or os.PathLike
        Output folder (created if missing); figures are linked relative to it.
    cells : Table or pandas.DataFrame
        The cells table from :func:`pipeline.report.tables.cells_table` (report units), or
        its DataFrame.
    run_info : Mapping
        The run record (as for ``run.json``): ``version``, ``started``, ``finished``,
        ``counts``, ``errors`` (``{"file", "stage", "message", "traceback"}``), ``warnings``,
        ``inputs``, ``config``.
    figures : Mapping[str, str]
        Cell id -> figure path relative to ``outdir`` (e.g. ``figures/cell01.png``).
    summary_columns : sequence of str
        Columns shown as distribution plots by group.
    group_column : str or None
        Column that groups cells in the plots (e.g. ``condition`` from the sheet); one group
        when it is absent.
    plots : bool
        Draw the summary plots (matplotlib); False for a tables-only run, whose page says so.
    plot_cache : str or os.PathLike, optional
        Folder that keeps the summary plot by a digest of everything it is drawn from (the
        whole cells table, the columns, the grouping, the version): a re-run over unchanged
        results writes the same page without drawing, or importing matplotlib, again.

    Returns
    -------
    pathlib.Path
        The page written.
    """
    html = render_page(
        cells,
        run_info=run_info,
        figures=figures,
        summary_columns=summary_columns,
        group_column=group_column,
        plots=plots,
        plot_cache=plot_cache,
    )
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    return atomic_write_text(out / "index.html", html)
