"""Report figures: labelled axes with units, greyscale-safe line styles, and the error paths."""

from __future__ import annotations

import re

import numpy as np
import pytest

from compliant_demo import report
from compliant_demo.exceptions import InvalidInputError

JOINTS = ["shoulder", "elbow"]
UNIT = re.compile(r"\[[^\]]+\]")


def _signals(n: int = 120) -> tuple[np.ndarray, np.ndarray]:
    t = np.linspace(0.0, 2.0, n)
    return t, np.column_stack([np.sin(t), 0.5 * np.cos(t)])


def _all_figures() -> dict[str, object]:
    rng = np.random.default_rng(7)
    t, q = _signals()
    kinds = np.array(["impulse", "wall", "hold"] * 10)
    return {
        "demos": report.plot_demonstrations(
            [(t, q + 0.02 * rng.standard_normal(q.shape)) for _ in range(3)], t, q,
            np.full_like(q, 0.02), JOINTS),
        "estimate": report.plot_stiffness_estimate(t, 40 + 5 * q, 40 + 4 * q, np.abs(q) > 0.1,
                                                   JOINTS),
        "schedule": report.plot_schedule_checks(
            t, 40 + 5 * q, np.full_like(q, 0.6), {"under-damped": t < 0.5}, JOINTS,
            damping_ratio_floor=0.7),
        "traces": report.plot_replay_traces(
            t, q, {"impulse": (t, q + 0.05, (0.4, 0.5)), "wall": (t, 0.9 * q, None)}, JOINTS),
        "metrics": report.plot_metric_distributions(
            {"goal_error": rng.random(30), "recovery_time": rng.random(30)}, kinds,
            {"goal_error": "goal error [rad]", "recovery_time": "recovery [s]"}),
    }


@pytest.mark.parametrize("name", ["demos", "estimate", "schedule", "traces", "metrics"])
def test_every_visible_axis_has_labels_with_units(name):
    # Labelled axes with units in brackets: the report's own convention (common practice).
    figure = _all_figures()[name]
    visible = [ax for ax in figure.axes if ax.get_visible()]
    assert visible
    for ax in visible:
        assert UNIT.search(ax.get_ylabel()), ax.get_ylabel()
        assert ax.get_xlabel(), "x axis without a label"
        assert UNIT.search(ax.get_xlabel()) or ax.get_xlabel() == "perturbation kind"


@pytest.mark.parametrize("name", ["demos", "estimate", "schedule", "traces"])
def test_labelled_lines_differ_without_colour(name):
    # Greyscale readability: two labelled lines in one panel never share both dash pattern and
    # marker, so they stay apart when printed in black and white (common practice).
    for ax in _all_figures()[name].axes:
        styles = [
            (str(line.get_linestyle()), str(line.get_marker()))
            for line in ax.get_lines()
            if not line.get_label().startswith("_") and "threshold" not in line.get_label()
        ]
        assert len(styles) == len(set(styles)), (name, styles)


def test_flagged_stretches_are_hatched_once_per_flag():
    t, q = _signals()
    mask = (t > 0.5) & (t < 0.8) | (t > 1.5)
    figure = report.plot_schedule_checks(t, 40 + q, 0.5 + 0 * q, {"energy-injecting": mask},
                                         JOINTS)
    stiffness_axis = figure.axes[0]
    spans = [p for p in stiffness_axis.patches if p.get_hatch()]
    assert len(spans) == 2  # two separate stretches
    labels = [h.get_label() for h in stiffness_axis.get_legend().legend_handles]
    assert labels.count("flagged: energy-injecting") == 1


def test_joint_names_must_match_columns():
    t, q = _signals()
    with pytest.raises(InvalidInputError, match=r"joint_names = \['shoulder'\]: mean_q has 2"):
        report.plot_demonstrations([(t, q)], t, q, 0 * q, ["shoulder"])


def test_traces_must_not_be_empty():
    t, q = _signals()
    with pytest.raises(InvalidInputError, match="traces: no perturbed replay"):
        report.plot_replay_traces(t, q, {}, JOINTS)


def test_metric_shape_must_match_kinds():
    with pytest.raises(InvalidInputError, match=r"metrics\['goal_error'\]: shape \(3,\)"):
        report.plot_metric_distributions({"goal_error": np.zeros(3)}, np.array(["a", "b"]),
                                         {"goal_error": "goal error [rad]"})


def test_metrics_must_not_be_empty():
    with pytest.raises(InvalidInputError, match="metrics: nothing to draw"):
        report.plot_metric_distributions({}, np.array(["a"]), {})


def test_arrays_must_be_two_dimensional():
    t, q = _signals()
    with pytest.raises(InvalidInputError, match=r"estimated: expected \(n_samples, n_joints\)"):
        report.plot_stiffness_estimate(t, np.zeros((2, 2, 2)), q, q > 0, JOINTS)


def test_a_metric_without_any_finite_value_is_said_not_drawn():
    # e.g. recovery times when no scenario recovered within the band
    figure = report.plot_metric_distributions({"recovery": np.full(4, np.nan)},
                                              np.array(["hold", "wall"] * 2),
                                              {"recovery": "recovery [s]"})
    texts = [t.get_text() for t in figure.axes[0].texts]
    assert texts == ["no finite value in any scenario"]
    assert not figure.axes[0].patches
