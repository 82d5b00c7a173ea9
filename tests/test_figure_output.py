"""Figure output path: the PNG writer is lossless, and the reused renderer leaks nothing."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image
from test_report_figures import fake_cell

from pipeline.report.figures import cell_figure, png_bytes


def test_png_bytes_round_trip_is_lossless():
    rng = np.random.default_rng(7)
    rgba = rng.integers(0, 256, size=(37, 53, 4), dtype=np.uint8)
    data = png_bytes(rgba[..., :3], dpi=80.0, level=3)  # a strided view, as from the canvas
    image = Image.open(io.BytesIO(data))
    assert image.mode == "RGB" and image.size == (53, 37)
    assert np.array_equal(np.asarray(image), rgba[..., :3])
    # pHYs stores dots per metre (rounded): 80 dpi reads back within 0.01 dpi
    assert abs(image.info["dpi"][0] - 80.0) < 0.01


@pytest.mark.parametrize("deflater", ["isal", "zlib"])
@pytest.mark.parametrize("level", [0, 1, 3, 9])
def test_png_bytes_is_lossless_with_either_deflater(monkeypatch, deflater, level):
    """ISA-L (the default) and the stdlib fallback both write streams any PNG reader decodes."""
    import zlib

    from isal import isal_zlib

    import pipeline.report.figures as figures

    monkeypatch.setattr(figures, "_DEFLATE", isal_zlib if deflater == "isal" else zlib)
    rgb = np.zeros((60, 90, 3), np.uint8) + 255  # a plot-like image: white, a few lines
    rgb[10:12, :, :] = (31, 119, 180)
    rgb[:, 40, :] = np.arange(60, dtype=np.uint8)[:, None]
    image = Image.open(io.BytesIO(png_bytes(rgb, level=level)))
    assert np.array_equal(np.asarray(image), rgb)


def test_default_deflater_is_isal():
    import pipeline.report.figures as figures

    assert figures._DEFLATE.__name__ == "isal.isal_zlib"  # a declared dependency, not optional


def _pixels(path) -> np.ndarray:
    return np.asarray(Image.open(path))


def test_reused_renderer_draws_each_figure_from_scratch(tmp_path):
    """One renderer serves every figure of a size: nothing of one cell may show in the next."""
    rec, epochs, fit, verdict = fake_cell("cellA")
    cell_figure(rec, epochs, fit, verdict, tmp_path / "a1.png", dpi=40)
    other = fake_cell("cellB", n_sweeps=5, seed=2)
    cell_figure(*other, tmp_path / "b.png", dpi=40)
    cell_figure(rec, epochs, fit, verdict, tmp_path / "small.png", dpi=30)  # another size
    cell_figure(rec, epochs, fit, verdict, tmp_path / "a2.png", dpi=40)
    first, again = _pixels(tmp_path / "a1.png"), _pixels(tmp_path / "a2.png")
    assert np.array_equal(first, again)
    assert not np.array_equal(first, _pixels(tmp_path / "b.png"))
    assert _pixels(tmp_path / "small.png").shape[:2] == (round(8.6 * 30), 15 * 30)


def test_png_bytes_keeps_straight_alpha():
    """RGBA is written as it is (colour type 6), as the canvas buffer holds it."""
    rgba = np.random.default_rng(3).integers(0, 256, size=(9, 13, 4), dtype=np.uint8)
    image = Image.open(io.BytesIO(png_bytes(rgba)))
    assert image.mode == "RGBA" and np.array_equal(np.asarray(image), rgba)
    with pytest.raises(ValueError, match="2 channels"):
        png_bytes(rgba[..., :2])


def test_figure_png_is_opaque(tmp_path):
    rec, epochs, fit, verdict = fake_cell("cellA")
    cell_figure(rec, epochs, fit, verdict, tmp_path / "a.png", dpi=30)
    pixels = _pixels(tmp_path / "a.png")
    assert pixels.shape[2] == 4 and (pixels[..., 3] == 255).all()


def test_drawing_a_figure_does_not_import_pyplot(tmp_path):
    """pyplot (and its style library) is for interactive use: reading rcParams["backend"]
    imports it, ~0.1 s per worker process."""
    import subprocess
    import sys
    from pathlib import Path

    tests = Path(__file__).parent
    code = (
        "import sys\n"
        f"sys.path.insert(0, {str(tests)!r})\n"
        "from test_report_figures import fake_cell\n"
        "from pipeline.report.figures import cell_figure\n"
        "cell_figure(*fake_cell(), sys.argv[1], dpi=30)\n"
        "print('matplotlib.pyplot' in sys.modules)\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code, str(tmp_path / "a.png")],
        capture_output=True, text=True, check=False,
    )  # fmt: skip
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "False"
