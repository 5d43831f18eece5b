"""The self-contained HTML report, opened in headless Chromium over the DevTools pipe."""

from __future__ import annotations

import base64
import io
import re

import numpy as np
import pytest
from _chromium import visit
from matplotlib.figure import Figure
from PIL import Image

from compliant_demo import report
from compliant_demo.exceptions import InvalidInputError

JOINTS = ["shoulder", "elbow"]


def _content(extra_figures: tuple[report.ReportFigure, ...] = ()) -> report.ReportContent:
    t = np.linspace(0.0, 2.0, 150)
    q = np.column_stack([np.sin(t), np.cos(t)])
    kinds = np.array(["impulse", "hold"] * 8)
    figures = (
        report.ReportFigure("schedule", "Schedule", "Stiffness and damping ratio.",
                            report.plot_schedule_checks(t, 30 + 5 * q, 0.6 + 0 * q,
                                                        {"under-damped": t < 0.3}, JOINTS)),
        report.ReportFigure("traces", "Traces", "Replays <per kind>.",
                            report.plot_replay_traces(t, q, {"hold": (t, q * 0.8, (0.5, 1.0))},
                                                      JOINTS)),
        report.ReportFigure("metrics", "Metrics", "Distributions.",
                            report.plot_metric_distributions(
                                {"peak_deviation": np.linspace(0, 1, 16)}, kinds,
                                {"peak_deviation": "peak deviation [rad]"})),
        *extra_figures,
    )
    table = report.ReportTable("Limit violations", ("scenario", "limit"),
                               ((3, "torque <limit> & more"),))
    return report.ReportContent("cork_seat report", (("skill", "cork_seat v1"),), figures,
                                (table,))


def _image_is_blank(png: bytes) -> bool:
    """A figure is blank when (almost) every pixel has the background's value."""
    grey = np.asarray(Image.open(io.BytesIO(png)).convert("L"), dtype=float)
    background = np.median(grey)
    return bool(np.mean(np.abs(grey - background) > 20) < 0.005)


def _embedded_images(page: str) -> list[bytes]:
    return [base64.b64decode(m) for m in re.findall(r'src="data:image/png;base64,([^"]+)"', page)]


def test_page_embeds_every_figure_and_nothing_external(tmp_path):
    files = report.write_report(_content(), tmp_path / "out")
    page = files.html.read_text(encoding="utf-8")
    assert [p.name for p in files.figures] == ["schedule.png", "traces.png", "metrics.png"]
    # The embedded images are exactly the PNG files beside the page.
    assert _embedded_images(page) == [p.read_bytes() for p in files.figures]
    # No reference leaves the file: every src/href is a data: URI or an in-page anchor.
    for reference in re.findall(r'(?:src|href)="([^"]*)"', page):
        assert reference.startswith(("data:", "#")), reference
    assert "<script" not in page
    # Text is escaped, never interpreted as markup.
    assert "torque &lt;limit&gt; &amp; more" in page and "Replays &lt;per kind&gt;." in page
    for caution in report.SAFETY_CAUTIONS:
        assert caution.split(",")[0] in page
    assert "ISO 10218" in page and "ISO/TS 15066" in page


def test_chromium_loads_page_without_errors_and_every_figure_shows(tmp_path):
    files = report.write_report(_content(), tmp_path / "out")
    seen = visit(files.html)
    assert seen.errors == []
    assert seen.title == "cork_seat report"
    external = [u for u in seen.requests if not u.startswith(("data:", "file:"))]
    assert external == []
    assert [img["figure"] for img in seen.images] == ["fig-schedule", "fig-traces", "fig-metrics"]
    for img in seen.images:
        assert img["complete"] and img["width"] > 300 and img["height"] > 150, img
        png = base64.b64decode(img["src"].split(",", 1)[1])
        assert not _image_is_blank(png), img["figure"]
    assert not _image_is_blank(seen.screenshot_png)


def test_blank_figure_check_catches_an_empty_figure(tmp_path):
    # The blank check must be able to fail: an empty figure is caught.
    empty = report.ReportFigure("empty", "Empty", "Nothing drawn.",
                                Figure(figsize=(4, 3), dpi=100))
    files = report.write_report(_content((empty,)), tmp_path / "out")
    blank = [p.name for p in files.figures if _image_is_blank(p.read_bytes())]
    assert blank == ["empty.png"]


def test_chromium_reports_a_broken_image_as_incomplete(tmp_path):
    # The browser check must be able to fail too: a corrupt embedded PNG does not decode.
    page = tmp_path / "broken.html"
    page.write_text('<!DOCTYPE html><html><head><title>b</title></head><body><figure id="x">'
                    '<img src="data:image/png;base64,iVBORw0KGgoAAAA="></figure></body></html>')
    seen = visit(page)
    assert [(img["figure"], img["width"]) for img in seen.images] == [("x", 0)]


def test_duplicate_figure_stems_are_refused(tmp_path):
    content = _content()
    twice = report.ReportContent(content.title, content.summary,
                                 content.figures + content.figures[:1])
    with pytest.raises(InvalidInputError, match=r"figures: stems .*'schedule'.* are not unique"):
        report.write_report(twice, tmp_path / "out")


def test_unwritable_output_directory_is_a_clear_error(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("not a directory")
    with pytest.raises(InvalidInputError, match=r"out_dir = .*file/sub.*cannot create"):
        report.write_report(_content(), blocker / "sub")
