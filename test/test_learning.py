"""learn_skill end to end: input forms, alignment, stiffness sources, store round trip, errors."""

from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy import stats

from compliant_demo.alignment import DemoArrays, align_demonstrations
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.learning import DEFAULT_MAX_SAMPLES, learn_skill, load_skill, save_skill
from compliant_demo.store import DemoStore
from compliant_demo.variability import (
    VARIABILITY_BANDWIDTH,
    VARIABILITY_BANDWIDTH_CANDIDATES,
    VARIABILITY_CHANGE_PENALTIES,
    VARIABILITY_LEVEL_PENALTIES,
)

JOINTS = ["shoulder", "elbow"]
RANGE = (10.0, 180.0)


def cork_seat(t: np.ndarray, duration: float, offset: float = 0.0) -> np.ndarray:
    """Invented demo motion: approach, press, retreat on shoulder and elbow, rad."""
    s = t / duration
    shoulder = 0.2 + 0.8 * (10 * s**3 - 15 * s**4 + 6 * s**5) + offset
    elbow = -0.4 + 0.5 * np.sin(np.pi * s) ** 2 + 0.6 * s + 0.5 * offset
    return np.column_stack([shoulder, elbow])


def press_stiffness(t: np.ndarray, duration: float) -> np.ndarray:
    """Invented demo stiffness: soft approach, stiff press, soft retreat, N*m/rad."""
    bump = np.exp(-0.5 * ((t / duration - 0.5) / 0.12) ** 2)
    return np.column_stack([20 + 140 * bump, 15 + 90 * bump])


def _demos(rng: np.random.Generator, n_demos: int = 4, rate: float = 500.0):
    demos = []
    for _ in range(n_demos):
        duration = rng.uniform(1.6, 2.4)
        t = np.arange(0.0, duration, 1.0 / rate)
        demos.append((t, cork_seat(t, duration, rng.normal(0, 0.02)),
                      press_stiffness(t, duration)))
    return demos


def _with_stiffness_edited(demos, edit):
    """Copies of (t, q, k) demos whose stiffness ``edit`` changed in place."""
    edited = []
    for t, q, k in demos:
        k = k.copy()
        edit(k)
        edited.append((t, q, k))
    return edited


@pytest.fixture
def store():
    with DemoStore(":memory:") as opened:
        yield opened


def _add(store: DemoStore, t, q, k, operator: str, joints=JOINTS) -> str:
    velocity = np.gradient(q, t, axis=0)
    return store.add_demonstration(
        t=t, position=q, velocity=velocity, torque=np.zeros_like(q), stiffness=k,
        skill="cork_seat", joints=joints, operator=operator, source="simulated",
    )


# Relative tolerance on the learned stiffness: DTW warps by whole samples at 500 Hz, resampling in
# normalised time is exact for these demonstrations (they differ in duration and offset only).
@pytest.mark.parametrize(("alignment", "rtol"), [("dtw", 0.12), ("resample", 0.03)])
def test_recorded_stiffness_reproduced_from_store_demonstrations(store, alignment, rtol):
    rng = np.random.default_rng(11)
    ids = [_add(store, t, q, k, "operator_a" if i % 2 else "operator_b")
           for i, (t, q, k) in enumerate(_demos(rng))]
    loaded = [store.load_demonstration(demo_id) for demo_id in ids]
    skill = learn_skill(loaded, joints=JOINTS, alignment=alignment, stiffness_range=RANGE,
                        target_inertia=[0.05, 0.02], name="cork_seat")
    assert skill.provenance.demonstration_ids == ids
    assert skill.provenance.stiffness_source == "recorded"
    assert skill.provenance.alignment["method"] == alignment
    rollout = skill.rollout(dt=1e-3)
    expected = press_stiffness(rollout.t, skill.duration_s)
    # All demonstrations share the invented profile, so the learned one must match it in phase.
    np.testing.assert_allclose(rollout.stiffness, expected, rtol=rtol)
    settled = skill.rollout(horizon_s=3 * skill.duration_s).position[-1]
    np.testing.assert_allclose(settled, skill.goal, atol=1e-5)


def test_save_and_load_through_store(store):
    rng = np.random.default_rng(12)
    ids = [_add(store, t, q, k, "operator_a") for t, q, k in _demos(rng, 3)]
    demos = [store.load_demonstration(demo_id) for demo_id in ids]
    skill = learn_skill(demos, joints=JOINTS, target_inertia=[0.05, 0.02], name="cork_seat")
    first = save_skill(store, skill)
    second = save_skill(store, skill, parameters={"note": "same fit"})
    assert (first.version, second.version) == (1, 2)
    assert first.parameters["n_basis"] == 50 and first.parameters["alignment"] == "dtw"
    assert list(first.demonstration_ids) == ids
    again = load_skill(store, "cork_seat", 1).skill
    np.testing.assert_array_equal(again.rollout(goal=[0.9, 0.5]).position,
                                  skill.rollout(goal=[0.9, 0.5]).position)
    assert load_skill(store, "cork_seat").skill.provenance == skill.provenance
    with pytest.raises(NotFoundError, match=r"skill 'cork_seat' has no version 7"):
        load_skill(store, "cork_seat", 7)


def test_load_rejects_foreign_payload(store):
    rng = np.random.default_rng(13)
    t, q, k = _demos(rng, 1)[0]
    demo_id = _add(store, t, q, k, "operator_a")
    store.save_skill("cork_seat", payload={"joints": ["elbow"]}, demonstration_ids=[demo_id],
                     parameters={})
    with pytest.raises(InvalidInputError, match=r"skill 'cork_seat' version 1: field"):
        load_skill(store, "cork_seat")


def test_joint_selection_by_name_reorders_columns(store):
    rng = np.random.default_rng(14)
    ids = []
    for t, q, k in _demos(rng, 2):
        wrist = np.full((t.size, 1), 0.3)
        ids.append(_add(store, t, np.hstack([q[:, ::-1], wrist]), np.hstack([k[:, ::-1], k[:, :1]]),
                        "operator_a", joints=["elbow", "shoulder", "wrist"]))
    demos = [store.load_demonstration(demo_id) for demo_id in ids]
    skill = learn_skill(demos, joints=JOINTS, alignment="resample", target_inertia=[0.05, 0.02])
    expected_start = np.mean([store.load_demonstration(i).position[0, [1, 0]] for i in ids], 0)
    np.testing.assert_allclose(skill.start, expected_start)
    assert skill.joints == JOINTS


def test_stiffness_from_variability_follows_inverse_variance():
    rng = np.random.default_rng(15)
    t = np.linspace(0.0, 2.0, 1001)
    # Known spread: demonstrations agree closely at the press (mid-movement), vary elsewhere.
    sigma = 0.002 + 0.05 * (1 - np.exp(-0.5 * ((t - 1.0) / 0.25) ** 2))
    base = cork_seat(t, 2.0)
    demos = [(t, base + rng.normal(0, 1, (1, 2)) * sigma[:, None]) for _ in range(8)]
    skill = learn_skill(demos, joints=JOINTS, stiffness_source="variability",
                        stiffness_range=RANGE, alignment="none", target_inertia=[0.05, 0.02])
    assert skill.provenance.stiffness_source == "variability"
    stiffness = skill.rollout(dt=t[1] - t[0]).stiffness
    # Calinon, Sardellitti, Caldwell, IROS 2010: stiffness follows the inverse variance. The
    # law clips it to the range (the precision spans a factor 600 here, the range 18), so the
    # profile is compared with the clipped law, in log space (correlation above 0.98), and its
    # ranks with the precision's (Spearman above 0.98), for the default held levels (a smooth
    # spread becomes a staircase of many stretches, which the profile fit smooths) and the
    # kernel. Each demonstration is one offset times sigma, so pooling along the phase gains
    # nothing and the kernel's chosen bandwidth is the narrowest.
    law = np.clip(RANGE[0] * (0.02 / sigma) ** 2, *RANGE)
    common = dict(joints=JOINTS, stiffness_source="variability", stiffness_range=RANGE,
                  alignment="none", target_inertia=[0.05, 0.02])
    assert skill.provenance.alignment["variability_model"] in ("levels", "kernel")
    levels = learn_skill(demos, **common, variability_model="levels")
    alignment = levels.provenance.alignment
    assert alignment["variability_model"] == "levels"
    assert alignment["variability_change_penalty"] in VARIABILITY_CHANGE_PENALTIES
    assert alignment["variability_level_penalty"] in VARIABILITY_LEVEL_PENALTIES
    assert all(s >= n >= 1 for s, n in zip(alignment["variability_stretches"],
                                            alignment["variability_levels"], strict=True))
    assert min(alignment["variability_stretches"]) > 5
    assert "variability_bandwidth" not in alignment
    kernel = learn_skill(demos, **common, variability_model="kernel")
    assert kernel.provenance.alignment["variability_bandwidth"] == 0.01
    assert "variability_change_penalty" not in kernel.provenance.alignment
    for learned in (stiffness, levels.rollout(dt=t[1] - t[0]).stiffness,
                    kernel.rollout(dt=t[1] - t[0]).stiffness):
        for joint in range(2):
            assert np.corrcoef(np.log(learned[:, joint]), np.log(law))[0, 1] > 0.98
            assert stats.spearmanr(learned[:, joint], 1.0 / sigma)[0] > 0.98
        assert learned.min() >= RANGE[0] and learned.max() <= RANGE[1]
        assert np.all(np.abs(t[np.argmax(learned, axis=0)] - 1.0) < 0.1)
        assert np.all(learned[500] > 3 * learned[0])

    # A given bandwidth is used as given and recorded the same way.
    fixed = learn_skill(demos, joints=JOINTS, stiffness_source="variability",
                        stiffness_range=RANGE, alignment="none", target_inertia=[0.05, 0.02],
                        variability_model="kernel", variability_bandwidth=0.03)
    assert fixed.provenance.alignment["variability_bandwidth"] == 0.03


def test_auto_source_falls_back_to_variability():
    rng = np.random.default_rng(16)
    demos = [(t, q) for t, q, _ in _demos(rng, 3)]
    skill = learn_skill(demos, joints=JOINTS, stiffness_range=RANGE, alignment="resample",
                        target_inertia=[0.05, 0.02])
    assert skill.provenance.stiffness_source == "variability"


def test_input_forms_agree():
    rng = np.random.default_rng(17)
    demos = _demos(rng, 3)
    as_tuples = learn_skill(demos, joints=JOINTS, alignment="resample", target_inertia=[1, 1])
    as_arrays = learn_skill(
        [DemoArrays(t, q, {"stiffness": k}, tuple(JOINTS)) for t, q, k in demos],
        joints=JOINTS, alignment="resample", target_inertia=[1, 1],
    )
    as_maps = learn_skill([{"t": t, "position": q, "stiffness": k, "id": f"d{i}"}
                           for i, (t, q, k) in enumerate(demos)],
                          joints=JOINTS, alignment="resample", target_inertia=[1, 1])
    assert as_tuples.weights == as_arrays.weights == as_maps.weights
    assert as_maps.provenance.demonstration_ids == ["d0", "d1", "d2"]


def test_single_demonstration_with_recorded_stiffness():
    rng = np.random.default_rng(18)
    skill = learn_skill(_demos(rng, 1), joints=JOINTS, target_inertia=[0.05, 0.02])
    assert skill.provenance.n_demonstrations == 1
    assert skill.provenance.alignment["method"] == "single"


# --- bad input -------------------------------------------------------------------------------


def test_variability_needs_several_demonstrations():
    rng = np.random.default_rng(19)
    t, q, _ = _demos(rng, 1)[0]
    with pytest.raises(InvalidInputError,
                       match=r"demos: stiffness_source='variability' needs at least 2 .* got 1"):
        learn_skill([(t, q)], joints=JOINTS, stiffness_source="variability",
                    stiffness_range=RANGE)


def test_variability_needs_range():
    rng = np.random.default_rng(20)
    with pytest.raises(InvalidInputError, match=r"stiffness_range: stiffness from variability"):
        learn_skill([(t, q) for t, q, _ in _demos(rng, 2)], joints=JOINTS)


def test_different_joint_sets():
    rng = np.random.default_rng(21)
    (t0, q0, k0), (t1, q1, k1) = _demos(rng, 2)
    demos = [DemoArrays(t0, q0, {"stiffness": k0}, ("shoulder", "elbow")),
             DemoArrays(t1, q1, {"stiffness": k1}, ("shoulder", "wrist"))]
    with pytest.raises(InvalidInputError,
                       match=r"demos\[1\]\.joints: \['shoulder', 'wrist'\] lacks 'elbow'"):
        learn_skill(demos, joints=JOINTS)


def test_unnamed_columns_must_match_joints():
    rng = np.random.default_rng(22)
    t, q, k = _demos(rng, 1)[0]
    with pytest.raises(InvalidInputError, match=r"demos\[0\]\.position: 2 columns for joints"):
        learn_skill([(t, q, k)], joints=["shoulder", "elbow", "wrist"])


def test_nan_in_demonstration():
    rng = np.random.default_rng(23)
    demos = _demos(rng, 2)
    t, q, k = demos[1]
    q = q.copy()
    q[40, 0] = np.nan
    with pytest.raises(InvalidInputError,
                       match=r"demos\[1\]\.position: non-finite value nan at index \(40, 0\)"):
        learn_skill([demos[0], (t, q, k)], joints=JOINTS)


def test_non_increasing_time_in_demonstration():
    rng = np.random.default_rng(24)
    t, q, k = _demos(rng, 1)[0]
    t = t.copy()
    t[9] = t[8] - 0.001
    with pytest.raises(InvalidInputError, match=r"demos\[0\]\.t: time must be strictly increasing"):
        learn_skill([(t, q, k)], joints=JOINTS)


def test_zero_duration_demonstration():
    with pytest.raises(InvalidInputError, match=r"demos\[0\]\.t: time must be strictly increasing"):
        learn_skill([(np.zeros(100), np.zeros((100, 2)))], joints=JOINTS, stiffness_range=RANGE)


def test_recorded_source_needs_every_channel():
    rng = np.random.default_rng(25)
    demos = _demos(rng, 2)
    with pytest.raises(InvalidInputError, match=r"demos\[1\]\.stiffness: not recorded"):
        learn_skill([demos[0], demos[1][:2]], joints=JOINTS, stiffness_source="recorded")


def test_alignment_none_needs_common_time():
    rng = np.random.default_rng(26)
    with pytest.raises(InvalidInputError, match=r"demos\[1\]\.t: differs from demos\[0\]\.t"):
        learn_skill(_demos(rng, 2), joints=JOINTS, alignment="none")


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"alignment": "spline"}, r"alignment: expected 'dtw', 'resample' or 'none', got 'spline'"),
        ({"stiffness_source": "guess"}, r"stiffness_source: expected .* got 'guess'"),
        ({"n_basis": 1}, r"n_basis: need an integer of at least 2, got 1"),
        ({"n_samples": 1}, r"n_samples: need an integer of at least 2, got 1"),
        ({"n_samples": 10, "n_basis": 20}, r"t: 10 samples are fewer than n_basis = 20"),
        ({"variability_model": "spline"},
         r"variability_model: expected 'auto', 'levels' or 'kernel', got 'spline'"),
        ({"variability_model": "levels", "variability_bandwidth": 0.03},
         r"variability_bandwidth = 0.03: a kernel bandwidth needs variability_model='kernel'"),
    ],
)
def test_bad_options(kwargs, message):
    rng = np.random.default_rng(27)
    with pytest.raises(InvalidInputError, match=message):
        learn_skill(_demos(rng, 2), joints=JOINTS, **kwargs)


def test_bad_containers():
    with pytest.raises(InvalidInputError, match=r"demos: need at least one demonstration, got 0"):
        learn_skill([], joints=JOINTS)
    with pytest.raises(InvalidInputError, match=r"demos\[0\]: expected \(t, position\)"):
        learn_skill([(1, 2, 3, 4)], joints=JOINTS)
    with pytest.raises(InvalidInputError, match=r"demos\[0\]: a mapping needs keys 't' and"):
        learn_skill([{"time": [0, 1]}], joints=JOINTS)
    with pytest.raises(InvalidInputError, match=r"demos\[0\]: expected a Demonstration, .* str"):
        learn_skill(["cork"], joints=JOINTS)
    with pytest.raises(InvalidInputError, match=r"demos\[1\]: a bare array carries no sample"):
        learn_skill([(np.arange(3.0), np.zeros((3, 2))), np.zeros((3, 2))], joints=JOINTS)


def test_nan_stiffness_samples_are_bridged():
    # The recorder leaves NaN where its estimator window was not excited (start, still phases).
    rng = np.random.default_rng(28)
    demos = _demos(rng, 3)

    def gaps(k):
        k[:60, :] = np.nan
        k[400:420, 1] = np.nan

    gappy = _with_stiffness_edited(demos, gaps)
    bridged = learn_skill(gappy, joints=JOINTS, alignment="resample", target_inertia=[1, 1])
    full = learn_skill(demos, joints=JOINTS, alignment="resample", target_inertia=[1, 1])
    assert bridged.provenance.stiffness_source == "recorded"
    # Held and interpolated across the gaps of a smooth profile: the schedule barely moves.
    np.testing.assert_allclose(bridged.rollout().stiffness, full.rollout().stiffness, rtol=0.02)


def test_joint_without_any_stiffness_estimate():
    rng = np.random.default_rng(29)
    demos = _demos(rng, 2)
    t, q, k = demos[1]
    k = k.copy()
    k[:, 1] = np.nan
    with pytest.raises(InvalidInputError,
                       match=r"demos\[1\]\.stiffness: joint 'elbow' has no finite stiffness"):
        learn_skill([demos[0], (t, q, k)], joints=JOINTS, stiffness_source="recorded")
    auto = learn_skill([demos[0], (t, q, k)], joints=JOINTS, stiffness_range=RANGE,
                       target_inertia=[1, 1])
    assert auto.provenance.stiffness_source == "variability"
    with pytest.raises(InvalidInputError, match=r"demos\[1\]\.stiffness: infinite value inf"):
        learn_skill([demos[0], (t, q, np.full_like(k, np.inf))], joints=JOINTS)


def test_recorded_stiffness_is_clamped_to_the_range_before_the_log():
    # An online estimate can dip below zero in a noisy window: with stiffness_range the samples
    # are clamped first (same skill as clamping them by hand); without it they are refused.
    rng = np.random.default_rng(30)

    def strays(k):
        k[100:110, 0] = -1.3
        k[200:205, 1] = 900.0

    stray = _with_stiffness_edited(_demos(rng, 2), strays)
    clamped = learn_skill(stray, joints=JOINTS, stiffness_range=RANGE, alignment="resample",
                          target_inertia=[1, 1])
    by_hand = learn_skill([(t, q, np.clip(k, *RANGE)) for t, q, k in stray], joints=JOINTS,
                          stiffness_range=RANGE, alignment="resample", target_inertia=[1, 1])
    assert clamped.stiffness_log_weights == by_hand.stiffness_log_weights
    with pytest.raises(InvalidInputError, match=r"values must be positive, got -1\.3"):
        learn_skill(stray, joints=JOINTS, alignment="resample", target_inertia=[1, 1])


# --- simulated teaching demonstrations (compliant_demo.teaching, invented cork_seat scenario) --


@functools.cache
def _taught(seed: int, n_demos: int):
    from compliant_demo.teaching import cork_seat_scenario, teaching_series

    return teaching_series(cork_seat_scenario(), n_demos, seed=seed)


@pytest.mark.parametrize("alignment", ["dtw", "resample"])
@pytest.mark.parametrize("seed", [3, 11])
def test_primitive_follows_the_aligned_mean_of_teaching_demonstrations(seed, alignment):
    # Demos of ~6 s that move 0.6-0.75 rad with an 8 Hz dither on top and end still moving.
    taught = _taught(seed, 4)
    joints = list(taught[0].joint_names)
    skill = learn_skill(taught, joints=joints, alignment=alignment, stiffness_range=(5, 200),
                        target_inertia=[0.08, 0.03])
    inputs = [(r.t - r.t[0], r.position) for r in taught]
    if alignment == "dtw":
        aligned = align_demonstrations(inputs, band=0.1)
        time, mean = aligned.time, aligned.mean
    else:
        count = int(np.median([r.t.size for r in taught]))
        time = np.linspace(0.0, np.mean([r.t[-1] - r.t[0] for r in taught]), count)
        mean = np.mean([[np.interp(time / time[-1], t / t[-1], col) for col in q.T]
                        for t, q in inputs], axis=0).T
    rollout = skill.rollout(dt=time[1], horizon_s=time[-1])
    residual = rollout.position[: time.size] - mean
    error = np.sqrt((residual**2).mean(axis=0))
    # fit_rmse is exactly this comparison: the skill's default rollout against the aligned mean.
    np.testing.assert_allclose(skill.provenance.fit_rmse, error, rtol=1e-6)
    # Stated bounds: 0.015 rad RMSE (about 2.5 % of the range of motion) and no offset beyond
    # 10 mrad (below). Before the demonstrations were averaged instead of rescaled one by one by
    # (g_d - y0_d) / amplitude: 0.017-0.018 rad on the shoulder, an offset of 0.011-0.014 rad;
    # with DTW and the former 3 % derivative window, 0.028 rad on the elbow for seed 11.
    assert np.all(error < 0.015), error
    # 10 mrad since the simulated teacher's variation became smooth and largest where it is
    # soft (seed 11 with DTW: 9.0 mrad on the elbow).
    assert np.all(np.abs(residual.mean(axis=0)) < 0.010), residual.mean(axis=0)
    assert skill.provenance.demo_spread_rmse is not None
    assert np.all(np.asarray(skill.provenance.demo_spread_rmse) > 0.005)


def test_rollout_settles_on_the_goal_after_the_duration():
    # Teaching demos end while the arm still lags the hand, which leaves large forcing weights
    # on the last basis functions; after tau the forcing is off and the attractor settles.
    taught = _taught(11, 3)
    joints = list(taught[0].joint_names)
    skill = learn_skill(taught, joints=joints, n_basis=30, stiffness_range=(5, 200),
                        target_inertia=[0.08, 0.03])
    for goal, duration in ((None, None), ([0.2, 0.5], 5.0)):
        rollout = skill.rollout(goal=goal, duration_s=duration, horizon_s=2 * (duration or
                                                                              skill.duration_s))
        g = np.asarray(skill.goal if goal is None else goal)
        tau = rollout.duration_s
        distance = np.abs(rollout.position - g)
        after = rollout.t >= tau
        at_tau = distance[np.argmax(after)]
        # Stated band: no excursion more than 10 mrad beyond the distance left at tau, and within
        # 0.03 rad of the goal after tau (before the fix: 0.07 rad away at ~1.2 tau).
        assert np.all(distance[after] <= at_tau + 0.01), (distance[after].max(axis=0), at_tau)
        assert np.all(distance[after] < 0.03)
        # Critically damped attractor (alpha_z = 25, beta_z = alpha_z / 4): settled by 1.5 tau.
        assert np.all(distance[rollout.t >= 1.5 * tau] < 2e-3)


@pytest.mark.parametrize("n_demos", [1, 2])
def test_default_time_base_is_capped_for_long_recordings(n_demos):
    # 25,000 samples per demonstration: the default common time base stops at 20,000 (the fit's
    # work arrays grow with it); an explicit n_samples is kept.
    t = np.linspace(0.0, 50.0, 25_000)
    demos = [(t, cork_seat(t, 50.0, 0.01 * i), press_stiffness(t, 50.0)) for i in range(n_demos)]
    kwargs = {"joints": JOINTS, "alignment": "resample", "target_inertia": [1, 1]}
    skill = learn_skill(demos, **kwargs)
    assert skill.provenance.alignment["n_samples"] == DEFAULT_MAX_SAMPLES == 20_000
    explicit = learn_skill(demos, n_samples=21_000, **kwargs)
    assert explicit.provenance.alignment["n_samples"] == 21_000


def _lagged_store_demos(store: DemoStore, lag_s: float, flag: dict | None) -> list:
    """The invented demos stored with their stiffness recorded ``lag_s`` late, as a trailing
    estimator would, and with the recorder's latency flag when ``flag`` is given."""
    rng = np.random.default_rng(31)
    loaded = []
    for t, q, k in _demos(rng, 3):
        late = np.column_stack([np.interp(t - lag_s, t, column) for column in k.T])
        demo_id = _add(store, t, q, late, "operator_a")
        if flag is not None:
            store.update_flags(demo_id, flag)
        loaded.append(store.load_demonstration(demo_id))
    return loaded


def test_recorded_stiffness_is_advanced_by_the_recorders_latency(store):
    lag = 0.15
    on_time = learn_skill(_demos(np.random.default_rng(31), 3), joints=JOINTS,
                          alignment="resample", target_inertia=[1, 1])
    flagged = learn_skill(_lagged_store_demos(store, lag, {"stiffness_latency_s": lag}),
                          joints=JOINTS, alignment="resample", target_inertia=[1, 1])
    unflagged = learn_skill(_lagged_store_demos(store, lag, None), joints=JOINTS,
                            alignment="resample", target_inertia=[1, 1])
    expected = on_time.rollout().stiffness
    peak = np.argmax(expected, axis=0)
    # With the flag the stiff press sits where it was applied (within 2 % of the profile; the
    # last 0.15 s are held at the end value); without it the peak comes 0.15 s late.
    np.testing.assert_allclose(flagged.rollout().stiffness, expected, rtol=0.02)
    np.testing.assert_array_equal(np.argmax(flagged.rollout().stiffness, axis=0), peak)
    late_peak = np.argmax(unflagged.rollout().stiffness, axis=0)
    assert np.all(late_peak - peak > 50)  # more than 0.05 s late at the rollout's 1 ms step


@pytest.mark.parametrize("value", [-0.1, float("nan"), "soon", True])
def test_bad_stiffness_latency_flag(value):
    rng = np.random.default_rng(32)
    t, q, k = _demos(rng, 1)[0]
    demo = {"t": t, "position": q, "stiffness": k, "stiffness_latency_s": value}
    with pytest.raises(InvalidInputError, match=r"demos\[0\]\.stiffness_latency_s"):
        learn_skill([demo], joints=JOINTS, alignment="none", target_inertia=[1, 1])


@pytest.mark.parametrize("seed", [101, 303])
def test_variability_profile_is_stiff_where_the_simulated_teacher_is(seed):
    # The simulated teacher varies between demonstrations with a variance inversely proportional
    # to its stiffness (minimum-intervention idea: Todorov and Jordan, Nature Neuroscience 5(11),
    # 2002; the law is our own choice): 6 / 4 N*m/rad in the approach and retreat, 40 / 30 in the
    # press. From 8 demonstrations the sample variance has 7 degrees of freedom per sample (its
    # 90 % range spans a factor of 6, as wide as the teacher's own range) and about 9-10 pooled
    # along the phase (the deviations stay correlated over a tenth of the movement), so the
    # stated bound is modest:
    # the learned profile's median in the press exceeds its medians in the approach and in the
    # retreat by at least 1.3 on both joints.
    from compliant_demo.teaching import cork_seat_scenario, teaching_series

    scenario = cork_seat_scenario()
    demos = [(r.t - r.t[0], r.position) for r in teaching_series(scenario, 8, seed)]
    skill = learn_skill(demos, joints=list(scenario.joint_names), alignment="resample",
                        stiffness_source="variability", stiffness_range=(2.0, 200.0),
                        variability_reference=(0.02, 6.0), target_inertia=[0.08, 0.03])
    k = skill.rollout(dt=0.002).stiffness
    n = len(k)
    press = np.median(k[int(0.5 * n):int(0.6 * n)], axis=0)
    approach = np.median(k[int(0.05 * n):int(0.3 * n)], axis=0)
    retreat = np.median(k[int(0.8 * n):int(0.95 * n)], axis=0)
    assert np.all(press > 1.3 * approach) and np.all(press > 1.3 * retreat)


@pytest.mark.parametrize("n_demos", [2, 3, 4, 8])
def test_few_demonstrations_give_a_profile_inside_the_range(n_demos):
    # Three demonstrations once put the whole profile at k_min (the mean-unbiased factor
    # (nu - 2) / nu of the precision vanished as the pooled degrees of freedom fell towards 2);
    # the chi-square median factor is positive for any number. Simulated teacher, seed 101:
    # finite, inside [2, 200] N*m/rad, not pinned to a bound (median above 2.2 and a span of at
    # least a factor 3 on each joint), and from 3 demonstrations on the press median above the
    # median of the soft approach and retreat on both joints (held on 10 of 10 seeds, 101 to
    # 1010, for 3, 4 and 8; with 2 demonstrations, one degree of freedom per sample, only on 8
    # or 9 of 10, so not asserted).
    from compliant_demo.teaching import cork_seat_scenario, teaching_series

    scenario = cork_seat_scenario()
    demos = [(r.t - r.t[0], r.position) for r in teaching_series(scenario, n_demos, 101)]
    skill = learn_skill(demos, joints=list(scenario.joint_names), alignment="resample",
                        stiffness_source="variability", stiffness_range=(2.0, 200.0),
                        variability_reference=(0.02, 6.0), target_inertia=[0.08, 0.03])
    alignment = skill.provenance.alignment
    if n_demos < 3:
        # leaving one out leaves no spread to choose by: the kernel at its default bandwidth
        assert alignment["variability_model"] == "kernel"
        assert alignment["variability_bandwidth"] == VARIABILITY_BANDWIDTH
    elif alignment["variability_model"] == "kernel":
        assert alignment["variability_bandwidth"] in VARIABILITY_BANDWIDTH_CANDIDATES
    else:
        assert alignment["variability_change_penalty"] in VARIABILITY_CHANGE_PENALTIES
        assert alignment["variability_level_penalty"] in VARIABILITY_LEVEL_PENALTIES
    k = skill.rollout(dt=0.002).stiffness
    assert np.isfinite(k).all() and k.min() >= 2.0 and k.max() <= 200.0
    assert np.all(np.median(k, axis=0) > 2.2) and np.all(k.max(axis=0) > 3 * k.min(axis=0))
    if n_demos >= 3:
        n = len(k)
        press = np.median(k[int(0.5 * n):int(0.6 * n)], axis=0)
        soft = np.median(np.vstack([k[int(0.05 * n):int(0.3 * n)], k[int(0.8 * n):int(0.95 * n)]]),
                         axis=0)
        assert np.all(press > soft)
