"""The day's page in a real browser (headless Chromium): it renders, lists every cell, sorts,
finds its figures and raises no script error. Skipped without Chromium, except on CI."""

from __future__ import annotations

import os
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest
from test_report_figures import fake_cell
from test_report_page import HOSTILE, RUN_INFO, fake_cells

from pipeline.report.figures import cell_figure, safe_name
from pipeline.report.page import write_page

pytestmark = pytest.mark.browser

FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--enable-logging=stderr",
    "--v=0",
    "--window-size=1400,3000",
    "--virtual-time-budget=5000",  # let lazy thumbnails load before the dump
]


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        if path := shutil.which(name):
            return path
    if os.environ.get("CI"):
        pytest.fail("chromium is not installed (CI must install it: apt-get install -y chromium)")
    pytest.skip("chromium is not installed")


def _run(page: Path, tmp_path: Path, *args: str, fragment: str = "") -> subprocess.CompletedProcess:
    profile = tmp_path / f"profile-{len(list(tmp_path.glob('profile-*')))}"
    cmd = [_chromium(), *FLAGS, f"--user-data-dir={profile}", *args, page.as_uri() + fragment]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=90, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc


def _console_errors(stderr: str) -> list[str]:
    """Console messages Chromium logs with --enable-logging=stderr (``CONSOLE(line)] "..."``)."""
    return [
        ln for ln in stderr.splitlines() if "CONSOLE" in ln and ("Uncaught" in ln or "Error" in ln)
    ]


class _Dom(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.rows: list[str] = []
        self.rin: list[str] = []
        self.missing: list[str] = []
        self.thumbs: list[str] = []
        self.body: dict[str, str | None] = {}
        self.js_errors_hidden = None
        self._col = -1
        self._rin_col = None
        self._in_errors = False
        self.js_error_text = ""
        self._header: list[str] = []
        self._in_th = False
        self._in_cells = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table":
            self._in_cells = a.get("id") == "cells-table"
        if not self._in_cells and tag in ("th", "td", "tr"):
            return
        if tag == "body":
            self.body = a
        if tag == "div" and a.get("id") == "js-errors":
            self.js_errors_hidden = "hidden" in a
            self._in_errors = True
        if tag == "th":
            self._in_th = True
            self._header.append("")
        if tag == "tr" and "data-cell-id" in a:
            self.rows.append(a["data-cell-id"])
            self._col = -1
        if tag == "td":
            self._col += 1
            if self._rin_col is None:
                self._rin_col = self._header.index("rin_mohm")
            if self._col == self._rin_col:
                self.rin.append(a.get("data-v", ""))
        if tag == "img" and "thumb" in (a.get("class") or ""):
            self.thumbs.append(a.get("src", ""))
            if a.get("data-missing"):
                self.missing.append(a.get("src", ""))

    def handle_endtag(self, tag):
        if tag == "table":
            self._in_cells = False
        if tag == "div":
            self._in_errors = False
        if tag == "th":
            self._in_th = False

    def handle_data(self, data):
        if self._in_errors:
            self.js_error_text += data
        if self._in_th:
            self._header[-1] += data


def _dom(page: Path, tmp_path: Path, fragment: str = "") -> tuple[_Dom, str]:
    proc = _run(page, tmp_path, "--dump-dom", fragment=fragment)
    dom = _Dom()
    dom.feed(proc.stdout)
    return dom, proc.stderr


@pytest.fixture(scope="module")
def day(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("browser_day")
    (out / "figures").mkdir()
    cells = fake_cells()
    figures = {}
    for cid in cells["cell_id"][:4]:
        rec, epochs, fit, verdict = fake_cell(cid, n_sweeps=6)
        name = f"figures/{safe_name(cid)}.png"
        cell_figure(rec, epochs, fit, verdict, out / name, dpi=40)
        figures[cid] = name
    figures[cells["cell_id"][5]] = "figures/never-written.png"  # must be reported missing
    write_page(out, cells, run_info=RUN_INFO, figures=figures)
    return out


def test_page_renders_lists_every_cell_without_errors(day, tmp_path):
    cells = fake_cells()
    dom, stderr = _dom(day / "index.html", tmp_path)
    assert dom.body.get("data-script") == "ran", "the page's script did not run"
    assert dom.js_errors_hidden and not dom.js_error_text.strip()
    assert _console_errors(stderr) == []
    assert sorted(dom.rows) == sorted(cells["cell_id"]) and HOSTILE in dom.rows
    # the thumbnails that exist load; the one that does not is flagged on the page
    assert len(dom.thumbs) == 5 and dom.missing == ["figures/never-written.png"]


def test_sort_from_address(day, tmp_path):
    dom, stderr = _dom(day / "index.html", tmp_path, fragment="#sort=-rin_mohm")
    assert _console_errors(stderr) == [] and not dom.js_error_text.strip()
    values = [float(v) for v in dom.rin if v]
    assert values == sorted(values, reverse=True) and len(values) == len(dom.rin) - 1
    assert dom.rin[-1] == ""  # the cell without a value sorts last


def test_error_trap_can_fail(day, tmp_path):
    """Negative control: a broken script must show up in both checks above."""
    broken = tmp_path / "broken.html"
    text = (day / "index.html").read_text(encoding="utf-8")
    broken.write_text(
        text.replace("</body>", "<script>notAFunction();</script></body>"), encoding="utf-8"
    )
    dom, stderr = _dom(broken, tmp_path)
    assert "notAFunction" in dom.js_error_text and dom.js_errors_hidden is False
    assert any("notAFunction" in ln for ln in _console_errors(stderr))


def test_screenshot(day, tmp_path):
    shot = tmp_path / "page.png"
    _run(day / "index.html", tmp_path, f"--screenshot={shot}")
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and int.from_bytes(data[16:20], "big") == 1400
    assert len(data) > 50_000  # a blank page compresses to a few kB
    if os.environ.get("PATCHBATCH_KEEP_SCREENSHOT"):
        shutil.copy(shot, os.environ["PATCHBATCH_KEEP_SCREENSHOT"])
