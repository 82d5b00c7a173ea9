"""The day's page: escaped hostile text, offline (no http(s) references), every cell listed."""

from __future__ import annotations

import base64
import html
import math
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from pipeline.report.page import CAUTION, render_page, summary_png, write_page
from pipeline.report.tables import cells_frame

HOSTILE = "<script>alert(1)</script>"


def fake_cells(n: int = 9, seed: int = 4, condition: bool = True):
    """Cells as the batch would tabulate them; cell 1 fails QC, cell 2 could not be analysed,
    cell 3 has a hostile id and sheet value."""
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n):
        row = {
            "cell_id": HOSTILE if k == 3 else f"cell{k:02d}",
            "source_file": f"/data/day/cell{k:02d}.nwb",
            "animal": HOSTILE if k == 3 else f"m{k % 3}",
            "n_sweeps": 15,
            "vrest_mv": float(rng.normal(-68, 3)),
            "rin_mohm": float(rng.normal(150, 30)),
            "tau_ms": float(rng.normal(20, 4)),
            "cm_pf": float(rng.normal(130, 20)),
            "sag_ratio": float(rng.uniform(0, 0.2)),
            "qc_pass": k not in (1, 2),
            "qc_reasons": "Vrest -41 mV above -50 mV" if k == 1 else "",
            "status": "error: no usable sweep" if k == 2 else "ok",
            "qc_flags": "tau from 2 sweeps only" if k == 4 else "",
        }
        if condition:
            row["condition"] = "control" if k % 2 else "drug"
        rows.append(row)
    rows[2].update(vrest_mv=np.nan, rin_mohm=np.nan, tau_ms=np.nan, cm_pf=np.nan, sag_ratio=np.nan)
    return cells_frame(rows, ("condition", "animal") if condition else ("animal",))


RUN_INFO = {
    "version": "0.1.0",
    "started": "2026-12-02T07:00:00+00:00",
    "finished": "2026-12-02T07:01:30+00:00",
    "counts": {"files": 10, "files_failed": 1},
    "errors": [
        {"file": "/data/day/bad.nwb", "stage": "read", "message": f"not an HDF5 file {HOSTILE}"}
    ],
    "warnings": [f"sheet row {HOSTILE} matched no file"],
    "inputs": [{"file": "/data/day/cell00.nwb", "sha256": "0" * 64}],
    "config": {"qc": {"max_vrest_v": -0.05, "note": HOSTILE}},
}


class _Collector(HTMLParser):
    """Collects what a browser would execute or fetch: script bodies, src/href values, rows."""

    def __init__(self) -> None:
        super().__init__()
        self.scripts: list[str] = []
        self.refs: list[str] = []
        self.row_ids: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self._in_script = tag == "script"
        if self._in_script:
            self.scripts.append("")
        for key in ("src", "href", "action", "data"):
            if attrs.get(key):
                self.refs.append(attrs[key])
        if tag == "tr" and "data-cell-id" in attrs:
            self.row_ids.append(attrs["data-cell-id"])

    def handle_endtag(self, tag):
        if tag == "script":
            self._in_script = False

    def handle_data(self, data):
        if self._in_script:
            self.scripts[-1] += data


def _parse(text: str) -> _Collector:
    parser = _Collector()
    parser.feed(text)
    return parser


@pytest.fixture(scope="module")
def page_text(tmp_path_factory):
    out = tmp_path_factory.mktemp("day")
    cells = fake_cells()
    figures = {cid: f"figures/{cid}.png" for cid in cells["cell_id"] if cid != HOSTILE}
    figures[HOSTILE] = "figures/_script_alert_1_script_-12345678.png"
    path = write_page(out, cells, run_info=RUN_INFO, figures=figures)
    assert path == out / "index.html"
    return path.read_text(encoding="utf-8")


def test_hostile_text_is_escaped(page_text):
    parsed = _parse(page_text)
    # our two inline scripts only; the hostile one never becomes a script element
    assert len(parsed.scripts) == 2 and not any("alert(1)" in s for s in parsed.scripts)
    assert HOSTILE not in page_text
    escaped = html.escape(HOSTILE, quote=False)
    # in the id cell, the sheet column, the error message, the warning and the config
    assert page_text.count(escaped) >= 5


def test_page_is_offline(page_text):
    assert not re.search(r"https?://", page_text, flags=re.IGNORECASE)
    refs = _parse(page_text).refs
    assert refs, "thumbnails should be linked"
    for ref in refs:
        assert ref.startswith(("figures/", "data:image/png;base64,")), ref
    assert "<link" not in page_text and "@import" not in page_text


def test_every_cell_in_table_and_marked(page_text):
    cells = fake_cells()
    parsed = _parse(page_text)
    assert parsed.row_ids == cells["cell_id"].tolist()
    assert re.search(r'<tr class="fail" data-cell-id="cell01"', page_text)
    assert re.search(r'<tr class="error" data-cell-id="cell02"', page_text)
    assert "Vrest -41 mV above -50 mV" in page_text and "error: no usable sweep" in page_text
    assert page_text.count('class="badge pass"') == len(cells) - 2
    # reasons and flags are shown under the verdict, not as separate columns
    assert "flagged: tau from 2 sweeps only" in page_text
    assert ">qc_reasons</th>" not in page_text and ">qc_flags</th>" not in page_text


def test_caution_errors_config_counts(page_text):
    assert html.escape(CAUTION, quote=False) in page_text.replace("&#39;", "'")
    assert "Golowasch et al. 2009" in page_text
    assert "/data/day/bad.nwb" in page_text and "max_vrest_v" in page_text
    assert re.search(r"pass QC: <b>7</b>", page_text) and re.search(
        r"not analysed: <b>1</b>", page_text
    )
    assert re.search(r"files failed: <b>1</b>", page_text)


def test_figure_links_are_relative_and_quoted(tmp_path):
    cells = fake_cells(n=4)
    figures = {
        "cell00": "http://example.org/x.png",
        "cell01": "../outside.png",
        "cell02": "figures/a b.png",
        HOSTILE: "javascript:alert(1)",
    }
    text = render_page(cells, run_info={}, figures=figures)
    refs = [r for r in _parse(text).refs if not r.startswith("data:")]
    assert "figures/a%20b.png" in refs
    assert all(":" not in r and not r.startswith(("/", "..")) for r in refs), refs
    assert "../outside.png" not in text


def test_number_display():
    from pipeline.report.page import _display

    assert [_display(v) for v in (-68.2345, 152.04, 0.000634, 7.4e-05, 12345.6, np.nan, True)] == [
        "-68.23", "152", "0.000634", "7.400e-05", "12346", "—", "true"
    ]  # fmt: skip


def _png_size(png: bytes) -> tuple[int, int]:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    return int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")


def test_summary_plot_with_and_without_condition():
    with_groups = summary_png(fake_cells(), ("vrest_mv", "rin_mohm", "tau_ms"), "condition")
    no_groups = summary_png(
        fake_cells(condition=False), ("vrest_mv", "rin_mohm", "tau_ms"), "condition"
    )
    assert (
        _png_size(with_groups)[0] == _png_size(no_groups)[0] == 720
    )  # 3 panels x 2.4 in x 100 dpi
    assert with_groups != no_groups
    assert summary_png(fake_cells(), ("not_a_column",)) is None
    # a group made only of cells without values (cell 2 alone) gets no column: same image
    lonely = fake_cells()
    lonely.loc[2, "condition"] = "unread"
    assert summary_png(lonely, ("vrest_mv",)) == summary_png(fake_cells(), ("vrest_mv",))
    # deterministic: the same table gives the same image
    assert summary_png(fake_cells(), ("tau_ms",)) == summary_png(fake_cells(), ("tau_ms",))


def test_summary_plot_is_drawn_as_stock_matplotlib_draws_it(monkeypatch):
    # the plot goes through the cell figures' canvas (kept renderer, cached text bitmaps, own
    # PNG writer): its pixels must be those of matplotlib's own Agg canvas and PNG writer
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    from pipeline.report import figures

    def pixels(png: bytes) -> np.ndarray:
        return np.asarray(Image.open(io.BytesIO(png)).convert("RGBA"))

    cells = fake_cells(12)
    columns = ("vrest_mv", "rin_mohm", "tau_ms", "cm_pf", "sag_ratio")
    ours = pixels(summary_png(cells, columns))
    monkeypatch.setattr(figures, "_Canvas", FigureCanvasAgg)
    stock = pixels(summary_png(cells, columns))
    assert ours.shape == stock.shape and np.array_equal(ours, stock)


def test_page_without_cells_or_summary_columns(tmp_path):
    empty = cells_frame([])
    path = write_page(tmp_path, empty, run_info={"errors": ["every file failed"]}, figures={})
    text = path.read_text(encoding="utf-8")
    assert "Cells (0)" in text and "every file failed" in text and "No summary plot" in text
    embedded = re.findall(
        r"data:image/png;base64,([A-Za-z0-9+/=]+)",
        render_page(fake_cells(), run_info={}, figures={}),
    )
    assert len(embedded) == 1 and _png_size(base64.b64decode(embedded[0]))[1] > 100


def test_page_of_a_run_without_figures_has_no_plot_and_says_why():
    text = render_page(fake_cells(), run_info={}, figures={}, plots=False)
    assert "data:image/png" not in text
    assert "this run drew no figures" in text
    assert "Cells (9)" in text  # the table itself is all there


@pytest.mark.parametrize("workers", [1, 2])
def test_tables_only_run_never_imports_matplotlib_or_pandas(tmp_path, workers):
    # matplotlib costs ~0.5 s per process; a --no-figures run has no use for it (with a pool,
    # the main process preloads only what the workers fit with). pandas (~0.3 s) is not needed
    # to read NWB files, join the sheet or write the tables and page either.
    import subprocess
    import sys

    from day_factory import write_day

    day = tmp_path / "day"
    write_day(day, n_cells=2)
    code = (
        "import sys\n"
        "from pipeline.batch import run_batch\n"
        f"run_batch([{str(day)!r}], out={str(tmp_path / 'out')!r}, workers={workers},"
        " figures=False, progress=False)\n"
        "print([m for m in ('matplotlib', 'pandas') if m in sys.modules])\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "[]"
    assert "condition" in (tmp_path / "out" / "cells.csv").read_text().splitlines()[0]  # joined
    assert "drew no figures" in (tmp_path / "out" / "index.html").read_text(encoding="utf-8")


def test_summary_plot_is_kept_by_what_it_is_drawn_from(tmp_path, monkeypatch):
    import pipeline.report.page as page

    kept = tmp_path / "kept"
    first = render_page(fake_cells(), run_info={}, figures={}, plot_cache=kept)
    assert len(list(kept.glob("summary-*.png"))) == 1

    def must_not_draw(*args, **kwargs):
        raise AssertionError("drawn again although nothing changed")

    monkeypatch.setattr(page, "summary_png", must_not_draw)
    assert render_page(fake_cells(), run_info={}, figures={}, plot_cache=kept) == first
    changed = fake_cells()
    changed.loc[0, "rin_mohm"] = 999.0
    with pytest.raises(AssertionError, match="drawn again"):
        render_page(changed, run_info={}, figures={}, plot_cache=kept)
    # cell 2's values are NaN; inf in their place draws a different plot ("no values" goes)
    monkeypatch.undo()
    render_page(fake_cells(), run_info={}, figures={}, plot_cache=kept)
    monkeypatch.setattr(page, "summary_png", must_not_draw)
    endless = fake_cells()
    endless.loc[2, "rin_mohm"] = math.inf
    with pytest.raises(AssertionError, match="drawn again"):
        render_page(endless, run_info={}, figures={}, plot_cache=kept)


def test_only_the_current_summary_plot_is_kept(tmp_path):
    kept = tmp_path / "kept"
    (kept / "other").mkdir(parents=True)
    (kept / "entry.json").write_text("{}")  # the result cache beside it is left alone
    render_page(fake_cells(), run_info={}, figures={}, plot_cache=kept)
    first = list(kept.glob("summary-*.png"))
    changed = fake_cells()
    changed.loc[0, "rin_mohm"] = 999.0
    render_page(changed, run_info={}, figures={}, plot_cache=kept)
    now = list(kept.glob("summary-*.png"))
    assert len(first) == len(now) == 1 and first != now
    assert (kept / "entry.json").is_file() and (kept / "other").is_dir()
