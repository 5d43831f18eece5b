"""Campaign walls on the side of the motion, and walls never touched reported as untouched."""

from __future__ import annotations

import numpy as np
import pytest
from campaign_support import campaign_job, store_with_demos_and_skill

from compliant_demo.app.report_content import collect_report_content
from compliant_demo.campaign import ReplayCampaign, run_campaign
from compliant_demo.store import DemoStore

N = 8


def _wall_campaign(side: str) -> ReplayCampaign:
    base = campaign_job(N)
    spec = base.spec.model_copy(update={"kinds": {"wall": 1.0}, "wall_side": side})
    return ReplayCampaign(base.setup, spec, N, seed=5)


@pytest.fixture(scope="module")
def outcomes() -> dict:
    return {side: (job, job.run_batch(0, range(N)))
            for side, job in ((s, _wall_campaign(s)) for s in ("toward", "away"))}


def test_walls_toward_the_motion_sit_in_the_commanded_path_and_are_touched(outcomes):
    job, results = outcomes["toward"]
    path = job.setup.rollout.position
    for index, outcome in enumerate(results):
        (wall,) = job.schedule(index).perturbations
        step = round(wall.onset_s / job.setup.dt)
        window = path[step:round((wall.onset_s + wall.duration_s) / job.setup.dt) + 1,
                      wall.joint]
        # the commanded path crosses the surface inside the window: the wall is in its way
        assert np.any((window - (window[0] + wall.position)) * wall.sign > 0), index
        assert outcome.metrics["perturbation_status"] != ["untouched"], index
        assert outcome.metrics["peak_interaction_torque_max_Nm"] > 0, index


def test_an_untouched_wall_is_reported_as_such_and_never_as_recovered(outcomes):
    _, results = outcomes["away"]
    untouched = [o for o in results if o.metrics["perturbation_status"] == ["untouched"]]
    assert untouched  # walls behind a joint that does not come back (seeded campaign)
    for outcome in results:
        still = float(np.abs(outcome.trace["tau_external"]).max()) == 0.0
        # a single-wall scenario: untouched exactly when the wall never pushed
        assert (outcome.metrics["perturbation_status"] == ["untouched"]) == still
    for outcome in untouched:
        assert outcome.metrics["recovered"] == [False]
        assert outcome.metrics["recovery_time_s"] == [None]
        assert outcome.metrics["recovery_time_max_s"] is None
        assert outcome.metrics["n_untouched"] == 1


def test_the_campaign_summary_counts_scenarios_with_an_untouched_wall(tmp_path, outcomes):
    skill_id = store_with_demos_and_skill(tmp_path / "s.sqlite")
    _, results = outcomes["away"]
    with DemoStore(tmp_path / "s.sqlite", durable=False) as store:
        summary = run_campaign(store, _wall_campaign("away"), skill_id=skill_id, workers=0)
        report = dict(collect_report_content(store, "cork_seat").summary)
    n_untouched = sum(o.metrics["n_untouched"] > 0 for o in results)
    assert summary.n_untouched_walls == n_untouched > 0
    assert report["walls never touched"].startswith(f"{n_untouched} scenario(s), reported as "
                                                    "untouched")
    # the share recovered counts only scenarios whose wall was touched
    touched = [o for o in results if o.metrics["n_untouched"] == 0]
    share = np.mean([o.metrics["recovery_time_max_s"] is not None for o in touched])
    assert report["recovered within the band"].startswith(f"{100 * share:.0f} %")


def test_a_stored_campaign_from_before_wall_sides_is_rebuilt_with_walls_as_drawn():
    job = _wall_campaign("toward")
    config = job.config()
    assert config["spec"]["wall_side"] == "toward"
    assert ReplayCampaign.from_config(job.skill, config).spec.wall_side == "toward"
    legacy = {**config, "spec": {k: v for k, v in config["spec"].items() if k != "wall_side"}}
    rebuilt = ReplayCampaign.from_config(job.skill, legacy)
    assert rebuilt.spec.wall_side == "as_drawn" and rebuilt.config() == legacy
