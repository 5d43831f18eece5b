"""The report built from a store: recorder-like demonstrations (online estimate with gaps), the
teacher's truth file, a campaign; and the error paths of collecting it."""

from __future__ import annotations

import re

import numpy as np
import pytest
from _chromium import visit
from campaign_support import JOINTS, campaign_job, cork_seat_records, cork_seat_skill

from compliant_demo.app.report_content import GroundTruth, collect_report_content
from compliant_demo.campaign import run_campaign
from compliant_demo.estimation import estimate_stiffness_series
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.learning import save_skill
from compliant_demo.plant import load_plant
from compliant_demo.report import write_report
from compliant_demo.resources import package_file
from compliant_demo.store import DemoStore
from compliant_demo.teaching import cork_seat_scenario


def _recorded_store(path, truth_path) -> str:
    """Demonstrations stored the way the recorder stores them (NaN where not excited), the
    teacher's truth file written the way the teacher writes it; returns the skill id."""
    settings = cork_seat_scenario().estimator_settings()
    truth = {}
    with DemoStore(path, durable=False) as store:
        ids = []
        for i, record in enumerate(cork_seat_records()):
            series = estimate_stiffness_series(record.t, record.position, record.torque,
                                               **settings)
            ids.append(store.add_demonstration(
                skill="cork_seat", operator="operator_a", joints=list(JOINTS), t=record.t,
                position=record.position, velocity=record.velocity, torque=record.torque,
                stiffness=series.stiffness, source="simulated"))
            truth[f"t_{i}"], truth[f"stiffness_{i}"] = record.t, record.hand_stiffness_truth
            truth[f"count_{i}"] = np.array(record.n_samples)
        np.savez(truth_path, joints=np.array(JOINTS), **truth)
        skill = cork_seat_skill().model_copy(deep=True)
        skill.provenance.demonstration_ids = ids
        return save_skill(store, skill).id


def test_report_from_recorded_demonstrations_and_truth_opens_cleanly(tmp_path):
    path, truth_path = tmp_path / "store.sqlite", tmp_path / "truth.npz"
    skill_id = _recorded_store(path, truth_path)
    truth = GroundTruth.from_npz(truth_path)
    assert len(truth.series) == 3
    with DemoStore(path, durable=False) as store:
        run_campaign(store, campaign_job(n_scenarios=14), skill_id=skill_id, workers=0)
        content = collect_report_content(store, "cork_seat", truth=truth)
        ideal = load_plant(package_file("config", "joint_cork_seat_ideal.yaml"))
        elsewhere = collect_report_content(store, "cork_seat", plant=ideal)
    # on another plant than the campaign's, its scenarios do not count in the verdict
    assert dict(elsewhere.summary)["verdict basis"].startswith("schedule checks only")
    assert elsewhere.verdict is not None
    assert all(r.link.startswith(("stretch-", "clamped-")) for r in elsewhere.verdict.reasons)
    # the soft phases the teacher showed below the mechanism's range are a reason with a row
    assert "teacher_stiffness_clamped" in [r.check for r in elsewhere.verdict.reasons]
    summary = dict(content.summary)
    coverage = float(summary["estimate coverage"].split(" %")[0])
    assert 50 < coverage < 100  # the first window and the settling of the band-pass have no value
    assert summary["within limits"] == "14 of 14"
    assert "outside their band" in summary["unperturbed replay vs demonstrations"]
    tracking = next(t for t in content.tables
                    if t.title == "The unperturbed replay against the demonstrations")
    assert [row[0] for row in tracking.rows] == list(JOINTS)
    assert all(0 <= row[1] <= 100 and row[2] >= 0 for row in tracking.rows)
    estimate = next(f for f in content.figures if f.stem == "stiffness_estimate").figure
    labels = [line.get_label() for line in estimate.axes[0].get_lines()]
    assert labels == ["teacher ground truth", "estimate"]
    hatched = [p for p in estimate.axes[0].patches if p.get_hatch() == ".."]
    assert hatched  # the stretch without an estimate is marked
    files = write_report(content, tmp_path / "report")
    seen = visit(files.html)
    assert seen.errors == []
    assert len(seen.images) == 5 and all(i["complete"] and i["width"] > 0 for i in seen.images)
    # the verdict opens the page, and every reason links to a row of the stretch or scenario
    page = files.html.read_text(encoding="utf-8")
    assert content.verdict is not None and not content.verdict.ready
    assert page.index('id="verdict"') < page.index('class="cautions"') < page.index("Summary")
    links = re.findall(r'<a href="#([^"]+)">', page)
    assert links == [reason.link for reason in content.verdict.reasons]
    ids = set(re.findall(r'<tr id="([^"]+)">', page))
    assert set(links) <= ids
    assert summary["readiness"].startswith("not ready")


def test_report_without_campaign_shows_what_exists(tmp_path):
    path, truth_path = tmp_path / "store.sqlite", tmp_path / "truth.npz"
    _recorded_store(path, truth_path)
    with DemoStore(path, read_only=True) as store:
        content = collect_report_content(store, "cork_seat")
    assert [f.stem for f in content.figures] == [
        "demonstrations", "stiffness_estimate", "schedule_checks"]
    assert "No ground truth was given" in content.figures[1].caption
    assert "planned path vs demonstrations" in dict(content.summary)


def test_a_truth_file_of_other_demonstrations_is_left_out_with_a_warning(tmp_path):
    # the README's report --truth of one run after learning from every demonstration: the truth
    # of that run's first demonstration must not be drawn over another run's first one
    path, truth_path = tmp_path / "store.sqlite", tmp_path / "truth.npz"
    _recorded_store(path, truth_path)
    with np.load(truth_path) as data:
        np.savez(tmp_path / "two.npz", **{k: data[k] for k in data.files if not k.endswith("_2")})
    with DemoStore(path, read_only=True) as store:
        with pytest.warns(UserWarning, match=r"truth file: 2 demonstration\(s\), but cork_seat "
                                             r"version 1 was learned from 3; .* learn --tag"):
            content = collect_report_content(store, "cork_seat",
                                             truth=GroundTruth.from_npz(tmp_path / "two.npz"))
    estimate = next(f for f in content.figures if f.stem == "stiffness_estimate")
    assert "describes 2 other demonstration(s) and is left out" in estimate.caption
    labels = [line.get_label() for line in estimate.figure.axes[0].get_lines()]
    assert labels == ["estimate"]


def test_report_errors_name_what_is_missing(tmp_path):
    path, truth_path = tmp_path / "store.sqlite", tmp_path / "truth.npz"
    skill_id = _recorded_store(path, truth_path)
    with DemoStore(path, durable=False) as store:
        with pytest.raises(NotFoundError, match=r"skill 'other' not found"):
            collect_report_content(store, "other")
        foreign = store.create_campaign(skill_id, {"note": "written by another tool"})
        with pytest.raises(InvalidInputError, match=r"campaign config: lacks \['n_scenarios'"):
            collect_report_content(store, "cork_seat", campaign_id=foreign)
        job = campaign_job(n_scenarios=7)
        empty = store.create_campaign(skill_id, dict(job.config(), batch_size=7))
        with pytest.raises(NotFoundError, match=rf"campaign '{empty}' has no results yet"):
            collect_report_content(store, "cork_seat", campaign_id=empty)
        first_campaign = run_campaign(store, job, skill_id=skill_id, workers=0).campaign_id
        again = cork_seat_skill().model_copy(deep=True)
        again.provenance.demonstration_ids = list(
            store.load_skill_record("cork_seat").demonstration_ids)
        second = save_skill(store, again)
        with pytest.raises(InvalidInputError, match=r"replays another skill version than "
                                                    r"'cork_seat' v2"):
            collect_report_content(store, "cork_seat", version=second.version,
                                   campaign_id=first_campaign)
    with pytest.raises(InvalidInputError, match=r"truth = '.*nothing.npz': not a teacher truth"):
        GroundTruth.from_npz(tmp_path / "nothing.npz")


def test_report_compares_the_model_channel_with_the_estimate(tmp_path):
    from compliant_demo.ingest import STIFFNESS_MODEL_FLAG

    path = tmp_path / "store.sqlite"
    with DemoStore(path, durable=False) as store:
        ids = [store.add_demonstration(
            skill="cork_seat", joints=list(JOINTS), t=r.t, position=r.position,
            velocity=r.velocity, torque=r.torque, flags={STIFFNESS_MODEL_FLAG: 1},
            stiffness=np.clip(r.hand_stiffness_truth, 15.0, 180.0), source="simulated")
            for r in cork_seat_records()]
        skill = cork_seat_skill().model_copy(deep=True)
        skill.provenance.demonstration_ids = ids
        save_skill(store, skill)
        content = collect_report_content(store, "cork_seat")
    assert "stiffness_estimate" not in [f.stem for f in content.figures]
    table = next(t for t in content.tables if t.title == "Model-based stiffness against the "
                                                          "estimate")
    assert [row[0] for row in table.rows] == list(JOINTS)
    for _joint, compared, model, estimate, relative, _rms in table.rows:
        # the soft hand (4 to 6 N*m/rad most of the time) below the springs' 15 N*m/rad floor
        assert float(compared) > 50 and model == "15" and float(estimate) < 10
        assert float(relative) < -30


class _Interrupted(Exception):
    """Stands for the command's death after its first stored batch."""


def test_report_of_an_unfinished_campaign_says_so_until_it_is_resumed(tmp_path):
    path, truth_path = tmp_path / "store.sqlite", tmp_path / "truth.npz"
    skill_id = _recorded_store(path, truth_path)
    job = campaign_job(n_scenarios=7)
    started: list[str] = []

    def stop_after_the_first_batch(_outcomes) -> None:
        raise _Interrupted

    with DemoStore(path, durable=False) as store:
        with pytest.raises(_Interrupted):
            run_campaign(store, job, skill_id=skill_id, workers=0, batch_size=2,
                         on_start=lambda campaign_id, _todo: started.append(campaign_id),
                         on_batch=stop_after_the_first_batch)
        (campaign_id,) = started
        partial = dict(collect_report_content(store, "cork_seat").summary)["campaign"]
        run_campaign(store, job, skill_id=skill_id, workers=0, batch_size=2,
                     campaign_id=campaign_id)
        resumed = dict(collect_report_content(store, "cork_seat").summary)["campaign"]
    assert partial.startswith(f"{campaign_id}: 2 scenarios over ")
    assert partial.endswith(f" (unfinished: 7 planned; compliant-demo campaign --resume "
                            f"{campaign_id})")
    assert resumed.startswith(f"{campaign_id}: 7 scenarios over ") and "unfinished" not in resumed
