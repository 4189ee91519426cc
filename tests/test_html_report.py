"""The self-contained HTML report, opened in headless Chromium (tests/browser.py)."""

from __future__ import annotations

import pytest

from browser import loaded_images

from voicer.report.html import Section, figure_png, write_html


def test_report_is_one_file_whose_images_load(tmp_path) -> None:
    """A report with a table and two embedded PNG plots: no reference outside the file
    (every src a data: URI, RFC 2397), and Chromium loads both images at their size."""
    plt = pytest.importorskip("matplotlib.pyplot")
    figs = []
    for k in (1, 2):
        fig, ax = plt.subplots(figsize=(4, 3))
        ax.plot([0, 1, 2], [0, k, 0])
        figs.append((figure_png(fig, dpi=50), f"plot {k}"))
    path = write_html(tmp_path / "report.html", "Evenness <test> & more", [
        Section("Keys", paragraphs=["Two keys."], columns=["key", "brightness"], rows=[[60, 3.2], [61, float("nan")]],
                highlight=frozenset({1}), figures=figs)], caution="Predictions only.")
    text = path.read_text(encoding="utf-8")
    assert "Evenness &lt;test&gt; &amp; more" in text and 'class="flagged"' in text
    assert text.count('src="data:image/png;base64,') == 2 and "http" not in text
    images = loaded_images(path, tmp_path)
    assert [(alt, w, h, done) for alt, w, h, done in images] == [("plot 1", 200, 150, True), ("plot 2", 200, 150, True)]
