"""Perturbation kinds, schedules from YAML, campaigns and their compiled torque profiles."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.perturbation import (
    NEVER,
    PERTURBATION_KINDS,
    CampaignSpec,
    Choice,
    Hold,
    Impulse,
    LogUniform,
    Normal,
    PerturbationSchedule,
    RandomTorque,
    Sinusoid,
    TorqueStep,
    TorqueWindow,
    Uniform,
    Wall,
    draw_scenarios,
    load_campaign_yaml,
    load_schedule_yaml,
    load_schedules_yaml,
    perturbation_from_mapping,
    place_relative_walls,
    random_torque_coefficients,
    random_torque_value,
    step_span,
)
from compliant_demo.sim.schedule import compile_schedules

CONFIG = Path(__file__).resolve().parent.parent / "config"


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "schedule.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def test_example_configs_load():
    scenarios = load_schedules_yaml(CONFIG / "perturbations_cork_seat.yaml")
    assert [s.name for s in scenarios][:2] == ["unperturbed", "bump_during_approach"]
    assert {k for s in scenarios for k in s.kinds} == set(PERTURBATION_KINDS)
    spec = load_campaign_yaml(CONFIG / "perturbations_campaign.yaml")
    assert spec.name == "cork_seat_robustness" and len(draw_scenarios(spec, 5, 0)) == 5


def test_schedule_yaml_round_trip(tmp_path):
    path = _write(
        tmp_path,
        "name: bumps\nperturbations:\n"
        "  - {kind: impulse, onset_s: 0.5, joint: 1, magnitude: 0.02, sign: -1}\n"
        "  - {kind: wall, onset_s: 1.0, position: 0.3, magnitude: 400}\n",
    )
    schedule = load_schedule_yaml(path)
    assert schedule.name == "bumps"
    assert schedule.perturbations[0] == Impulse(onset_s=0.5, joint=1, magnitude=0.02, sign=-1)
    assert schedule.perturbations[1].duration_s == math.inf


def test_unknown_kind_in_yaml_is_named(tmp_path):
    path = _write(tmp_path, "perturbations:\n  - {kind: shove, onset_s: 1.0}\n")
    with pytest.raises(InvalidInputError, match=r"perturbations\[0\]\.kind = 'shove'"):
        load_schedule_yaml(path)


def test_negative_duration_is_named(tmp_path):
    path = _write(tmp_path, "perturbations:\n  - {kind: hold, duration_s: -0.2}\n")
    with pytest.raises(InvalidInputError, match=r"'duration_s' = -0\.2"):
        load_schedule_yaml(path)
    with pytest.raises(InvalidInputError, match=r"'duration_s' = -1"):
        perturbation_from_mapping({"kind": "torque_window", "duration_s": -1})


@pytest.mark.parametrize(
    "text, match",
    [
        ("perturbations: 3\n", r"perturbations: expected a list"),
        ("- 1\n- 2\n", r"expected a mapping, got list"),
        ("perturbations:\n  - {kind: wall, magnitude: 0}\n", r"'magnitude' = 0"),
        ("perturbations:\n  - {kind: impulse, sign: 2}\n", r"'sign' = 2"),
        ("perturbations:\n  - {kind: sinusoid, colour: red}\n", r"'colour' = 'red'"),
        ("perturbations:\n  - {kind: torque_window, duration_s: 0.1, ramp_s: 0.2}\n", "ramp_s"),
        ("perturbations: [\n", r"not a readable YAML"),
        ("a: !!python/object:os.system {}\n", r"not a readable YAML"),
    ],
)
def test_bad_schedule_files_raise_named_errors(tmp_path, text, match):
    with pytest.raises(InvalidInputError, match=match):
        load_schedule_yaml(_write(tmp_path, text))


def test_missing_file_is_named(tmp_path):
    with pytest.raises(InvalidInputError, match="cannot read file"):
        load_schedule_yaml(tmp_path / "absent.yaml")


def test_step_span_snaps_to_the_grid():
    dt = 1e-3
    assert step_span(TorqueWindow(onset_s=0.1004, duration_s=0.2), dt) == (100, 300)
    assert step_span(Impulse(onset_s=0.0996), dt) == (100, 100)
    assert step_span(Hold(onset_s=0.2, duration_s=1e-5), dt) == (200, 201)
    assert step_span(TorqueStep(onset_s=0.5), dt) == (500, NEVER)


def test_random_torque_has_exact_rms_and_no_power_above_its_band():
    p = RandomTorque(duration_s=2.0, magnitude=0.4, bandwidth_hz=5.0, taper_fraction=0.0)
    freqs, coefs = random_torque_coefficients(p, 2.0, np.random.default_rng(3))
    t = np.arange(4000) * 5e-4
    x = random_torque_value(freqs, coefs, t)
    # Parseval over whole periods (common practice): RMS equals the set magnitude
    assert math.sqrt(np.mean(x**2)) == pytest.approx(0.4, rel=1e-10)
    spectrum = np.abs(np.fft.rfft(x)) ** 2
    f = np.fft.rfftfreq(t.size, 5e-4)
    assert spectrum[f > 5.0 + 1e-9].sum() <= 1e-20 * spectrum.sum()
    assert freqs.max() <= 5.0


@pytest.mark.parametrize(("fraction", "seed"), [(0.2, 3), (0.5, 8), (0.05, 21)])
def test_random_torque_is_tapered_to_zero_with_the_set_rms_in_its_middle(fraction, seed):
    length, dt = 1.0, 1e-3
    p = RandomTorque(duration_s=length, magnitude=0.7, bandwidth_hz=8.0, seed=seed,
                     taper_fraction=fraction)
    (term,) = compile_schedules([PerturbationSchedule(perturbations=[p])], 1, [0.05], dt,
                                seed=0).terms
    # the first and last stage times of the window: the Tukey window is exactly 0 there
    assert abs(float(term.profile(np.array(0.0)))) < 1e-12
    assert abs(float(term.profile(np.array(length)))) < 1e-12
    # RMS over the untapered middle [r, T - r], r = fraction*T/2, by the midpoint rule on a
    # fine grid: the rule's error is O(h^2) * max|x''| / 24 (common practice), far below 1e-6
    ramp, n = 0.5 * fraction * length, 200_000
    h = (length - 2 * ramp) / n
    t = ramp + (np.arange(n) + 0.5) * h
    assert math.sqrt(np.mean(term.profile(t) ** 2)) == pytest.approx(0.7, rel=1e-6)
    # the edges are raised cosines (1 - cos(pi*t/r))/2 times the untapered series
    freqs, coefs = random_torque_coefficients(p, length, np.random.default_rng(seed))
    edge = np.linspace(0.0, ramp, 50)
    expected = random_torque_value(freqs, coefs, edge) * 0.5 * (1 - np.cos(np.pi * edge / ramp))
    assert np.allclose(term.profile(edge), expected, rtol=0, atol=1e-12)
    assert np.allclose(term.profile(length - edge), random_torque_value(
        freqs, coefs, length - edge) * 0.5 * (1 - np.cos(np.pi * edge / ramp)), rtol=0, atol=1e-12)


@pytest.mark.parametrize("bad", [-0.1, 1.0, float("nan")])
def test_random_torque_taper_outside_zero_to_one_is_refused(bad):
    with pytest.raises(InvalidInputError, match=rf"taper_fraction' = {bad}"):
        perturbation_from_mapping({"kind": "random_torque", "taper_fraction": bad})


def test_random_torque_is_seeded_per_scenario():
    schedules = [PerturbationSchedule(perturbations=[RandomTorque()])] * 2
    a = compile_schedules(schedules, 2, [0.05], 1e-3, seed=4)
    b = compile_schedules(schedules, 2, [0.05], 1e-3, seed=4)
    t = np.linspace(0, 1, 50)
    assert np.array_equal(a.terms[0].profile(t), b.terms[0].profile(t))
    assert not np.allclose(a.terms[0].profile(t), a.terms[1].profile(t))
    own = PerturbationSchedule(perturbations=[RandomTorque(seed=9)])
    c = compile_schedules([own], 1, [0.05], 1e-3, seed=1)
    d = compile_schedules([own], 1, [0.05], 1e-3, seed=2)
    assert np.array_equal(c.terms[0].profile(t), d.terms[0].profile(t))


def test_window_and_pulse_profiles():
    dt = 1e-3
    window = TorqueWindow(onset_s=0.0, duration_s=0.3, ramp_s=0.05, magnitude=2.0, sign=-1)
    pulse = Impulse(onset_s=0.0, duration_s=0.02, magnitude=0.03)
    compiled = compile_schedules(
        [PerturbationSchedule(perturbations=[window, pulse])], 1, [0.05], dt, seed=0
    )
    t = np.linspace(0.0, 0.3, 30001)
    shape = compiled.terms[0].profile(t)
    # raised-cosine edges: the area is magnitude * (duration - ramp) (integral of 1/2(1-cos))
    assert np.trapezoid(shape, t) == pytest.approx(-2.0 * (0.3 - 0.05), rel=1e-6)
    assert shape[0] == 0 and shape[-1] == pytest.approx(0, abs=1e-12)
    # a pulse of duration d carries the impulse: height * d = magnitude
    assert compiled.terms[1].profile(np.array([0.01]))[0] * 0.02 == pytest.approx(0.03)


@pytest.mark.parametrize("chunk", [1, 7, 256, 5000])
def test_torque_filled_chunk_by_chunk_equals_the_sinusoid(chunk):
    """A sinusoid without end over 5,000 steps (more than one stretch of evaluated torques),
    and a step ending inside a chunk, filled chunk by chunk at the stage times k*dt, (k+1/2)*dt
    and (k+1)*dt: the closed form a*sin(2*pi*f*t + phase) (the kind's definition) and the
    step's constant height, whatever the chunk size."""
    dt, n_steps = 1e-3, 5000
    wave = Sinusoid(onset_s=0.0, magnitude=0.7, frequency_hz=3.0, phase_rad=0.4)
    step = TorqueStep(onset_s=0.0102, duration_s=0.0301, magnitude=1.5, joint=1, sign=-1)
    compiled = compile_schedules([PerturbationSchedule(perturbations=[wave, step])], 1,
                                 [0.05, 0.05], dt, seed=0)
    filled = np.zeros((n_steps, 3, 2, 1))
    for k0 in range(0, n_steps, chunk):
        assert compiled.fill_torque(filled[k0:k0 + chunk], k0)
    t = (np.arange(n_steps)[:, None] + np.array([0.0, 0.5, 1.0])) * dt
    np.testing.assert_allclose(filled[:, :, 0, 0], 0.7 * np.sin(2 * np.pi * 3.0 * t + 0.4),
                               rtol=0, atol=1e-12)
    start, stop = step_span(step, dt)
    expected = np.zeros(n_steps)
    expected[start:stop] = -1.5
    np.testing.assert_array_equal(filled[:, :, 1, 0], np.repeat(expected[:, None], 3, axis=1))


def test_draw_scenarios_is_deterministic_and_follows_the_spec():
    spec = CampaignSpec(
        kinds={"impulse": 3.0, "wall": 1.0},
        joints=[0, 1],
        perturbations_per_scenario=2,
        onset_s=Uniform(low=0.5, high=1.5),
        magnitude={"impulse": LogUniform(low=0.01, high=0.1), "wall": Choice(values=[200, 400])},
        positive_sign_probability=0.8,
        fields={"wall": {"position": Normal(mean=0.1, std=0.05, low=0.0, high=0.2)}},
    )
    first = draw_scenarios(spec, 400, seed=12)
    assert first == draw_scenarios(spec, 400, seed=12)
    assert first != draw_scenarios(spec, 400, seed=13)
    items = [p for s in first for p in s.perturbations]
    assert len(items) == 800
    kinds = np.array([p.kind for p in items])
    # binomial counts, 800 draws: 4-sigma bands (common practice)
    assert abs(np.mean(kinds == "impulse") - 0.75) <= 4 * math.sqrt(0.75 * 0.25 / 800)
    signs = np.array([p.sign for p in items])
    assert abs(np.mean(signs == 1) - 0.8) <= 4 * math.sqrt(0.8 * 0.2 / 800)
    onsets = np.array([p.onset_s for p in items])
    assert onsets.min() >= 0.5 and onsets.max() <= 1.5
    walls = [p for p in items if p.kind == "wall"]
    assert {p.magnitude for p in walls} == {200.0, 400.0}
    assert all(0.0 <= p.position <= 0.2 for p in walls)
    impulses = [p.magnitude for p in items if p.kind == "impulse"]
    assert min(impulses) >= 0.01 and max(impulses) <= 0.1


@pytest.mark.parametrize(
    "fields, match",
    [
        ({"kinds": {"shove": 1.0}}, "shove"),
        ({"kinds": {"hold": 1.0}, "magnitude": {"hold": {"distribution": "fixed", "value": 1}}},
         "no magnitude"),
        ({"kinds": {"wall": 1.0}, "fields": {"wall": {"colour": {"distribution": "fixed",
                                                                   "value": 1}}}}, "colour"),
        ({"kinds": {"wall": 1.0}, "onset_s": {"distribution": "uniform", "low": 2, "high": 1}},
         "low"),
    ],
)
def test_bad_campaign_specs_raise_named_errors(tmp_path, fields, match):
    import yaml

    path = tmp_path / "campaign.yaml"
    path.write_text(yaml.safe_dump({"campaign": fields}), encoding="utf-8")
    with pytest.raises(InvalidInputError, match=match):
        load_campaign_yaml(path)


def test_draw_that_violates_a_kind_is_named():
    spec = CampaignSpec(kinds={"impulse": 1.0},
                        magnitude={"impulse": Normal(mean=0.0, std=1.0)})
    with pytest.raises(InvalidInputError, match=r"scenario \d+, draw \d+: field 'magnitude'"):
        draw_scenarios(spec, 50, seed=1)
    with pytest.raises(InvalidInputError, match="n_scenarios = -1"):
        draw_scenarios(spec, -1, seed=1)


# ---------------------------------------------------------------- walls on the side of motion
def _walls(*walls: Wall) -> PerturbationSchedule:
    return PerturbationSchedule(perturbations=list(walls))


@pytest.mark.parametrize(("side", "drawn_sign", "moved", "expected_sign"), [
    ("toward", 1, 0.4, 1), ("toward", 1, -0.4, -1), ("toward", -1, 0.4, 1),
    ("away", 1, 0.4, -1), ("away", -1, -0.4, 1),
    ("both", 1, -0.4, -1), ("both", -1, -0.4, 1),
    ("toward", -1, 0.0, -1),  # no motion: the drawn sign stands for the direction
])
def test_relative_walls_go_on_the_side_of_the_motion(side, drawn_sign, moved, expected_sign):
    drawn = _walls(Wall(onset_s=0.5, duration_s=0.4, joint=1, position=0.05, sign=drawn_sign,
                        relative=True),
                   Wall(onset_s=0.7, position=0.3, sign=drawn_sign))
    asked = []

    def direction(joint: int, onset: float, duration: float) -> float:
        asked.append((joint, onset, duration))
        return moved

    placed = place_relative_walls(drawn, direction, side)
    wall, absolute = placed.perturbations
    assert asked == [(1, 0.5, 0.4)]  # only the relative wall asks for the motion
    # +1 blocks q > surface, so the surface sits sign*|position| from the angle at onset
    assert wall.sign == expected_sign and wall.position == expected_sign * 0.05
    assert absolute == drawn.perturbations[1]
    assert place_relative_walls(drawn, direction, "as_drawn") == drawn


def test_an_unknown_wall_side_is_refused():
    with pytest.raises(InvalidInputError, match=r"side = 'left': expected one of toward"):
        place_relative_walls(_walls(), lambda joint, onset, duration: 1.0, "left")


def test_wall_side_in_a_campaign_yaml_is_checked(tmp_path):
    path = tmp_path / "campaign.yaml"
    path.write_text("kinds: {wall: 1}\nwall_side: sideways\n", encoding="utf-8")
    with pytest.raises(InvalidInputError, match=r"field 'wall_side' = 'sideways'"):
        load_campaign_yaml(path)
    path.write_text("kinds: {wall: 1}\nwall_side: both\n", encoding="utf-8")
    assert load_campaign_yaml(path).wall_side == "both"
    assert CampaignSpec(kinds={"wall": 1.0}).wall_side == "toward"  # walls in the path


def test_a_wall_is_touched_only_when_the_angle_crosses_its_surface_in_its_window():
    # q = 0.5 t rises through the window [0.2, 0.4] s: from 0.1 to 0.2 rad (closed form)
    t = np.linspace(0.0, 1.0, 1001)
    q = np.column_stack([0.5 * t, np.zeros_like(t)])
    ahead = Wall(onset_s=0.2, duration_s=0.2, position=0.05, relative=True)
    behind = Wall(onset_s=0.2, duration_s=0.2, position=-0.05, sign=-1, relative=True)
    late = Wall(onset_s=0.2, duration_s=0.2, position=0.21)  # absolute, reached at 0.42 s
    assert ahead.touched(t, q[:, 0]) and not behind.touched(t, q[:, 0])
    assert not late.touched(t, q[:, 0])
    schedule = PerturbationSchedule(perturbations=[late, Impulse(onset_s=0.1), ahead])
    # in the order of windows(): by onset, then end
    assert schedule.windows(1.0) == ([0.1, 0.2, 0.2], [0.1, 0.4, 0.4])
    assert schedule.acted(t, q) == [True, False, True]
