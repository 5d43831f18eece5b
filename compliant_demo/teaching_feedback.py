"""Live feedback while teaching: is the demonstration being recorded worth keeping?

Two figures are followed while a demonstration is recorded, and a demonstration is advised to
be taken again when either misses its threshold:

* **excitation**: the share of the online estimator's settled windows that gave a stiffness
  estimate so far (:meth:`SlidingStiffnessEstimator.summary_flags`); a poorly excited
  demonstration leaves the stiffness profile without data.
* **deviation from the others**: once earlier complete demonstrations of the same skill and tags
  exist, their DTW-aligned mean (:func:`compliant_demo.alignment.align_demonstrations`) is the
  reference path, and the demonstration so far is matched against it by open-end dynamic time
  warping (:class:`OpenEndTracker`): the end of the best path gives the phase reached along the
  mean, and its cost the RMS distance (rad) between the demonstration and the mean.

:class:`LiveFeedback` is the recorder's observer (see :class:`compliant_demo.ingest.ChunkWriter`):
it is fed stored chunks in the writer thread, prepares the reference path in a thread of its own
(loading and aligning never hold up the store writer), and reports on request
(:meth:`LiveFeedback.report`). :func:`advice` turns a report's key-values, as published by the
recorder, into the line the ``teaching-watch`` command prints.
"""

from __future__ import annotations

import json
import math
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from compliant_demo.alignment import align_demonstrations, resample
from compliant_demo.display import printable
from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "TRACK_RATE_HZ",
    "FeedbackSettings",
    "OpenEndTracker",
    "ReferencePath",
    "reference_path",
    "earlier_demonstrations",
    "FeedbackReport",
    "LiveFeedback",
    "RecentIds",
    "advice",
    "progress",
]

#: Rate at which the demonstration is matched against the reference path, Hz.
TRACK_RATE_HZ = 50.0
# Least tracked time before the deviation is judged while recording, s.
_MIN_TRACKED_S = 0.5


@dataclass(frozen=True)
class FeedbackSettings:
    """Thresholds of the advice.

    Parameters
    ----------
    min_excited_fraction : float in [0, 1]
        Least share of the estimator's settled windows with an estimate.
    max_deviation_rad : float, rad
        Largest RMS distance from the earlier demonstrations' aligned mean.
    max_references : int
        Most earlier demonstrations (the latest ones) that form the mean.
    """

    min_excited_fraction: float = 0.6
    max_deviation_rad: float = 0.05
    max_references: int = 10

    def __post_init__(self) -> None:
        if not 0.0 <= self.min_excited_fraction <= 1.0:
            raise InvalidInputError(
                f"min_excited_fraction = {self.min_excited_fraction}: must be in [0, 1]"
            )
        if not (math.isfinite(self.max_deviation_rad) and self.max_deviation_rad > 0):
            raise InvalidInputError(
                f"max_deviation_rad = {self.max_deviation_rad}: must be a positive number of rad"
            )
        if not (isinstance(self.max_references, int) and self.max_references >= 1):
            raise InvalidInputError(f"max_references = {self.max_references!r}: must be >= 1")


class OpenEndTracker:
    """Online open-end dynamic time warping of a growing stream against a reference path.

    Parameters
    ----------
    reference : (m, n_joints) array, rad
        The reference path (the aligned mean), sampled at the rate the stream is fed.

    Notes
    -----
    Open-end DTW (Tormene, Giorgino, Quaglini and Stefanelli, Artificial Intelligence in Medicine
    45(1), 2009; from memory) matches the whole stream so far against the best *prefix* of the
    reference. With the asymmetric step pattern (Sakoe and Chiba, IEEE Trans. ASSP 26(1), 1978)
    ``D[i, j] = c(i, j) + min(D[i-1, j], D[i-1, j-1], D[i-1, j-2])`` every stream sample enters
    each path exactly once, so the costs of all prefixes are comparable: the phase is
    ``argmin_j D[i, j] / (m - 1)`` and ``sqrt(min_j D[i, j] / (i + 1))`` the RMS distance along the
    best path. ``c`` is the squared Euclidean distance over joints. Only the last row of ``D`` is
    kept: each sample costs O(m). The stream may run at most twice as fast as the reference.
    """

    def __init__(self, reference: object) -> None:
        path = np.asarray(reference, dtype=float)
        if path.ndim != 2 or path.shape[0] < 2 or not np.isfinite(path).all():
            raise InvalidInputError(
                f"reference: expected a finite (m >= 2, n_joints) array, got shape {path.shape}"
            )
        self.reference = path
        self.count = 0
        self._row = np.full(path.shape[0], np.inf)
        self._local = np.full(path.shape[0], np.inf)

    def update(self, samples: object) -> None:
        """Feed stream samples, (n, n_joints) rad, in time order."""
        values = np.atleast_2d(np.asarray(samples, dtype=float))
        if values.shape[1:] != self.reference.shape[1:] or not np.isfinite(values).all():
            raise InvalidInputError(
                f"samples: expected finite (n, {self.reference.shape[1]}) values, got shape "
                f"{values.shape}"
            )
        for sample in values:
            self._local = np.sum((self.reference - sample) ** 2, axis=1)
            if self.count == 0:
                best = np.full_like(self._row, np.inf)
                best[0] = 0.0
            else:
                best = self._row.copy()
                best[1:] = np.minimum(best[1:], self._row[:-1])
                best[2:] = np.minimum(best[2:], self._row[:-2])
            self._row = self._local + best
            self.count += 1

    def _end(self) -> int:
        return int(np.argmin(self._row))

    @property
    def phase(self) -> float:
        """Phase reached along the reference, 0 to 1 (0 before the first sample)."""
        return self._end() / (self.reference.shape[0] - 1) if self.count else 0.0

    @property
    def rms_deviation(self) -> float:
        """RMS distance between the stream and the reference along the best path, rad."""
        return math.sqrt(float(self._row.min()) / self.count) if self.count else math.nan

    @property
    def deviation(self) -> float:
        """Distance of the newest sample from the reference at the phase reached, rad."""
        return math.sqrt(float(self._local[self._end()])) if self.count else math.nan


def _decimate(t: np.ndarray, position: np.ndarray, start_s: float) -> tuple[np.ndarray, float]:
    """Samples of (t, position) at or after each tick of the tracking rate from ``start_s``;
    returns them and the next tick."""
    ticks = np.floor((t - start_s) * TRACK_RATE_HZ + 1e-9)
    keep = (ticks >= 0) & np.concatenate([[True], np.diff(ticks) > 0])
    if not keep.any():
        return np.empty((0, position.shape[1])), start_s
    last = float(ticks[keep][-1])
    return position[keep], start_s + (last + 1.0) / TRACK_RATE_HZ


@dataclass(frozen=True)
class ReferencePath:
    """The earlier demonstrations' aligned mean at the tracking rate, and how far they lie from
    it themselves.

    Attributes
    ----------
    mean : (m, n_joints) array, rad
    count : int, earlier demonstrations
    others_rms_deviation : (count,) array, rad
        Each earlier demonstration's own RMS distance from the mean (:class:`OpenEndTracker`).
    """

    mean: np.ndarray
    count: int
    others_rms_deviation: np.ndarray


def _tracked_rms(mean: np.ndarray, t: np.ndarray, position: np.ndarray) -> float:
    tracker = OpenEndTracker(mean)
    tracker.update(_decimate(t - t[0], position, 0.0)[0])
    return tracker.rms_deviation


def reference_path(demonstrations: Sequence[tuple[object, object]]) -> ReferencePath:
    """The reference path of earlier demonstrations given as ``(t, position)`` pairs (s, rad).

    The demonstrations are aligned by DTW (Sakoe-Chiba band 0.1) and their mean resampled to
    :data:`TRACK_RATE_HZ` over their mean duration.
    """
    if not demonstrations:
        raise InvalidInputError("demonstrations: need at least one earlier demonstration")
    demos = [(np.asarray(t, dtype=float), np.asarray(q, dtype=float)) for t, q in demonstrations]
    if len(demos) == 1:
        t, mean = demos[0]
        duration = float(t[-1] - t[0])
    else:
        aligned = align_demonstrations(demos, band=0.1)
        t, mean, duration = aligned.time, aligned.mean, float(aligned.time[-1])
    n_points = max(2, int(round(duration * TRACK_RATE_HZ)) + 1)
    _, path = resample(t, mean, n_points)
    others = np.array([_tracked_rms(path, t_i, q_i) for t_i, q_i in demos])
    return ReferencePath(path, len(demos), others)


def earlier_demonstrations(
    store: Any, skill: str, tags: Sequence[str], joints: Sequence[str], limit: int
) -> list[tuple[np.ndarray, np.ndarray]]:
    """``(t, position)`` of the latest ``limit`` complete demonstrations of ``skill`` carrying
    every tag in ``tags``, for ``joints`` (those lacking one of them are left out), thinned to
    about twice the tracking rate."""
    found = store.find_demonstrations(skill=skill, tag=list(tags) or None, status="complete",
                                      order_by="-start_time")
    result: list[tuple[np.ndarray, np.ndarray]] = []
    for info in found:
        if len(result) >= limit:
            break
        if not set(joints) <= set(info.joints) or info.n_samples < 2:
            continue
        demo = store.load_demonstration(info.id, joints=list(joints))
        rate = (demo.t.size - 1) / max(float(demo.t[-1] - demo.t[0]), 1e-9)
        step = max(1, int(rate / (2 * TRACK_RATE_HZ)))
        result.append((np.array(demo.t[::step]), np.array(demo.position[::step])))
    return result[::-1]


@dataclass(frozen=True)
class FeedbackReport:
    """What is known about the demonstration being (or last) recorded.

    Attributes
    ----------
    demonstration_id : str ("" before the first chunk is stored)
    state : "idle", "recording", "finishing" (stopped, reference path not ready yet) or
        "finished"
    store_status : final status in the store ("" while recording)
    elapsed_s : float, s, recorded so far
    excited_fraction : float or None; None without an estimator or before its first settled
        window
    references : int, earlier demonstrations in the reference path (0: none yet)
    phase, deviation_rad, rms_deviation_rad : float or None, as of :class:`OpenEndTracker`
    others_rms_deviation_rad : float or None, median over the earlier demonstrations, rad
    reasons : why the demonstration should be taken again (empty: keep it)
    settings : FeedbackSettings
    """

    demonstration_id: str = ""
    state: str = "idle"
    store_status: str = ""
    elapsed_s: float = 0.0
    excited_fraction: float | None = None
    references: int = 0
    phase: float | None = None
    deviation_rad: float | None = None
    rms_deviation_rad: float | None = None
    others_rms_deviation_rad: float | None = None
    reasons: tuple[str, ...] = ()
    settings: FeedbackSettings = field(default_factory=FeedbackSettings)

    @property
    def level(self) -> str:
        """"warn" when there is a reason to take the demonstration again, else "ok"."""
        return "warn" if self.reasons else "ok"

    @property
    def message(self) -> str:
        """One line: the advice, or the state."""
        if self.reasons:
            return "take again: " + "; ".join(self.reasons)
        return "keep" if self.state == "finished" else self.state

    def values(self) -> dict[str, str]:
        """Key-values for diagnostics and the feedback topic (empty text: not known)."""

        def number(value: float | None, digits: int = 4) -> str:
            return "" if value is None else f"{value:.{digits}g}"

        return {
            "state": self.state,
            "demonstration_id": self.demonstration_id,
            "store_status": self.store_status,
            "elapsed_s": f"{self.elapsed_s:.2f}",
            "excited_fraction": number(self.excited_fraction),
            "min_excited_fraction": number(self.settings.min_excited_fraction),
            "references": str(self.references),
            "phase": number(self.phase),
            "deviation_rad": number(self.deviation_rad),
            "rms_deviation_rad": number(self.rms_deviation_rad),
            "others_rms_deviation_rad": number(self.others_rms_deviation_rad),
            "max_deviation_rad": number(self.settings.max_deviation_rad),
            "retake": str(bool(self.reasons)).lower(),
            "reasons": "; ".join(self.reasons),
        }


def _reasons(report: FeedbackReport, tracked_s: float) -> tuple[str, ...]:
    settings, final = report.settings, report.state == "finished"
    reasons = []
    if final and report.store_status not in ("", "complete"):
        reasons.append(f"stored as {report.store_status}")
    share = report.excited_fraction
    if share is not None and share < settings.min_excited_fraction:
        reasons.append(f"poorly excited: a stiffness estimate in {share:.0%} of the windows, at "
                       f"least {settings.min_excited_fraction:.0%} wanted")
    rms = report.rms_deviation_rad
    if rms is not None and (final or tracked_s >= _MIN_TRACKED_S) and (
            rms > settings.max_deviation_rad):
        reasons.append(
            f"far from the others: RMS deviation {rms:.3f} rad from the aligned mean of "
            f"{report.references} earlier demonstration(s), at most "
            f"{settings.max_deviation_rad:.3f} rad (theirs: median "
            f"{report.others_rms_deviation_rad:.3f} rad)")
    return tuple(reasons)


class LiveFeedback:
    """The recorder's live feedback, fed by the store writer, read by the node's timer.

    Parameters
    ----------
    load_references : callable (skill, tags, joints, limit) -> list of (t, position)
        The earlier demonstrations (e.g. :func:`earlier_demonstrations` on a read-only store);
        called in a thread of its own at the start of each demonstration.
    settings : FeedbackSettings
    """

    def __init__(
        self,
        load_references: Callable[[str, Sequence[str], Sequence[str], int],
                                  list[tuple[np.ndarray, np.ndarray]]],
        settings: FeedbackSettings | None = None,
    ) -> None:
        self.settings = settings or FeedbackSettings()
        self._load = load_references
        self._lock = threading.Lock()
        self._id = ""
        self._state = "idle"
        self._status = ""
        self._elapsed = 0.0
        self._excited: float | None = None
        self._pending: list[np.ndarray] = []
        self._next_tick = 0.0
        self._tracker: OpenEndTracker | None = None
        self._reference: ReferencePath | None = None
        self._preparing: threading.Thread | None = None
        self.reference_error: str | None = None

    def chunk(self, demonstration_id: str, request: Any, t: np.ndarray, position: np.ndarray,
              estimator: Any) -> None:
        """A stored chunk: ``t`` (n,) s from the start, ``position`` (n, n_joints) rad."""
        if demonstration_id != self._id:
            self._begin(demonstration_id, request)
        samples, next_tick = _decimate(np.asarray(t), np.asarray(position), self._next_tick)
        excited = None
        if estimator is not None and estimator.samples_seen > estimator.window + estimator.settle:
            excited = float(estimator.summary_flags()["stiffness_excited_fraction"])
        with self._lock:
            self._next_tick = next_tick
            if len(samples):
                self._pending.append(samples)
            self._elapsed = float(t[-1]) if len(t) else self._elapsed
            self._excited = excited if excited is not None else self._excited

    def finished(self, status: str) -> None:
        """The demonstration was finished in the store with ``status``."""
        with self._lock:
            self._state, self._status = "finished", status

    def _begin(self, demonstration_id: str, request: Any) -> None:
        with self._lock:
            self._id, self._state, self._status = demonstration_id, "recording", ""
            self._elapsed, self._excited, self._next_tick = 0.0, None, 0.0
            self._pending, self._tracker, self._reference = [], None, None
            self.reference_error = None
        arguments = (request.skill, tuple(request.tags), tuple(request.joints))
        self._preparing = threading.Thread(target=self._prepare, args=(demonstration_id,
                                                                       *arguments),
                                           name="feedback-reference", daemon=True)
        self._preparing.start()

    def _prepare(self, demonstration_id: str, skill: str, tags: Sequence[str],
                 joints: Sequence[str]) -> None:
        reference, error = None, None
        try:
            earlier = self._load(skill, tags, joints, self.settings.max_references)
            reference = reference_path(earlier) if earlier else None
        except Exception as exc:  # reported with the feedback; recording goes on regardless
            error = f"{type(exc).__name__}: {exc}"
        with self._lock:
            if demonstration_id == self._id:
                self._reference, self.reference_error = reference, error
                if reference is not None:
                    self._tracker = OpenEndTracker(reference.mean)

    def wait_ready(self, timeout_s: float) -> bool:
        """Wait until the reference path of the current demonstration is prepared."""
        preparing = self._preparing
        if preparing is not None:
            preparing.join(timeout_s)
        return preparing is None or not preparing.is_alive()

    def report(self) -> FeedbackReport:
        """The feedback now (advances the tracker over the samples stored since last time)."""
        preparing = self._preparing
        ready = preparing is None or not preparing.is_alive()
        with self._lock:
            tracker, reference = self._tracker, self._reference
            if tracker is not None and self._pending:
                tracker.update(np.concatenate(self._pending))
                self._pending = []
            state = "finishing" if self._state == "finished" and not ready else self._state
            tracked = tracker if tracker is not None and tracker.count > 0 else None
            report = FeedbackReport(
                demonstration_id=self._id, state=state, store_status=self._status,
                elapsed_s=self._elapsed, excited_fraction=self._excited,
                references=reference.count if reference is not None else 0,
                phase=tracked.phase if tracked else None,
                deviation_rad=tracked.deviation if tracked else None,
                rms_deviation_rad=tracked.rms_deviation if tracked else None,
                others_rms_deviation_rad=(float(np.median(reference.others_rms_deviation))
                                          if reference is not None else None),
                settings=self.settings)
            tracked_s = tracker.count / TRACK_RATE_HZ if tracker is not None else 0.0
        return replace(report, reasons=_reasons(report, tracked_s))


# Longest published value shown on a line, characters: the values come off the network.
_SHOWN_CHARS = 400


def _shown(values: Mapping[str, str]) -> dict[str, str]:
    """Every value cut to :data:`_SHOWN_CHARS` with control characters escaped, so a forged
    message can neither write a line of its own nor send escape sequences to the terminal."""
    return {key: printable(str(value)[:_SHOWN_CHARS]) for key, value in values.items()}


def advice(values: Mapping[str, str], *, as_json: bool = False) -> str | None:
    """The ``teaching-watch`` line for a finished demonstration's published key-values, or None
    while it is not finished.

    Parameters
    ----------
    values : the key-values of :meth:`FeedbackReport.values`
    as_json : one JSON object instead of a sentence
    """
    if values.get("state") != "finished":
        return None
    values = _shown(values)
    retake = values.get("retake") == "true"
    if as_json:
        fields = ("demonstration_id", "store_status", "elapsed_s", "excited_fraction",
                  "min_excited_fraction", "references", "rms_deviation_rad",
                  "others_rms_deviation_rad", "max_deviation_rad")
        record: dict[str, Any] = {key: values.get(key, "") for key in fields}
        record["retake"] = retake
        record["reasons"] = [r for r in values.get("reasons", "").split("; ") if r]
        return json.dumps(record, sort_keys=True)
    head = f"demonstration {values.get('demonstration_id', '')}"
    if retake:
        return f"{head}: take it again: {values.get('reasons', '')}"
    share = values.get("excited_fraction", "")
    figures = [f"stiffness estimate in {float(share):.0%} of the windows" if share else
               "no stiffness estimate to judge"]
    if values.get("rms_deviation_rad"):
        figures.append(f"RMS deviation {float(values['rms_deviation_rad']):.3f} rad from the "
                       f"aligned mean of {values.get('references')} earlier, at most "
                       f"{float(values.get('max_deviation_rad') or 'nan'):.3f} rad")
    else:
        figures.append("no earlier demonstration to compare with")
    return f"{head}: keep it ({'; '.join(figures)})"


def progress(values: Mapping[str, str]) -> str | None:
    """A line on a demonstration being recorded (``teaching-watch --live``), else None."""
    if values.get("state") != "recording":
        return None
    values = _shown(values)
    parts = [f"recording {values.get('demonstration_id', '')}: {values.get('elapsed_s', '')} s"]
    if values.get("excited_fraction"):
        parts.append(f"estimate in {float(values['excited_fraction']):.0%} of the windows")
    if values.get("phase"):
        parts.append(f"phase {float(values['phase']):.2f} of the others, deviation "
                     f"{float(values.get('deviation_rad') or 'nan'):.3f} rad")
    line = ", ".join(parts)
    return f"{line}; {values['reasons']}" if values.get("reasons") else line


class RecentIds:
    """The last ``capacity`` distinct ids seen, oldest forgotten first: remembers which
    demonstrations were judged without growing under a flood of forged ids off the network.

    Parameters
    ----------
    capacity : ids remembered, at least 1
    """

    def __init__(self, capacity: int) -> None:
        if capacity < 1:
            raise InvalidInputError(f"capacity: need at least 1 id, got {capacity!r}")
        self.capacity = capacity
        self._ids: OrderedDict[str, None] = OrderedDict()

    def add(self, item: str) -> bool:
        """Remember ``item``; True when it was not among the remembered ids."""
        if item in self._ids:
            return False
        self._ids[item] = None
        if len(self._ids) > self.capacity:
            self._ids.popitem(last=False)
        return True

    def __len__(self) -> int:
        return len(self._ids)
