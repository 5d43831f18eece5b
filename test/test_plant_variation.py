"""Model uncertainty: plants drawn around the nominal one, campaigns on them, and the screening of
which drawn factor goes with failure."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from campaign_support import campaign_job, store_with_demos_and_skill
from cli_support import run_cli
from scipy.stats import mannwhitneyu

from compliant_demo.app.report_content import collect_report_content
from compliant_demo.campaign import ReplayCampaign, run_campaign
from compliant_demo.exceptions import InvalidInputError, UnstableStepError
from compliant_demo.perturbation import (
    PLANT_PARAMETERS,
    Fixed,
    LogUniform,
    Normal,
    Uniform,
    draw_scenarios,
    load_campaign_yaml,
)
from compliant_demo.plant import load_plant
from compliant_demo.plant_variation import (
    failure_drivers,
    scenario_failed,
    vary_plant,
)
from compliant_demo.store import DemoStore

CONFIG = Path(__file__).resolve().parent.parent / "config"


# ---------------------------------------------------------------- drawing plants
def test_factors_multiply_the_nominal_values_per_joint():
    nominal = load_plant()  # antagonistic springs, joints shoulder and elbow
    variation = {"inertia": Fixed(value=1.25), "viscous_damping": Fixed(value=0.5),
                 "k2": Fixed(value=0.8), "motor_time_constant": Fixed(value=2.0),
                 "torque_noise_std": Fixed(value=3.0)}
    drawn, factors = vary_plant(nominal, variation, np.random.default_rng(0))
    assert factors == {name: {"shoulder": f.value, "elbow": f.value}
                       for name, f in variation.items()}
    for before, after in zip(nominal.joints, drawn.joints, strict=True):
        assert after.inertia == pytest.approx(1.25 * before.inertia, rel=1e-15)
        assert after.viscous_damping == pytest.approx(0.5 * before.viscous_damping, rel=1e-15)
        assert after.torque_noise_std == pytest.approx(3.0 * before.torque_noise_std, rel=1e-15)
        assert after.gravity_mass == before.gravity_mass and after.name == before.name
    assert drawn.mechanisms is not None and len(drawn.mechanisms) == 2
    for mechanism in drawn.mechanisms:
        assert mechanism.k2 == pytest.approx(0.8 * nominal.mechanism.k2, rel=1e-15)
        assert mechanism.motor_time_constant == pytest.approx(
            2.0 * nominal.mechanism.motor_time_constant, rel=1e-15)
        assert mechanism.k1 == nominal.mechanism.k1


def test_draws_are_seeded_and_independent_per_joint():
    variation = {"inertia": Uniform(low=0.8, high=1.2), "k1": Uniform(low=0.9, high=1.1)}
    first = vary_plant(load_plant(), variation, np.random.default_rng(3))
    assert first == vary_plant(load_plant(), variation, np.random.default_rng(3))
    factors = first[1]
    assert factors["inertia"]["shoulder"] != factors["inertia"]["elbow"]
    assert all(0.8 <= f <= 1.2 for f in factors["inertia"].values())


def test_a_stiffer_linear_spring_raises_the_lowest_stiffness_to_two_k1():
    nominal = load_plant()  # k1 = 6 N*m/rad, stiffness_min = 15 N*m/rad
    drawn, _ = vary_plant(nominal, {"k1": Fixed(value=1.5)}, np.random.default_rng(0))
    # both springs at zero elongation give 2*k1 (Migliore, Brown, DeWeerth, ICRA 2005)
    assert drawn.mechanisms is not None
    assert {m.stiffness_min for m in drawn.mechanisms} == {2 * 1.5 * 6.0}


def test_a_coupled_arm_scales_the_link_mass_and_inertia_tensor_together():
    nominal = load_plant(CONFIG / "arm_cork_seat.yaml")
    drawn, _ = vary_plant(nominal, {"inertia": Fixed(value=1.5)}, np.random.default_rng(0))
    assert nominal.chain is not None and drawn.chain is not None
    for before, after in zip(nominal.chain.bodies, drawn.chain.bodies, strict=True):
        assert after.mass == pytest.approx(1.5 * before.mass, rel=1e-15)
        np.testing.assert_allclose(after.inertia, 1.5 * np.array(before.inertia), rtol=1e-15)
        assert after.com == before.com


@pytest.mark.parametrize(("plant_file", "name", "message"), [
    (None, "time_constant", r"plant_variation.time_constant: the antagonistic mechanism has no "
                            r"'time_constant' \(it varies k1, k2, motor_time_constant\)"),
    ("arm_cork_seat.yaml", "gravity_mass", r"plant_variation.gravity_mass: the coupled arm "
                                           r"'.*arm_cork_seat.urdf' takes its gravity load"),
])
def test_parameters_the_plant_has_no_use_for_are_refused(plant_file, name, message):
    plant = load_plant(None if plant_file is None else CONFIG / plant_file)
    with pytest.raises(InvalidInputError, match=message):
        vary_plant(plant, {name: Fixed(value=1.1)}, np.random.default_rng(0))
    spec = campaign_job(2).spec.model_copy(update={"plant_variation": {name: Fixed(value=1.1)}})
    with pytest.raises(InvalidInputError, match=message):
        ReplayCampaign(campaign_job(2, target=plant).setup, spec, 2)


@pytest.mark.parametrize(("block", "message"), [
    ("{mass: {distribution: fixed, value: 1.1}}",
     r"plant_variation names 'mass', not a plant parameter \(known: inertia, gravity_mass"),
    ("{inertia: {distribution: normal, mean: 1.0, std: 0.1}}",
     r"plant_variation.inertia can draw the factor -inf; factors must be > 0"),
    ("{k2: {distribution: uniform, low: 0.0, high: 1.2}}",
     r"plant_variation.k2 can draw the factor 0.0; factors must be > 0"),
    ("{k2: 1.1}", r"field 'plant_variation.k2' = 1.1"),
])
def test_bad_plant_variation_in_a_campaign_yaml_is_refused(tmp_path, block, message):
    path = tmp_path / "campaign.yaml"
    path.write_text(f"kinds: {{impulse: 1}}\nplant_variation: {block}\n", encoding="utf-8")
    with pytest.raises(InvalidInputError, match=message):
        load_campaign_yaml(path)


def test_the_example_campaign_varies_every_kind_of_parameter_the_default_plant_has():
    spec = load_campaign_yaml(CONFIG / "plant_variation_campaign.yaml")
    assert set(spec.plant_variation) == set(PLANT_PARAMETERS) - {"gravity_mass", "time_constant"}
    assert len(draw_scenarios(spec, 3, seed=1)) == 3
    drawn, factors = vary_plant(load_plant(), spec.plant_variation, np.random.default_rng(2))
    assert set(factors) == set(spec.plant_variation) and drawn.mechanism.kind == "antagonistic"


# ---------------------------------------------------------------- screening
def test_auc_equals_the_mann_whitney_u_over_the_product_of_the_counts():
    rng = np.random.default_rng(7)
    values = np.round(rng.uniform(0.8, 1.2, 40), 2)  # rounded: ties get mid-ranks
    failed = rng.random(40) < 0.3
    (driver,) = failure_drivers([{"k2": {"elbow": v}} for v in values], failed)
    # reference: scipy.stats.mannwhitneyu, U of the first sample (the failed scenarios)
    u = mannwhitneyu(values[failed], values[~failed]).statistic
    n_failed = int(failed.sum())
    assert driver.auc == pytest.approx(u / (n_failed * (40 - n_failed)), rel=1e-12)
    assert (driver.n_failed, driver.n_passed) == (n_failed, 40 - n_failed)
    assert driver.rank_biserial == pytest.approx(2 * driver.auc - 1, rel=1e-12)


def test_drivers_are_ranked_by_their_separation_of_failures():
    # closed forms: a factor that separates perfectly has AUC 1 (or 0), a constant one 0.5
    failed = [False, False, True, True]
    factors = [{"inertia": {"j": 1.0 + i}, "k2": {"j": 1.0}, "k1": {"j": 4.0 - i}}
               for i in range(4)]
    drivers = failure_drivers(factors, failed)
    assert [(d.parameter, d.auc) for d in drivers] == [("inertia", 1.0), ("k1", 0.0),
                                                       ("k2", 0.5)]
    assert "inertia on j: failures come with larger factors, AUC 1.00" in drivers[0].describe()
    assert failure_drivers(factors, [False] * 4) == []  # nothing to separate


def test_screening_of_mismatched_draws_is_refused():
    with pytest.raises(InvalidInputError, match=r"failed: 1 flags for 2 scenarios' factors"):
        failure_drivers([{"k2": {"j": 1.0}}, {"k2": {"j": 1.1}}], [True])
    with pytest.raises(InvalidInputError, match=r"factors\[1\]: parameters and joints"):
        failure_drivers([{"k2": {"j": 1.0}}, {"k1": {"j": 1.1}}], [True, False])


def test_a_scenario_fails_when_it_leaves_a_limit_or_does_not_recover():
    assert scenario_failed("violation", {"perturbation_status": ["recovered"]})
    assert scenario_failed("ok", {"perturbation_status": ["untouched", "not_recovered"]})
    assert not scenario_failed("ok", {"perturbation_status": ["untouched", "recovered"]})


# ---------------------------------------------------------------- campaigns
N = 6


def _varied(variation: dict) -> ReplayCampaign:
    base = campaign_job(N)
    return ReplayCampaign(base.setup, base.spec.model_copy(update={"plant_variation": variation}),
                          N, seed=5)


def test_unit_factors_reproduce_the_nominal_campaign():
    # each scenario then runs alone with its unperturbed twin instead of in one batch: the same
    # plant, so the same results to rounding
    nominal = campaign_job(N).run_batch(0, range(N))
    unit = _varied({"inertia": Fixed(value=1.0), "viscous_damping": Fixed(value=1.0),
                    "time_constant": Fixed(value=1.0)}).run_batch(0, range(N))
    for a, b in zip(nominal, unit, strict=True):
        assert (a.status, a.parameters) == (b.status, b.parameters)
        assert b.metrics["plant_factors"]["inertia"] == {"shoulder": 1.0, "elbow": 1.0}
        np.testing.assert_allclose(a.trace["q"], b.trace["q"], rtol=0, atol=1e-12)
        for name in ("goal_error_max_rad", "peak_deviation_max_rad",
                     "peak_interaction_torque_max_Nm"):
            assert b.metrics[name] == pytest.approx(a.metrics[name], rel=1e-9, abs=1e-12), name


def test_each_scenario_runs_on_its_drawn_plant_which_is_stored_with_its_result(tmp_path):
    job = _varied({"inertia": LogUniform(low=0.5, high=2.0),
                   "viscous_damping": Normal(mean=1.0, std=0.3, low=0.2, high=3.0)})
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        summary = run_campaign(store, job, skill_id=skill_id, batch_size=4, workers=0)
        results = list(store.find_replay_results(campaign_id=summary.campaign_id))
        report = collect_report_content(store, "cork_seat")
    assert len(results) == N
    for result in results:
        plant, factors = job.drawn_plant(result.scenario_index)  # independent of batching
        assert result.metrics["plant_factors"] == factors
        assert result.parameters.plant == plant.model_dump(mode="json")
        assert [j.inertia for j in plant.joints] == pytest.approx(
            [j.inertia * factors["inertia"][j.name] for j in job.plant.joints], rel=1e-15)
    stored_config = job.config()["spec"]["plant_variation"]
    assert set(stored_config) == {"inertia", "viscous_damping"}
    # the summary's screening is that of the stored results
    failed = [scenario_failed(r.status, r.metrics) for r in results]
    expected = failure_drivers([r.metrics["plant_factors"] for r in results], failed)
    assert list(summary.failure_drivers) == expected
    assert sum(failed) == 2  # the seeded campaign has failed and passed scenarios to compare
    assert dict(report.summary)["plant variation"].endswith(expected[0].describe())
    (table,) = [t for t in report.tables if t.title == "Plant parameters against failures"]
    assert len(table.rows) == len(expected) == 4  # two parameters on two joints


def test_a_nominal_campaign_stores_no_plant_and_no_factors():
    (outcome,) = campaign_job(1).run_batch(0, (0,))
    assert outcome.plant is None and "plant_factors" not in outcome.metrics
    assert "plant_variation" not in campaign_job(1).config()["spec"]


def test_the_campaign_command_runs_the_example_and_names_the_strongest_factor(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path)
    common = ["campaign", "--store", path, "--spec", CONFIG / "plant_variation_campaign.yaml",
              "--scenarios", "4", "--seed", "1", "--workers", "0", "--duration", "1.5",
              "--settle", "0.3"]
    status, out, err = run_cli(capsys, *common, "--json")
    assert status == 0, err
    data = json.loads(out)
    with DemoStore(path, read_only=True) as store:
        results = list(store.find_replay_results(campaign_id=data["campaign_id"]))
    assert all(set(r.metrics["plant_factors"]) == set(PLANT_PARAMETERS)
               - {"gravity_mass", "time_constant"} for r in results)
    drivers = failure_drivers([r.metrics["plant_factors"] for r in results],
                              [scenario_failed(r.status, r.metrics) for r in results])
    assert data["failure_drivers"] == [d.as_dict() for d in drivers]
    assert set(data["failure_drivers"][0]) == {"parameter", "joint", "auc", "rank_biserial",
                                               "failed", "passed"}
    status, out, err = run_cli(capsys, "campaign", "--store", path, "--resume",
                               data["campaign_id"])
    assert status == 0, err
    assert drivers  # seed 1: two of the four scenarios fail
    assert f"strongest with failure (screening): {drivers[0].describe()}" in out


def test_a_factor_at_or_below_zero_is_refused_when_drawn():
    # the campaign spec refuses such distributions; vary_plant checks what it draws all the same
    with pytest.raises(InvalidInputError,
                       match=r"plant_variation.k2: drew the factor -1.0; factors must be > 0"):
        vary_plant(load_plant(), {"k2": Fixed(value=-1.0)}, np.random.default_rng(0))


def test_a_drawn_plant_too_stiff_for_the_step_names_its_scenario_and_factors():
    # a link 10^4 times lighter: sqrt(K/I)*dt far above RK4's bound 2*sqrt(2) (common practice)
    job = _varied({"inertia": Fixed(value=1e-4)})
    with pytest.raises(UnstableStepError, match=r"scenario 0 on its drawn plant \(factors "
                                                r"\{'inertia': \{'shoulder': 0.0001"):
        job.run_batch(0, (0,))
