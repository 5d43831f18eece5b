"""Report figures and tables read correctly: the replay legend covers no trace, the estimate's
flags start where the recording does, and table cells show 4 significant digits and units."""

from __future__ import annotations

import numpy as np
from campaign_support import cork_seat_skill
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.patches import Polygon, Rectangle
from store_support import REPO

from compliant_demo import report
from compliant_demo.evaluation import check_schedule
from compliant_demo.plant import load_plant

JOINTS = ["shoulder", "elbow"]


def test_the_replay_legend_sits_outside_every_panel():
    t = np.linspace(0.0, 2.0, 200)
    q = np.column_stack([np.sin(t), 0.5 * np.cos(t)])
    traces = {kind: (t, q + 0.05, (0.4, 0.9)) for kind in ("hold", "impulse", "wall")}
    figure = report.plot_replay_traces(t, q, traces, JOINTS)
    FigureCanvasAgg(figure).draw()
    renderer = figure.canvas.get_renderer()
    assert all(ax.get_legend() is None for ax in figure.axes)
    (legend,) = figure.legends
    labels = [text.get_text() for text in legend.get_texts()]
    assert labels[0] == "perturbation" and "shoulder unperturbed" in labels
    assert len(labels) == len(set(labels)) == 5
    box = legend.get_window_extent(renderer)
    for ax in figure.axes:
        if ax.get_visible():
            assert not box.overlaps(ax.get_window_extent(renderer)), ax.get_title()


def _hatched_spans(ax) -> list[tuple[float, float]]:
    spans = []
    for patch in ax.patches:
        if isinstance(patch, Polygon | Rectangle) and patch.get_hatch() == "..":
            x = patch.get_path().transformed(patch.get_patch_transform()).vertices[:, 0]
            spans.append((float(x.min()), float(x.max())))
    return spans


def test_estimate_and_its_flags_start_where_the_recording_starts():
    t = np.arange(0, 3000) / 1000.0
    estimate = np.full((t.size, 2), 40.0)
    estimate[:500] = np.nan  # the window is still filling: no estimate yet
    latency = 0.337
    figure = report.plot_stiffness_estimate(t, estimate, None, np.isfinite(estimate), JOINTS,
                                            latency_s=latency)  # fmt: skip
    for ax in figure.axes:
        spans = _hatched_spans(ax)
        assert spans, "the unexcited start is hatched"
        assert min(start for start, _ in spans) >= 0.0
        assert spans[0][1] >= 0.5 - latency - 1e-9  # it still covers what was unexcited
        (line,) = [ln for ln in ax.get_lines() if ln.get_label() == "estimate"]
        assert np.min(line.get_xdata()) >= 0.0
        assert ax.get_xlim()[0] == 0.0


def test_flagged_stretches_name_the_unit_of_their_quantity():
    skill = cork_seat_skill()
    plant = load_plant(REPO / "config" / "joint_cork_seat_antagonistic.yaml")
    joints = plant.for_joints(skill.joints)
    rollout = skill.rollout(dt=1e-3, target_inertia=[j.inertia for j in joints])
    checks = check_schedule(rollout, joints, plant.mechanism)
    units = {s.kind: s.unit for s in checks.stretches}
    assert units["under_damped"] == "dimensionless (damping ratio)"
    assert units["stiffness_range"] == "N*m/rad"


def test_table_cells_show_four_significant_digits(tmp_path):
    table = report.ReportTable("Flagged", ("joint", "worst", "unit", "none"),
                               ((("shoulder", 0.011267426135144571, "N*m", None)),))  # fmt: skip
    content = report.ReportContent("t", (("a", "b"),), (), (table,))
    page = report.write_report(content, tmp_path).html.read_text(encoding="utf-8")
    assert "<td>0.01127</td>" in page and "<td>-</td>" in page
    assert "0.011267" not in page
