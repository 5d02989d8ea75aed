"""The report picture (brimline.daemon.views.report) drawn from the shipped demo recording."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from brimline.daemon.errors import InputError
from brimline.daemon.runtime.offline import Window, replay_offline
from brimline.daemon.views.report import render_report, waterfall_rows

matplotlib = pytest.importorskip("matplotlib")
from matplotlib import image as mpimg  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay" / "kestrel_lowmarsh_estimates.brlog"
CONFIG = ROOT / "config" / "replay.yaml"


@pytest.fixture(scope="module")
def demo_run():
    return replay_offline(CONFIG, DEMO, keep_snr=True)


def _ink(img: np.ndarray, rows: slice, cols: slice) -> float:
    """Fraction of pixels in a region that are not (near) white."""
    region = img[rows, cols, :3]
    return float((region.min(axis=2) < 0.9).mean())


def test_png_has_the_page_size_and_every_panel_drawn(demo_run, tmp_path):
    out = render_report(demo_run, tmp_path / "r.png", at_s=14.0)
    img = mpimg.imread(out)
    assert img.shape[:2] == (909, 1285)  # A4 landscape, 11.69 x 8.27 in at 110 dpi, truncated
    h, w = img.shape[:2]
    top, middle, bottom = slice(int(0.08 * h), int(0.30 * h)), \
        slice(int(0.45 * h), int(0.60 * h)), slice(int(0.75 * h), int(0.92 * h))
    left, right = slice(int(0.08 * w), int(0.35 * w)), slice(int(0.55 * w), int(0.80 * w))
    assert _ink(img, top, left) > 0.9  # SNR waterfall: colour everywhere
    assert _ink(img, top, right) > 0.9  # bits per tone: colour everywhere
    assert _ink(img, middle, slice(int(0.1 * w), int(0.8 * w))) > 0.02  # rate and margin lines
    assert _ink(img, bottom, left) > 0.02  # snapshot: SNR and bits
    assert _ink(img, bottom, right) > 0.02  # snapshot: power bars
    # The waterfall is not one flat colour.
    assert img[top, left, :3].reshape(-1, 3).std(axis=0).max() > 0.05


def test_pdf_and_html(demo_run, tmp_path):
    pdf = render_report(demo_run, tmp_path / "r.pdf")
    assert pdf.read_bytes().startswith(b"%PDF")
    page = render_report(demo_run, tmp_path / "r.html", summary_lines=["frames 925"])
    text = page.read_text()
    assert "data:image/png;base64," in text and "frames 925" in text


def test_errors_are_input_errors(demo_run, tmp_path):
    with pytest.raises(InputError, match=r"name the report .png, .pdf or .html"):
        render_report(demo_run, tmp_path / "r.gif")
    with pytest.raises(InputError, match=r"--at=99 s lies outside the replayed times"):
        render_report(demo_run, tmp_path / "r.png", at_s=99.0)
    short = replay_offline(CONFIG, DEMO, window=Window(stop_s=1.0))
    with pytest.raises(InputError, match="kept no SNR"):
        render_report(short, tmp_path / "r.png")


def test_waterfall_bins_average_consecutive_frames():
    t = np.arange(10) * 0.1
    v = np.arange(20, dtype=float).reshape(10, 2)
    edges, rows = waterfall_rows(t, v, max_rows=5)
    assert rows.shape == (5, 2) and edges.size == 6
    assert rows[0].tolist() == [1.0, 2.0]  # mean of frames 0 and 1
    _, low = waterfall_rows(t, v, max_rows=5, how="min")
    assert low[0].tolist() == [0.0, 1.0]


def test_a_stretch_without_frames_is_a_gap_row():
    t = np.array([0.0, 0.1, 0.2, 1.0, 1.1])
    v = np.ones((5, 2))
    edges, rows = waterfall_rows(t, v)
    assert np.isnan(rows[3]).all() and rows.shape == (6, 2)
    assert edges.tolist() == pytest.approx([0.0, 0.1, 0.2, 0.3, 1.0, 1.1, 1.2])
