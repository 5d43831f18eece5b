"""Learn a skill from several demonstrations: normalise, align in time, choose the stiffness, fit.

:func:`learn_skill` accepts demonstrations loaded from the store, alignment inputs or plain
arrays, keeps the requested joints, warps the demonstrations onto one time axis (banded DTW from
:mod:`compliant_demo.alignment`, or plain resampling in normalised time), takes the stiffness
schedule from the recorded stiffness channel or derives it from the spread of the demonstrations
(:func:`compliant_demo.variability.stiffness_from_variability`), and fits a
:class:`~compliant_demo.primitives.Skill` whose provenance records all of it. :func:`save_skill`
and :func:`load_skill` keep skills, versioned, in the demonstration store, and
:func:`learn_from_store` does it all for the demonstrations a :class:`LearnRequest` selects.
"""

from __future__ import annotations

import hashlib
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Literal, Protocol

import numpy as np
from numpy.typing import ArrayLike, NDArray

from compliant_demo.alignment import DemoArrays, align_demonstrations
from compliant_demo.arrays import finite_array, ranges, time_axis
from compliant_demo.estimation import STIFFNESS_LATENCY_FLAG as LATENCY_FLAG
from compliant_demo.evaluation import range_stretches
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.generalisation import choose_formulations
from compliant_demo.models import model_from_mapping
from compliant_demo.phase_basis import FitMethod
from compliant_demo.primitives import (
    ClampedStretch,
    DampingPolicy,
    Formulation,
    Skill,
    fit_skill,
)
from compliant_demo.store.records import SkillRecord
from compliant_demo.variability import (
    HeldLevels,
    PooledVariance,
    choose_variability_model,
    held_level_variance,
    pooled_variance,
    select_bandwidth,
    select_level_penalties,
    stiffness_from_variability,
)

__all__ = [
    "DEFAULT_MAX_SAMPLES",
    "StiffnessSource",
    "VariabilityModel",
    "learn_skill",
    "clamped_stretches",
    "save_skill",
    "StoredSkill",
    "skill_from_record",
    "load_skill",
    "load_skill_by_id",
    "LearnRequest",
    "LearnOutcome",
    "matching_demonstrations",
    "duplicate_demonstrations",
    "learn_from_store",
]

StiffnessSource = Literal["auto", "recorded", "variability"]
AlignmentMethod = Literal["dtw", "resample", "none"]
VariabilityModel = Literal["auto", "levels", "kernel"]

# Default cap of the common time base. With 50 basis functions each spans about 1/50 of the
# samples: 20,000 leave 400 per basis function, far more than the regression needs, and keep the
# fit's (n_samples x n_basis) work arrays near 8 MB however long the recording (a 6-minute one at
# 1 kHz on the full base needed 20x its own size).
DEFAULT_MAX_SAMPLES = 20_000
# Bounds that leave the variability law unclamped, N*m/rad (positive and finite, as it requires).
_TINY_STIFFNESS = float(np.finfo(float).tiny)
_HUGE_STIFFNESS = float(np.finfo(float).max)


class _SkillStore(Protocol):
    def save_skill(self, name: str, payload: Mapping[str, Any], *,
                   demonstration_ids: Sequence[str], parameters: Mapping[str, Any]) -> Any: ...

    def load_skill_record(self, name: str, version: int | None = None) -> SkillRecord: ...

    def get_skill_record(self, skill_id: str) -> SkillRecord: ...


@dataclass(frozen=True)
class _Demo:
    t: NDArray[np.float64]
    position: NDArray[np.float64]
    stiffness: NDArray[np.float64] | None
    demo_id: str | None
    stiffness_gap: str | None = None


def _stiffness_channel(value: object, label: str) -> NDArray[np.float64]:
    """Recorded stiffness as floats; NaN (no estimate) is allowed, infinities are not."""
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{label}: cannot convert {value!r} to a float array") from None
    if np.any(np.isinf(array)):
        index = tuple(int(i) for i in np.argwhere(np.isinf(array))[0])
        raise InvalidInputError(f"{label}: infinite value {float(array[index])!r} at index "
                                f"{index}")
    return array[:, np.newaxis] if array.ndim == 1 else array


def _fill_gaps(
    times: NDArray[np.float64], stiffness: NDArray[np.float64], joints: Sequence[str]
) -> tuple[NDArray[np.float64] | None, str | None]:
    """Interpolate NaN samples (no estimate) linearly in time, holding the nearest value at the
    ends; a joint without any finite sample makes the channel unusable (returns the reason)."""
    finite = np.isfinite(stiffness)
    if finite.all():
        return stiffness, None
    empty = np.flatnonzero(~finite.any(axis=0))
    if empty.size:
        return None, f"joint {joints[empty[0]]!r} has no finite stiffness sample"
    filled = stiffness.copy()
    for j in np.flatnonzero(~finite.all(axis=0)):
        filled[:, j] = np.interp(times, times[finite[:, j]], stiffness[finite[:, j], j])
    return filled, None


def _fields(item: object, label: str) -> tuple[Any, Any, Any, Any, Any]:
    """(t, position, stiffness, joint names, id) of one input, whatever its form."""
    if isinstance(item, DemoArrays):
        return item.t, item.position, item.channels.get("stiffness"), item.joint_names, None
    if isinstance(item, Mapping):
        if "t" not in item or "position" not in item:
            raise InvalidInputError(f"{label}: a mapping needs keys 't' and 'position', got "
                                    f"{sorted(item)}")
        return (item["t"], item["position"], item.get("stiffness"), item.get("joints"),
                item.get("id"))
    if isinstance(item, tuple):
        if len(item) not in (2, 3):
            raise InvalidInputError(f"{label}: expected (t, position) or (t, position, "
                                    f"stiffness), got a tuple of {len(item)} items")
        return item[0], item[1], item[2] if len(item) == 3 else None, None, None
    if isinstance(item, np.ndarray | list):
        raise InvalidInputError(f"{label}: a bare array carries no sample times; pass "
                                "(t, position[, stiffness]) with t in s")
    if hasattr(item, "t") and hasattr(item, "position"):
        # compliant_demo.store.Demonstration, or anything shaped like it.
        return (item.t, item.position, getattr(item, "stiffness", None),
                getattr(item, "joints", None), getattr(item, "id", None))
    raise InvalidInputError(f"{label}: expected a Demonstration, DemoArrays, mapping or tuple, "
                            f"got {type(item).__name__}")


def _stiffness_latency(item: object, label: str) -> float:
    """The recorder's estimate latency in s (flag ``stiffness_latency_s``), 0 when not given."""
    if isinstance(item, Mapping):
        value = item.get(LATENCY_FLAG, 0.0)
    else:
        value = getattr(getattr(item, "info", None), "flags", {}).get(LATENCY_FLAG, 0.0)
    if isinstance(value, bool) or not isinstance(value, int | float) or not (
        math.isfinite(value) and value >= 0
    ):
        raise InvalidInputError(f"{label}.{LATENCY_FLAG}: expected a non-negative number of "
                                f"seconds, got {value!r}")
    return float(value)


def _advance(times: NDArray[np.float64], values: NDArray[np.float64],
             latency_s: float) -> NDArray[np.float64]:
    """values(t + latency) per column, holding the last value: undo a trailing estimate's lag."""
    if latency_s == 0.0:
        return values
    return np.column_stack([np.interp(times + latency_s, times, column) for column in values.T])


def _normalise_demo(item: object, index: int, joints: Sequence[str]) -> _Demo:
    label = f"demos[{index}]"
    t, position, stiffness, names, demo_id = _fields(item, label)
    times = time_axis(t, f"{label}.t")
    q = finite_array(position, f"{label}.position")
    if q.ndim == 1:
        q = q[:, np.newaxis]
    k = None if stiffness is None else _stiffness_channel(stiffness, f"{label}.stiffness")
    for name, array in (("position", q), ("stiffness", k)):
        if array is not None and (array.ndim != 2 or array.shape[0] != times.size):
            raise InvalidInputError(f"{label}.{name}: expected ({times.size}, n_joints), got "
                                    f"shape {array.shape}")
    if names is None:
        if q.shape[1] != len(joints):
            raise InvalidInputError(f"{label}.position: {q.shape[1]} columns for joints "
                                    f"{list(joints)!r}")
    else:
        names = list(names)
        missing = [name for name in joints if name not in names]
        if missing:
            raise InvalidInputError(f"{label}.joints: {names!r} lacks {missing[0]!r}; all "
                                    f"demonstrations need the joints {list(joints)!r}")
        columns = [names.index(name) for name in joints]
        q = q[:, columns]
        k = None if k is None else k[:, columns]
    if k is not None and k.shape != q.shape:
        raise InvalidInputError(f"{label}.stiffness: shape {k.shape} does not match position "
                                f"{q.shape}")
    gap: str | None = "not recorded"
    if k is not None:
        k, gap = _fill_gaps(times, k, joints)
        if k is not None:
            k = _advance(times, k, _stiffness_latency(item, label))
    return _Demo(times - times[0], q, k, None if demo_id is None else str(demo_id), gap)


def _align(
    demos: list[_Demo], alignment: AlignmentMethod, band: float | None, n_samples: int | None
) -> tuple[NDArray, NDArray, NDArray | None, dict[str, Any]]:
    """Common time (n,), positions (d, n, j), stiffness (d, n, j) or None, summary."""
    with_stiffness = all(d.stiffness is not None for d in demos)
    durations = [float(d.t[-1]) for d in demos]
    # One demonstration has nothing to be aligned with: it is only resampled onto a uniform grid.
    method = alignment if len(demos) > 1 or alignment == "none" else "single"
    summary: dict[str, Any] = {"method": method, "durations_s": durations}
    if alignment == "dtw" and len(demos) > 1:
        aligned = align_demonstrations(
            [DemoArrays(d.t, d.position,
                        {"stiffness": d.stiffness} if with_stiffness and d.stiffness is not None
                        else {})
             for d in demos],
            band=band, n_out=n_samples if n_samples is not None or max(
                d.t.size for d in demos) <= DEFAULT_MAX_SAMPLES else DEFAULT_MAX_SAMPLES,
        )
        summary.update(band=band, reference_index=aligned.reference_index,
                       dtw_costs=aligned.dtw_costs.tolist(), n_samples=aligned.time.size)
        stiffness = aligned.warped_channels["stiffness"] if with_stiffness else None
        return aligned.time, aligned.warped_position, stiffness, summary
    if alignment == "none":
        for index, demo in enumerate(demos[1:], start=1):
            if demo.t.shape != demos[0].t.shape or not np.allclose(demo.t, demos[0].t):
                raise InvalidInputError(
                    f"demos[{index}].t: differs from demos[0].t; alignment='none' needs "
                    "demonstrations on one time base (use 'dtw' or 'resample')"
                )
        time = demos[0].t
        positions = np.stack([d.position for d in demos])
        stiffness = (np.stack([d.stiffness for d in demos if d.stiffness is not None])
                     if with_stiffness else None)
    elif alignment in ("resample", "dtw"):
        # Normalised-time resampling; also the DTW path for a single demonstration.
        count = (min(int(np.median([d.t.size for d in demos])), DEFAULT_MAX_SAMPLES)
                 if n_samples is None else n_samples)
        phase = np.linspace(0.0, 1.0, count)
        time = phase * float(np.mean(durations))

        def resampled(demo: _Demo, values: NDArray) -> NDArray:
            demo_phase = demo.t / demo.t[-1]
            return np.column_stack([np.interp(phase, demo_phase, column) for column in values.T])

        positions = np.stack([resampled(d, d.position) for d in demos])
        stiffness = (np.stack([resampled(d, d.stiffness) for d in demos if d.stiffness is not None])
                     if with_stiffness else None)
        summary.update(n_samples=count)
    else:
        raise InvalidInputError(
            f"alignment: expected 'dtw', 'resample' or 'none', got {alignment!r}"
        )
    return time, positions, stiffness, summary


def learn_skill(
    demos: Sequence[object],
    *,
    joints: Sequence[str],
    stiffness_source: StiffnessSource = "auto",
    stiffness_range: ArrayLike | None = None,
    alignment: AlignmentMethod = "dtw",
    band: float | None = 0.1,
    n_samples: int | None = None,
    n_basis: int = 50,
    method: FitMethod = "lwr",
    formulation: str | Mapping[str, str] | Sequence[str] = "auto",
    damping_policy: DampingPolicy | None = None,
    target_inertia: ArrayLike | None = None,
    position_limits: ArrayLike | None = None,
    variance_floor: float | None = None,
    variability_reference: tuple[float, float] | None = None,
    variability_model: VariabilityModel = "auto",
    variability_bandwidth: float | None = None,
    smoothing_window: int | None = None,
    name: str = "skill",
) -> Skill:
    """Learn a skill from demonstrations.

    Parameters
    ----------
    demos : sequence of demonstrations, each one of
        ``compliant_demo.store.Demonstration`` (or any object with ``t``, ``position`` and
        optional ``stiffness``, ``joints``, ``id``), ``compliant_demo.alignment.DemoArrays``
        (stiffness in ``channels["stiffness"]``), a mapping with keys ``t``, ``position`` and
        optional ``stiffness``, ``joints``, ``id``, or a tuple ``(t, position[, stiffness])``.
        t : (n_i,) s; position : (n_i, n_joints_i) rad; stiffness : (n_i, n_joints_i) N*m/rad.
        A recorded estimate trails the stiffness it describes; when a store demonstration's
        flags (or a mapping) carry ``stiffness_latency_s``, the channel is advanced by that
        many seconds before fitting, so the stiff phase sits where the teacher applied it.
    joints : joint names to learn, in output column order. Named demonstrations are reduced to
        these columns; unnamed ones must have exactly these columns.
    stiffness_source : "recorded" (every demonstration's stiffness channel), "variability"
        (stiff where the aligned demonstrations agree; needs >= 2 demonstrations and
        ``stiffness_range``), or "auto" (recorded when all have it, else variability)
    stiffness_range : (k_min, k_max) or (n_joints, 2), N*m/rad; the target joint's range.
        Recorded stiffness samples are clamped to it before the profile is fitted in log space
        (an online estimate can stray below zero in a noisy window). Without it, the recorded
        samples must all be positive and their own range is used
    alignment : "dtw" (banded DTW onto the median-duration demonstration), "resample" (linear
        resampling in normalised time) or "none" (demonstrations already share one time base)
    band : Sakoe-Chiba band of the DTW, fraction of the sequence length
    n_samples : samples of the common time axis. Default: the DTW reference's sample count, or
        the median count when resampling, capped at ``DEFAULT_MAX_SAMPLES`` = 20,000
    formulation : DMP form per joint: "auto" (the criterion of
        :func:`compliant_demo.generalisation.choose_formulations` on the aligned
        demonstrations), "classic" or "goal_robust" for every joint, a mapping joint name ->
        one of these (joints not named: "auto"), or one per joint. The choice and the
        criterion's figures go to the provenance (``formulation_choice``)
    n_basis, method, damping_policy, target_inertia, position_limits :
        as in :func:`compliant_demo.primitives.fit_skill`
    variance_floor : rad^2, passed to ``stiffness_from_variability``
    variability_reference : (std rad, stiffness N*m/rad), the anchor of
        ``stiffness_from_variability``: demonstrations that vary by this spread give this
        stiffness. Default: ``VARIABILITY_REFERENCE_STD`` and the range's ``k_min``
    variability_model : how the variance of the aligned demonstrations is taken along the
        phase, recorded in the provenance's alignment summary as ``variability_model``.
        "auto" (default): "levels" or "kernel", whichever
        :func:`~compliant_demo.variability.select_variability_model` finds predicts left-out
        demonstrations better ("kernel" where ``variability_bandwidth`` is given). "levels":
        held constant over stretches of the phase, equal levels fused
        (:func:`~compliant_demo.variability.held_level_variance`), with the penalties chosen
        from the aligned demonstrations by :func:`~compliant_demo.variability.
        select_level_penalties` (leave-one-demonstration-out likelihood) and recorded in the
        provenance's alignment summary as ``variability_change_penalty``,
        ``variability_level_penalty``, ``variability_stretches`` and ``variability_levels``
        (per joint). "kernel": pooled with a Gaussian kernel
        (:func:`~compliant_demo.variability.pooled_variance`)
    variability_bandwidth : with ``variability_model`` "kernel" or "auto" only: fraction of
        the phase, std of the kernel; 0 takes each sample's own variance. Default: chosen by
        :func:`~compliant_demo.variability.select_bandwidth` (leave-one-demonstration-out
        likelihood) and recorded in the provenance's alignment summary as
        ``variability_bandwidth``
    smoothing_window : odd sample count of the Savitzky-Golay derivative filter of
        :func:`~compliant_demo.primitives.fit_skill`. Default: about 10 % of the samples after DTW
        alignment (whose warped time has plateaus and steps), none otherwise
    name : skill name

    Returns
    -------
    Skill whose provenance lists the demonstration ids, the alignment summary (method, band,
    reference, DTW costs, durations) and the stiffness source.
    """
    if len(demos) == 0:
        raise InvalidInputError("demos: need at least one demonstration, got 0")
    if n_samples is not None and (isinstance(n_samples, bool)
                                  or not isinstance(n_samples, int | np.integer) or n_samples < 2):
        raise InvalidInputError(f"n_samples: need an integer of at least 2, got {n_samples!r}")
    if stiffness_source not in ("auto", "recorded", "variability"):
        raise InvalidInputError(f"stiffness_source: expected 'auto', 'recorded' or "
                                f"'variability', got {stiffness_source!r}")
    joint_names = list(joints)
    normalised = [_normalise_demo(item, index, joint_names) for index, item in enumerate(demos)]
    missing = [i for i, d in enumerate(normalised) if d.stiffness is None]
    source = stiffness_source
    if source == "auto":
        source = "recorded" if not missing else "variability"
    if source == "recorded" and missing:
        reason = normalised[missing[0]].stiffness_gap
        raise InvalidInputError(f"demos[{missing[0]}].stiffness: {reason}; use "
                                "stiffness_source='variability'")
    if variability_model not in ("auto", "levels", "kernel"):
        raise InvalidInputError(f"variability_model: expected 'auto', 'levels' or 'kernel', "
                                f"got {variability_model!r}")
    if variability_bandwidth is not None and variability_model == "auto":
        variability_model = "kernel"
    if variability_model == "levels" and variability_bandwidth is not None:
        raise InvalidInputError(f"variability_bandwidth = {variability_bandwidth!r}: a kernel "
                                "bandwidth needs variability_model='kernel'")
    if source == "variability":
        if len(normalised) < 2:
            raise InvalidInputError(
                f"demos: stiffness_source='variability' needs at least 2 demonstrations, got "
                f"{len(normalised)}"
            )
        if stiffness_range is None:
            raise InvalidInputError("stiffness_range: stiffness from variability needs the "
                                    "target joint's (k_min, k_max), got None")
    k_range = (None if stiffness_range is None else
               ranges(stiffness_range, len(joint_names), "stiffness_range", positive=True))
    clamp_recorded = source == "recorded" and k_range is not None
    if clamp_recorded:
        assert k_range is not None
        # A sliding-window estimate can stray outside any physical range in a noisy window (even
        # to zero or below); the learned profile is clamped to this range anyway, so clamp the
        # samples first: the log is then defined and no stray sample refuses the fit. The
        # unclamped samples ride along as extra columns, warped the same way, for the provenance.
        normalised = [d if d.stiffness is None else replace(d, stiffness=np.hstack(
            [np.clip(d.stiffness, k_range[:, 0], k_range[:, 1]), d.stiffness]))
            for d in normalised]

    time, positions, recorded, summary = _align(normalised, alignment, band, n_samples)
    stiffness: NDArray[np.float64] | None = recorded
    teacher: NDArray[np.float64] | None = None
    if clamp_recorded and recorded is not None:
        stiffness, teacher = recorded[..., :len(joint_names)], recorded[..., len(joint_names):]
        teacher = teacher.mean(axis=0)
    if source == "variability":
        assert k_range is not None
        anchor: dict[str, Any] = {} if variability_reference is None else {
            "reference_std": variability_reference[0],
            "reference_stiffness": variability_reference[1]}
        chosen: tuple[float, ...] | None = None
        if variability_model == "auto":
            variability_model, chosen = choose_variability_model(positions)
        summary["variability_model"] = variability_model
        pooled: HeldLevels | PooledVariance
        if variability_model == "levels":
            pooled = held_level_variance(positions, *(chosen or select_level_penalties(positions)))
            summary.update(variability_change_penalty=pooled.change_penalty,
                           variability_level_penalty=pooled.level_penalty,
                           variability_stretches=list(pooled.n_stretches),
                           variability_levels=list(pooled.n_levels))
        else:
            if variability_bandwidth is None:
                variability_bandwidth = chosen[0] if chosen else select_bandwidth(positions)
            summary["variability_bandwidth"] = variability_bandwidth
            pooled = pooled_variance(positions, variability_bandwidth)
        law: dict[str, Any] = dict(n_demos=len(normalised), variance_floor=variance_floor,
                                   degrees_of_freedom=pooled.degrees_of_freedom)
        profile = stiffness_from_variability(pooled.variance, k_range[:, 0], k_range[:, 1],
                                             **law, **anchor)
        # the same law without the target's range (a vanishing variance gives the largest
        # float instead of infinity)
        teacher = stiffness_from_variability(
            pooled.variance, _TINY_STIFFNESS, _HUGE_STIFFNESS, **law,
            **{"reference_stiffness": k_range[:, 0], **anchor})
        stiffness = np.broadcast_to(profile, positions.shape)
    clamped = ([] if teacher is None or k_range is None else
               clamped_stretches(time, teacher, k_range, joint_names))
    if smoothing_window is None and summary.get("dtw_costs") is not None:
        # About 10 % of the samples: the warped mean moves in steps (several demonstration
        # samples averaged onto one reference sample), worst where a demonstration starts or
        # stops moving; with 3 % those steps became spurious accelerations and the cork_seat
        # primitive strayed up to 0.067 rad from the aligned mean in its first 20 %.
        smoothing_window = max(5, 2 * int(0.05 * time.size) + 1)
        summary["smoothing_window"] = smoothing_window
    ids = [d.demo_id for d in normalised if d.demo_id is not None]
    forms, choice = choose_formulations(positions, joint_names, formulation)
    # one word when every joint has the same form: stored as before per-joint forms existed
    form: Formulation | list[Formulation] = forms[0] if len(set(forms)) == 1 else forms
    return fit_skill(
        time, positions, stiffness, joints=joint_names, n_basis=n_basis, method=method,
        formulation=form, stiffness_range=stiffness_range, damping_policy=damping_policy,
        target_inertia=target_inertia, position_limits=position_limits,
        smoothing_window=smoothing_window, name=name,
        provenance={"demonstration_ids": ids, "alignment": summary, "stiffness_source": source,
                    "formulation_choice": choice,
                    "teacher_stiffness_clamped": [c.model_dump() for c in clamped]},
    )


def clamped_stretches(
    time: ArrayLike, teacher_stiffness: ArrayLike, stiffness_range: ArrayLike,
    joints: Sequence[str],
) -> list[ClampedStretch]:
    """Stretches where the teacher's stiffness lies outside the target's range.

    Parameters
    ----------
    time : (n_samples,) array, s, strictly increasing; the skill's own time
    teacher_stiffness : (n_samples, n_joints) array, N*m/rad, before any clamping
    stiffness_range : (k_min, k_max) or (n_joints, 2), N*m/rad
    joints : joint names, one per column

    Returns
    -------
    list of ClampedStretch, per joint in time order: first and last sample outside the range
    (times from the first sample), the teacher's most extreme value there and the bound the
    skill commands instead.
    """
    times = time_axis(time, "time")
    teacher = finite_array(teacher_stiffness, "teacher_stiffness")
    names = list(joints)
    if teacher.shape != (times.size, len(names)):
        raise InvalidInputError(f"teacher_stiffness: expected shape ({times.size}, "
                                f"{len(names)}), got {teacher.shape}")
    k_range = ranges(stiffness_range, len(names), "stiffness_range", positive=True)
    found = range_stretches(times - times[0], names, "teacher_stiffness_clamped", teacher,
                            k_range[:, 0], k_range[:, 1], "N*m/rad")
    bounds = dict(zip(names, k_range.tolist(), strict=True))
    return [ClampedStretch(
        joint=s.joint, from_s=s.t_start, to_s=s.t_end, teacher_stiffness=s.worst,
        clamped_to=bounds[s.joint][0] if s.worst < bounds[s.joint][0] else bounds[s.joint][1])
        for s in found]


def save_skill(
    store: _SkillStore, skill: Skill, *, parameters: Mapping[str, Any] | None = None
) -> Any:
    """Save ``skill`` as a new version of ``skill.name`` in the store; returns the store's record.

    The learning parameters default to the skill's basis count, method, formulation, stiffness
    source and alignment method.
    """
    used = {
        "n_basis": skill.n_basis, "method": skill.method, "formulation": skill.formulation,
        "stiffness_source": skill.provenance.stiffness_source,
        "alignment": skill.provenance.alignment.get("method", "none"),
    }
    return store.save_skill(
        skill.name,
        payload=skill.model_dump(mode="json"),
        demonstration_ids=skill.provenance.demonstration_ids,
        parameters=used if parameters is None else dict(parameters),
    )


@dataclass(frozen=True)
class StoredSkill:
    """A skill version as the store keeps it (``record``: id, version, provenance) and as it
    replays (``skill``)."""

    record: SkillRecord
    skill: Skill


def skill_from_record(record: SkillRecord) -> Skill:
    """The skill of a stored record; InvalidInputError when this version cannot read it."""
    return model_from_mapping(Skill, record.payload,
                              source=f"skill {record.name!r} version {record.version}")


def load_skill(store: _SkillStore, name: str, version: int | None = None) -> StoredSkill:
    """Skill ``name`` at ``version`` (latest when omitted) from the store: the one loader that
    every command, node and report uses."""
    return _stored(store.load_skill_record(name, version))


def load_skill_by_id(store: _SkillStore, skill_id: str) -> StoredSkill:
    """The skill version with id ``skill_id`` from the store."""
    return _stored(store.get_skill_record(skill_id))


def _stored(record: SkillRecord) -> StoredSkill:
    return StoredSkill(record=record, skill=skill_from_record(record))


@dataclass(frozen=True)
class LearnRequest:
    """Which demonstrations to learn from and how.

    skill : skill name to select and to save under; tags : every one must be present;
    operator : exact match ("" = any); joints : joints to learn, in order; min_demonstrations : the
    least number of matching complete demonstrations; options : keyword arguments of
    :func:`learn_skill` (n_basis, alignment, stiffness_source, ...).
    """

    skill: str
    joints: tuple[str, ...]
    tags: tuple[str, ...] = ()
    operator: str = ""
    min_demonstrations: int = 2
    options: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not self.skill:
            raise InvalidInputError("skill: must not be empty")
        if not self.joints:
            raise InvalidInputError("joints: need at least one joint name, got []")
        if self.min_demonstrations < 1:
            raise InvalidInputError(
                f"min_demonstrations: must be at least 1, got {self.min_demonstrations}"
            )


@dataclass(frozen=True)
class LearnOutcome:
    """A saved skill version, the skill itself (no need to load it back), the demonstrations it
    was learned from and its fit report (one line per joint, then what it was learned from)."""

    stored: StoredSkill
    demonstration_ids: tuple[str, ...]
    duplicates: tuple[tuple[str, ...], ...]
    report: str

    @property
    def skill_id(self) -> str:
        """Id of the saved skill version."""
        return str(self.stored.record.id)

    @property
    def name(self) -> str:
        """Skill name."""
        return str(self.stored.record.name)

    @property
    def version(self) -> int:
        """Version number of the saved skill."""
        return int(self.stored.record.version)


def matching_demonstrations(store: Any, request: LearnRequest) -> list[Any]:
    """Metadata of the complete demonstrations the request selects, oldest first."""
    return list(
        store.find_demonstrations(
            skill=request.skill,
            tag=list(request.tags) or None,
            operator=request.operator or None,
            status="complete",
        )
    )


def duplicate_demonstrations(demos: Sequence[Any]) -> list[tuple[str, ...]]:
    """Groups of demonstration ids whose times and angles are identical bit for bit (the same
    motion recorded or imported twice), each group in input order."""
    groups: dict[bytes, list[str]] = {}
    for demo in demos:
        digest = hashlib.blake2b(digest_size=16)
        for array in (demo.t, demo.position):
            contiguous = np.ascontiguousarray(array, dtype=float)
            digest.update(str(contiguous.shape).encode())
            digest.update(contiguous.tobytes())
        groups.setdefault(digest.digest(), []).append(str(demo.id))
    return [tuple(ids) for ids in groups.values() if len(ids) > 1]


def learn_from_store(store: Any, request: LearnRequest) -> LearnOutcome:
    """Learn ``request.skill`` from the matching demonstrations and save a new version.

    Warns (``UserWarning``) when demonstrations hold identical samples: learning from copies
    weighs that motion more and understates the spread the stiffness may be derived from.

    Raises
    ------
    NotFoundError
        Fewer than ``request.min_demonstrations`` complete demonstrations match.
    InvalidInputError
        The learner refuses the demonstrations or options (message from the learner).
    """
    infos = matching_demonstrations(store, request)
    if len(infos) < request.min_demonstrations:
        raise NotFoundError(
            f"{len(infos)} complete demonstration(s) match {_describe(request)}; "
            f"need at least {request.min_demonstrations}"
        )
    demos = [store.load_demonstration(info.id, joints=list(request.joints)) for info in infos]
    duplicates = duplicate_demonstrations(demos)
    for group in duplicates:
        warnings.warn(
            f"demonstrations {', '.join(group)} hold identical samples; learning from copies "
            "weighs that motion more than the others",
            stacklevel=2,
        )
    skill = learn_skill(demos, joints=list(request.joints), name=request.skill, **request.options)
    record = save_skill(store, skill)
    ids = tuple(info.id for info in infos)
    operators = sorted({info.operator for info in infos})
    return LearnOutcome(
        stored=StoredSkill(record=record, skill=skill),
        demonstration_ids=ids,
        duplicates=tuple(duplicates),
        report=_report(skill, record.version, ids, operators),
    )


def _describe(request: LearnRequest) -> str:
    parts = [f"skill={request.skill!r}"]
    if request.tags:
        parts.append(f"tags={list(request.tags)}")
    if request.operator:
        parts.append(f"operator={request.operator!r}")
    return ", ".join(parts)


def _report(skill: Skill, version: int, ids: Sequence[str], operators: Sequence[str]) -> str:
    provenance = skill.provenance
    lines = [
        f"skill {skill.name!r} version {version} from {len(ids)} demonstration(s), "
        f"{skill.n_basis} basis functions, stiffness {provenance.stiffness_source}"
    ]
    stiffness_rmse: Sequence[float | None] = provenance.stiffness_fit_rmse or [None] * len(
        skill.joints
    )
    choices: list[Any] = [None] * len(skill.joints)
    if provenance.formulation_choice:
        choices = list(provenance.formulation_choice)
    for joint, rmse, k_rmse, choice in zip(
        skill.joints, provenance.fit_rmse, stiffness_rmse, choices, strict=True
    ):
        k_text = "-" if k_rmse is None else f"{k_rmse:.3g} N*m/rad"
        form = "" if choice is None else f", form {_form_text(choice)}"
        lines.append(f"  {joint}: position RMSE {rmse:.3g} rad, stiffness RMSE {k_text}{form}")
    lines.append(f"  operators: {', '.join(repr(o) for o in operators) or '-'}")
    lines.append(f"  demonstrations: {', '.join(ids)}")
    return "\n".join(lines)


def _form_text(choice: Mapping[str, Any]) -> str:
    """``goal_robust (net/excursion 0.19 < 0.5)`` or ``classic (requested)``."""
    if choice["chosen_by"] != "criterion":
        return f"{choice['formulation']} (requested)"
    relation = ">=" if choice["formulation"] == "classic" else "<"
    return (f"{choice['formulation']} (net/excursion {choice['net_fraction']:.2f} {relation} "
            f"{choice['threshold']:g})")
