"""The HTML report: matplotlib figures saved as PNG files beside one self-contained HTML page.

Each figure is drawn by its own function from plain arrays, on a fresh Agg figure (no pyplot
state), with labelled axes in SI units and a greyscale-safe style: lines differ by dash pattern
and marker, bands by hatching, so the report stays readable printed in black and white. The page
embeds every PNG as base64 and carries its own CSS; it loads nothing from outside and runs no
script. :func:`write_report` turns a :class:`ReportContent` into the files; building the content
from a store is :func:`compliant_demo.app.report_content.collect_report_content`.
"""

from __future__ import annotations

import base64
import html
import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
from cycler import cycler
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse

from compliant_demo import __version__
from compliant_demo.cautions import SAFETY_CAUTION
from compliant_demo.display import format_value
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.readiness import Reason, Verdict

__all__ = [
    "SAFETY_CAUTIONS",
    "ReportFigure",
    "ReportTable",
    "ReportContent",
    "ReportFiles",
    "plot_demonstrations",
    "plot_stiffness_estimate",
    "plot_schedule_checks",
    "plot_task_space",
    "plot_replay_traces",
    "plot_metric_distributions",
    "write_report",
]

#: The page's cautions: the one caution every summary carries, then what this report rests on.
SAFETY_CAUTIONS: tuple[str, ...] = (
    SAFETY_CAUTION,
    "This report comes from a simulation of the joint: limits, metrics and flags here are only "
    "as good as the joint and mechanism parameters the simulation was given; check them "
    "against the real hardware before trusting any number.",
)

# Black, dark and mid grey, each with its own dash pattern and marker: distinct without colour.
_LINE_CYCLE = cycler(
    color=["0.0", "0.35", "0.55", "0.15", "0.45"],
    linestyle=["-", "--", ":", "-.", (0, (5, 1, 1, 1))],
    marker=["o", "s", "^", "D", "v"],
)
_HATCHES = ("//", "\\\\", "xx", "..", "++", "--", "||", "oo", "**")
_DPI = 100


def _new_figure(n_rows: int, n_cols: int = 1, *, width: float = 8.0, row_height: float = 2.6):
    figure = Figure(figsize=(width, row_height * n_rows), dpi=_DPI, layout="constrained")
    axes = figure.subplots(n_rows, n_cols, squeeze=False)
    for ax in axes.flat:
        ax.set_prop_cycle(_LINE_CYCLE)
        ax.grid(True, color="0.85", linewidth=0.6)
    return figure, axes


def _label(ax, xlabel: str, ylabel: str, *, legend: bool = True) -> None:
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if legend:
        ax.legend(loc="best", fontsize="small")


def _markevery(n: int) -> int:
    return max(1, n // 12)


def _check_joint_names(joint_names: Sequence[str], n_joints: int, field_name: str) -> None:
    if len(joint_names) != n_joints:
        raise InvalidInputError(
            f"joint_names = {list(joint_names)!r}: {field_name} has {n_joints} joints"
        )


def _as_2d(values: np.ndarray, name: str) -> np.ndarray:
    array = np.asarray(values, dtype=float)
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim != 2:
        raise InvalidInputError(f"{name}: expected (n_samples, n_joints), got shape {array.shape}")
    return array


def _shade_mask(ax, t: np.ndarray, mask: np.ndarray, *, hatch: str, label: str) -> None:
    """Hatch every stretch of ``t`` where ``mask`` is true; one legend entry for all of them."""
    mask = np.asarray(mask, dtype=bool)
    if not mask.any():
        return
    edges = np.flatnonzero(np.diff(np.concatenate([[0], mask.astype(np.int8), [0]])))
    for number, (start, stop) in enumerate(zip(edges[::2], edges[1::2], strict=True)):
        ax.axvspan(
            t[start],
            t[min(stop, len(t) - 1)],
            facecolor="none",
            edgecolor="0.5",
            hatch=hatch,
            linewidth=0.0,
            label=label if number == 0 else None,
        )


def plot_demonstrations(
    demonstrations: Sequence[tuple[np.ndarray, np.ndarray]],
    mean_t: np.ndarray,
    mean_q: np.ndarray,
    std_q: np.ndarray,
    joint_names: Sequence[str],
) -> Figure:
    """Demonstrations overlaid with their aligned mean and a +-2 standard deviation band.

    Parameters
    ----------
    demonstrations : sequence of ``(t, q)``; t : (n_samples,) s, q : (n_samples, n_joints) rad
    mean_t : (n_aligned,) array, s (aligned time)
    mean_q : (n_aligned, n_joints) array, rad
    std_q : (n_aligned, n_joints) array, rad
    joint_names : one name per joint
    """
    mean_q, std_q = _as_2d(mean_q, "mean_q"), _as_2d(std_q, "std_q")
    _check_joint_names(joint_names, mean_q.shape[1], "mean_q")
    figure, axes = _new_figure(mean_q.shape[1])
    for j, (ax, name) in enumerate(zip(axes[:, 0], joint_names, strict=True)):
        for number, (t, q) in enumerate(demonstrations):
            ax.plot(
                t,
                _as_2d(q, "q")[:, j],
                color="0.6",
                linestyle="-",
                marker="",
                linewidth=0.8,
                label="demonstrations" if number == 0 else None,
            )
        ax.fill_between(
            mean_t,
            mean_q[:, j] - 2 * std_q[:, j],
            mean_q[:, j] + 2 * std_q[:, j],
            facecolor="none",
            edgecolor="0.3",
            hatch="///",
            linewidth=0.0,
            label="aligned mean +- 2 std",
        )
        ax.plot(mean_t, mean_q[:, j], color="0.0", linestyle="--", marker="o",
                markevery=_markevery(len(mean_t)), linewidth=1.8, label="aligned mean")
        _label(ax, "time [s] (demonstrations: own time; mean: aligned time)",
               f"{name} angle [rad]")
    figure.suptitle("Demonstrations, aligned mean and spread")
    return figure


def plot_stiffness_estimate(
    t: np.ndarray,
    estimated: np.ndarray,
    ground_truth: np.ndarray | None,
    excited: np.ndarray,
    joint_names: Sequence[str],
    latency_s: float = 0.0,
) -> Figure:
    """Estimated stiffness against the teacher's ground truth, with the excitation flags.

    Parameters
    ----------
    t : (n_samples,) array, s
    estimated : (n_samples, n_joints) array, N*m/rad (NaN where the estimator gave no value)
    ground_truth : (n_samples, n_joints) array, N*m/rad, or None when the truth is unknown
    excited : (n_samples, n_joints) bool array, True where the estimator saw enough excitation
    joint_names : one name per joint
    latency_s : float, s
        How far the estimate trails what it describes (the recorder's ``stiffness_latency_s``);
        the estimate and its flags are drawn that much earlier, at the time they describe.
    """
    t = np.asarray(t, dtype=float)
    estimated = _as_2d(estimated, "estimated")
    excited = np.asarray(excited, dtype=bool).reshape(estimated.shape)
    _check_joint_names(joint_names, estimated.shape[1], "estimated")
    # Advanced by the latency, the first estimates describe times before the recording began:
    # nothing was recorded there, so neither the estimate nor its flags are drawn before t[0].
    shifted = t - latency_s
    kept = shifted >= t[0] if t.size else np.zeros(0, dtype=bool)
    figure, axes = _new_figure(estimated.shape[1])
    for j, (ax, name) in enumerate(zip(axes[:, 0], joint_names, strict=True)):
        if ground_truth is not None:
            ax.plot(t, _as_2d(ground_truth, "ground_truth")[:, j], color="0.0", linestyle="-",
                    marker="", linewidth=1.6, label="teacher ground truth")
        ax.plot(shifted[kept], estimated[kept, j], color="0.35", linestyle="--", marker="s",
                markevery=_markevery(int(kept.sum())), linewidth=1.0, label="estimate")
        _shade_mask(ax, shifted[kept], np.logical_not(excited[kept, j]), hatch="..",
                    label="too little excitation")
        if t.size:
            ax.set_xlim(t[0], t[-1])
        _label(ax, "time [s]", f"{name} stiffness [N*m/rad]")
    figure.suptitle("Stiffness estimate against the teacher's ground truth")
    return figure


def plot_schedule_checks(
    t: np.ndarray,
    stiffness: np.ndarray,
    damping_ratio: np.ndarray,
    flags: Mapping[str, np.ndarray],
    joint_names: Sequence[str],
    *,
    damping_ratio_floor: float | None = None,
) -> Figure:
    """The learned stiffness and the damping ratio along the skill, with flagged stretches.

    Parameters
    ----------
    t : (n_samples,) array, s
    stiffness : (n_samples, n_joints) array, N*m/rad
    damping_ratio : (n_samples, n_joints) array, dimensionless
    flags : name -> (n_samples,) or (n_samples, n_joints) bool array (e.g. ``"under-damped"``);
        a stretch is hatched where any joint is flagged, one hatch pattern per flag
    joint_names : one name per joint
    damping_ratio_floor : draw the under-damping threshold at this ratio
    """
    stiffness = _as_2d(stiffness, "stiffness")
    damping_ratio = _as_2d(damping_ratio, "damping_ratio")
    _check_joint_names(joint_names, stiffness.shape[1], "stiffness")
    figure, axes = _new_figure(2, row_height=3.0)
    ax_k, ax_z = axes[0, 0], axes[1, 0]
    every = _markevery(len(t))
    for j, name in enumerate(joint_names):
        ax_k.plot(t, stiffness[:, j], markevery=every, label=name)
        ax_z.plot(t, damping_ratio[:, j], markevery=every, label=name)
    if damping_ratio_floor is not None:
        ax_z.axhline(damping_ratio_floor, color="0.0", linestyle=(0, (1, 1)), linewidth=1.0,
                     label=f"under-damping threshold {damping_ratio_floor:g}")
    for number, (flag_name, mask) in enumerate(flags.items()):
        mask = np.asarray(mask, dtype=bool)
        any_joint = np.asarray(mask.any(axis=1) if mask.ndim == 2 else mask)
        for ax in (ax_k, ax_z):
            _shade_mask(ax, t, any_joint, hatch=_HATCHES[number % len(_HATCHES)],
                        label=f"flagged: {flag_name}")
    _label(ax_k, "time along the skill [s]", "stiffness [N*m/rad]")
    _label(ax_z, "time along the skill [s]", "damping ratio [-]")
    figure.suptitle("Learned stiffness and damping ratio along the skill")
    return figure


def plot_task_space(
    path: np.ndarray,
    sample_index: np.ndarray,
    stiffness: np.ndarray,
    singular: np.ndarray,
    *,
    axis_names: tuple[str, str] = ("first plane axis", "second plane axis"),
) -> Figure:
    """End-effector path and, at samples along it, the Cartesian stiffness ellipse.

    Parameters
    ----------
    path : (n_samples, 2) array, m, in the plane of motion
    sample_index : (n_ellipses,) int array, samples of ``path`` that carry an ellipse
    stiffness : (n_ellipses, 2, 2) array, N/m (NaN where singular)
    singular : (n_ellipses,) bool; drawn as a cross with a note instead of an ellipse
    axis_names : the plane's axes, for the axis labels

    Notes
    -----
    Each ellipse's semi-axes lie along the eigenvectors of K_x and are proportional to its
    eigenvalues (the force for a unit displacement in that direction), on one scale for all
    (the median ellipse's long axis a tenth of the path's extent); an ellipse longer than a
    quarter of the extent (near a singular configuration) is shrunk to that, its shape kept.
    """
    path = np.asarray(path, dtype=float)
    index = np.asarray(sample_index, dtype=int)
    stiffness = np.asarray(stiffness, dtype=float)
    singular = np.asarray(singular, dtype=bool)
    if path.ndim != 2 or path.shape[1] != 2:
        raise InvalidInputError(f"path: expected (n_samples, 2), got shape {path.shape}")
    if stiffness.shape != (index.size, 2, 2) or singular.shape != (index.size,):
        raise InvalidInputError(
            f"stiffness: shape {stiffness.shape} and singular: shape {singular.shape}, "
            f"expected ({index.size}, 2, 2) and ({index.size},) for {index.size} samples"
        )
    figure, axes = _new_figure(1, row_height=5.0, width=6.5)
    ax = axes[0, 0]
    ax.plot(path[:, 0], path[:, 1], color="0.0", linestyle="-", marker="",
            label="end-effector path")
    ax.plot(path[0, 0], path[0, 1], color="0.0", linestyle="", marker="o", label="start")
    extent = float(np.ptp(path, axis=0).max()) or 0.05
    regular = ~singular
    if regular.any():
        eigen = [np.linalg.eigh(k) for k in stiffness[regular]]
        scale = 0.1 * extent / float(np.median([w[1] for w, _ in eigen]))
        for number, (i, (w, v)) in enumerate(zip(index[regular], eigen, strict=True)):
            angle = float(np.degrees(np.arctan2(v[1, 1], v[0, 1])))
            size = min(scale, 0.25 * extent / w[1])
            ax.add_patch(Ellipse(tuple(path[i]), 2 * size * w[1], 2 * size * w[0],
                                 angle=angle, facecolor="none", edgecolor="0.3", hatch="..",
                                 label="stiffness ellipse K_x" if number == 0 else None))
    if singular.any():
        ax.plot(path[index[singular], 0], path[index[singular], 1], color="0.0", linestyle="",
                marker="x", markersize=9,
                label="singular: J^-1 does not exist, no ellipse")
    ax.set_aspect("equal", adjustable="datalim")
    _label(ax, f"{axis_names[0]} [m]", f"{axis_names[1]} [m]")
    figure.suptitle("End-effector path and stiffness ellipses K_x = J^-T K_q J^-1")
    return figure


def plot_replay_traces(
    nominal_t: np.ndarray,
    nominal_q: np.ndarray,
    traces: Mapping[str, tuple[np.ndarray, np.ndarray, tuple[float, float] | None]],
    joint_names: Sequence[str],
) -> Figure:
    """One panel per perturbation kind: a perturbed replay against the unperturbed rollout.

    Parameters
    ----------
    nominal_t : (n_samples,) array, s
    nominal_q : (n_samples, n_joints) array, rad (unperturbed replay)
    traces : kind -> ``(t, q, window)``; t : (n,) s, q : (n, n_joints) rad, window the
        perturbation's ``(onset, end)`` in s or None
    joint_names : one name per joint
    """
    if not traces:
        raise InvalidInputError("traces: no perturbed replay to draw")
    nominal_q = _as_2d(nominal_q, "nominal_q")
    _check_joint_names(joint_names, nominal_q.shape[1], "nominal_q")
    n_cols = 2
    n_rows = math.ceil(len(traces) / n_cols)
    figure, axes = _new_figure(n_rows, n_cols, width=10.0, row_height=2.8)
    for ax, (kind, (t, q, window)) in zip(axes.flat, traces.items(), strict=False):
        q = _as_2d(q, f"traces[{kind!r}].q")
        if window is not None:
            ax.axvspan(window[0], window[1], facecolor="0.93", edgecolor="0.6", hatch="..",
                       linewidth=0.0, zorder=0, label="perturbation")
        for j, name in enumerate(joint_names):
            ax.plot(t, q[:, j], color="0.0" if j == 0 else "0.3",
                    linestyle="-" if j == 0 else "--", marker="os"[j % 2],
                    markevery=_markevery(len(t)), linewidth=1.2, label=f"{name} perturbed")
            # Drawn on top, so the reference stays visible where the two coincide.
            ax.plot(nominal_t, nominal_q[:, j], color="0.6", linestyle=":", marker=" x"[j % 2],
                    markevery=_markevery(len(nominal_t)), linewidth=1.6, zorder=3,
                    label=f"{name} unperturbed")
        ax.set_title(kind, fontsize="medium")
        _label(ax, "time [s]", "angle [rad]", legend=False)
    for ax in list(axes.flat)[len(traces):]:
        ax.set_visible(False)
    # One legend for every panel, below them: inside a panel it would cover its traces.
    handles, labels = _legend_entries(axes.flat)
    figure.legend(handles, labels, loc="outside lower center", ncols=min(len(labels), 3),
                  fontsize="small")
    figure.suptitle("Replay under each perturbation kind against the unperturbed replay")
    return figure


def _legend_entries(axes) -> tuple[list, list[str]]:
    """Each distinct labelled artist of ``axes`` once, in drawing order."""
    entries: dict[str, object] = {}
    for ax in axes:
        for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
            entries.setdefault(label, handle)
    return list(entries.values()), list(entries)


def plot_metric_distributions(
    metrics: Mapping[str, np.ndarray],
    kinds: np.ndarray,
    labels: Mapping[str, str],
) -> Figure:
    """Box plots of campaign metrics per perturbation kind, one panel per metric.

    Parameters
    ----------
    metrics : metric name -> (n_scenarios,) array (NaN where the metric does not apply)
    kinds : (n_scenarios,) array of perturbation kind names
    labels : metric name -> axis label with its unit in brackets (``"goal error [rad]"``)
    """
    if not metrics:
        raise InvalidInputError("metrics: nothing to draw")
    kinds = np.asarray(kinds)
    kind_names = sorted(set(kinds.tolist()))
    n_cols = 2
    figure, axes = _new_figure(math.ceil(len(metrics) / n_cols), n_cols, width=10.0, row_height=3.0)
    for ax, (name, values) in zip(axes.flat, metrics.items(), strict=False):
        values = np.asarray(values, dtype=float)
        if values.shape != kinds.shape:
            raise InvalidInputError(
                f"metrics[{name!r}]: shape {values.shape} differs from kinds {kinds.shape}"
            )
        groups = [values[(kinds == k) & np.isfinite(values)] for k in kind_names]
        positions = [i for i, g in enumerate(groups) if g.size]
        if positions:
            boxes = ax.boxplot(
                [groups[i] for i in positions],
                positions=positions,
                widths=0.6,
                patch_artist=True,
                medianprops={"color": "0.0", "linewidth": 1.5},
                flierprops={"marker": "x", "markeredgecolor": "0.3", "markersize": 4},
            )
            for number, box in enumerate(boxes["boxes"]):
                box.set(facecolor="white", edgecolor="0.0",
                        hatch=_HATCHES[number % len(_HATCHES)])
        else:
            ax.text(0.5, 0.5, "no finite value in any scenario", transform=ax.transAxes,
                    ha="center", va="center")
        ax.set_xticks(range(len(kind_names)), kind_names, rotation=30, ha="right",
                      fontsize="small")
        ax.set_xlim(-0.6, len(kind_names) - 0.4)
        ax.set_ylabel(labels.get(name, f"{name} [-]"), fontsize="small")
        ax.set_xlabel("perturbation kind")
    for ax in list(axes.flat)[len(metrics):]:
        ax.set_visible(False)
    figure.suptitle("Campaign outcome metrics per perturbation kind")
    return figure


@dataclass(frozen=True)
class ReportFigure:
    """One figure of the report: a file stem, a heading, a caption and the drawn figure."""

    stem: str
    title: str
    caption: str
    figure: Figure


@dataclass(frozen=True)
class ReportTable:
    """A table of the report; ``rows`` are sequences of cells in ``columns`` order, and
    ``row_ids`` (empty, or one per row) the HTML ids the verdict's reasons link to."""

    title: str
    columns: tuple[str, ...]
    rows: tuple[tuple[object, ...], ...]
    caption: str = ""
    empty_text: str = "none"
    row_ids: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.row_ids and len(self.row_ids) != len(self.rows):
            raise InvalidInputError(f"row_ids: {len(self.row_ids)} ids for {len(self.rows)} rows "
                                    f"of table {self.title!r}")


@dataclass(frozen=True)
class ReportContent:
    """Everything a report shows, in order: the readiness verdict, cautions, summary facts,
    figures, tables."""

    title: str
    summary: tuple[tuple[str, str], ...]
    figures: tuple[ReportFigure, ...]
    tables: tuple[ReportTable, ...] = ()
    verdict: Verdict | None = None
    cautions: tuple[str, ...] = SAFETY_CAUTIONS
    created: str = field(
        default_factory=lambda: datetime.now(UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    )


@dataclass(frozen=True)
class ReportFiles:
    """Paths written by :func:`write_report`: the HTML page and one PNG per figure."""

    html: Path
    figures: tuple[Path, ...]


_CSS = """
body { font-family: sans-serif; max-width: 62rem; margin: 1.5rem auto; padding: 0 1rem;
       color: #111; background: #fff; line-height: 1.45; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; margin-top: 2rem;
     border-bottom: 1px solid #888; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto; border: 1px solid #ccc; }
figcaption { font-size: 0.9rem; color: #333; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #777; padding: 0.2rem 0.5rem; text-align: left; }
th { background: #eee; }
.cautions, .verdict { border: 2px solid #000; padding: 0.5rem 1rem; }
.cautions h2, .verdict h2 { margin-top: 0.5rem; }
.verdict { border-width: 4px; }
"""


def _span_text(reason: Reason) -> str:
    if reason.from_s is None or reason.to_s is None:
        return ""
    return f", {reason.from_s:.3g} to {reason.to_s:.3g} s"


def _verdict_html(verdict: Verdict) -> str:
    """The verdict and its reasons, each linking to the stretch or scenario it comes from."""
    heading = "ready" if verdict.ready else "NOT READY"
    items = "".join(
        f'<li><a href="#{html.escape(r.link)}">{html.escape(r.check)}'
        f"{html.escape('' if r.joint is None else ' on ' + r.joint)}"
        f"{html.escape(_span_text(r))}</a>: {html.escape(format_value(r.value))} against "
        f"{html.escape(format_value(r.threshold))} {html.escape(r.unit)}. "
        f"{html.escape(r.detail)}</li>"
        for r in verdict.reasons
    )
    body = (f"<ol>{items}</ol>" if items else
            "<p>Every acceptance criterion was met in simulation.</p>")
    return (f'<section class="verdict" id="verdict"><h2>Readiness verdict: {heading}</h2>'
            f"<p>Reasons, most severe first; each links to the stretch or scenario it comes "
            f"from.</p>{body}</section>")


def _table_html(table: ReportTable) -> str:
    head = "".join(f"<th>{html.escape(c)}</th>" for c in table.columns)
    if table.rows:
        ids = table.row_ids or ("",) * len(table.rows)
        body = "".join(
            (f'<tr id="{html.escape(row_id)}">' if row_id else "<tr>")
            + "".join(f"<td>{html.escape(format_value(v))}</td>" for v in row) + "</tr>"
            for row_id, row in zip(ids, table.rows, strict=True)
        )
    else:
        body = f'<tr><td colspan="{len(table.columns)}">{html.escape(table.empty_text)}</td></tr>'
    caption = f"<p>{html.escape(table.caption)}</p>" if table.caption else ""
    return (
        f"<h2>{html.escape(table.title)}</h2>{caption}"
        f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
    )


def write_report(content: ReportContent, out_dir: str | Path) -> ReportFiles:
    """Save each figure as ``<stem>.png`` in ``out_dir`` and the page as ``report.html``.

    Parameters
    ----------
    content : what to show
    out_dir : directory for the files; created if missing

    Returns
    -------
    ReportFiles
    """
    out_dir = Path(out_dir)
    stems = [f.stem for f in content.figures]
    if len(set(stems)) != len(stems):
        raise InvalidInputError(f"figures: stems {stems!r} are not unique")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InvalidInputError(
            f"out_dir = {str(out_dir)!r}: cannot create ({exc.strerror})"
        ) from None
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{html.escape(content.title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(content.title)}</h1>",
        f"<p>Written {html.escape(content.created)} by compliant_demo {__version__}.</p>",
        "" if content.verdict is None else _verdict_html(content.verdict),
        '<section class="cautions"><h2>Safety cautions</h2><ul>',
        *(f"<li>{html.escape(c)}</li>" for c in content.cautions),
        "</ul></section>",
        "<h2>Summary</h2><table><tbody>",
        *(
            f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>"
            for k, v in content.summary
        ),
        "</tbody></table>",
    ]
    paths = []
    for item in content.figures:
        buffer = io.BytesIO()
        item.figure.savefig(buffer, format="png", dpi=_DPI)
        png = buffer.getvalue()
        path = out_dir / f"{item.stem}.png"
        path.write_bytes(png)
        paths.append(path)
        encoded = base64.b64encode(png).decode("ascii")
        parts.append(
            f'<h2>{html.escape(item.title)}</h2><figure id="fig-{html.escape(item.stem)}">'
            f'<img src="data:image/png;base64,{encoded}" alt="{html.escape(item.title)}">'
            f"<figcaption>{html.escape(item.caption)}</figcaption></figure>"
        )
    parts.extend(_table_html(table) for table in content.tables)
    parts.append("</body></html>")
    html_path = out_dir / "report.html"
    html_path.write_text("\n".join(parts), encoding="utf-8")
    return ReportFiles(html=html_path, figures=tuple(paths))
