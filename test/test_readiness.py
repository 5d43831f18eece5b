"""The readiness verdict's criteria, reasons and verdicts; the plant digest; stored verdicts."""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml
from store_support import add_demo

from compliant_demo.cli._verdict import SHOWN_REASONS, print_verdict
from compliant_demo.exceptions import InvalidInputError, NotFoundError, StoreCorruptError
from compliant_demo.models import IdealImpedanceParams, JointParams
from compliant_demo.plant import ReplayPlant, load_plant
from compliant_demo.primitives import Rollout
from compliant_demo.readiness import (
    Criteria,
    Reason,
    Verdict,
    assess,
    load_criteria,
    schedule_report,
    stretch_anchor,
)
from compliant_demo.report import ReportContent, ReportTable, write_report
from compliant_demo.store import DemoStore, ReplayParameters, ReplayResultInfo

REPO = Path(__file__).resolve().parents[1]
CRITERIA = REPO / "config" / "readiness_criteria.yaml"


def _reason(check: str = "under_damped", severity: float = 0.9, **fields) -> Reason:
    values = dict(check=check, joint="elbow", from_s=0.0, to_s=6.2, value=0.011, threshold=0.5,
                  unit="1", severity=severity, link="stretch-elbow-under_damped-0",
                  detail="damping ratio 0.011 < 0.5 for 6.2 s")  # fmt: skip
    values.update(fields)
    return Reason(**values)


def _write(tmp_path: Path, data: object) -> Path:
    path = tmp_path / "criteria.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def test_shipped_criteria_give_every_threshold_a_value_unit_and_reason():
    criteria = load_criteria()
    assert criteria == load_criteria(CRITERIA)
    for name, threshold in criteria.thresholds:
        assert threshold.unit and threshold.why, name
    # under-damping: exp(-pi*0.5/sqrt(1 - 0.25)) = 0.163 overshoot (common practice)
    assert criteria.thresholds.min_damping_ratio.value == 0.5
    assert "common practice" in criteria.thresholds.min_damping_ratio.why


def test_criteria_digest_is_the_sha256_of_canonical_json(tmp_path):
    criteria = load_criteria()
    text = json.dumps(criteria.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))
    assert criteria.digest == hashlib.sha256(text.encode()).hexdigest()
    data = yaml.safe_load(CRITERIA.read_text(encoding="utf-8"))
    # the same criteria written in another key order and layout give the same digest
    reordered = _write(tmp_path, dict(reversed(list(data.items()))))
    assert load_criteria(reordered).digest == criteria.digest
    data["thresholds"]["max_goal_error"]["value"] = 0.021
    assert load_criteria(_write(tmp_path, data)).digest != criteria.digest


@pytest.mark.parametrize(
    ("edit", "match"),
    [
        (lambda d: d["thresholds"]["max_goal_error"].update(value=-1.0),
         r"thresholds\.max_goal_error\.value.*-1\.0"),
        (lambda d: d["thresholds"]["max_goal_error"].update(value="small"),
         r"thresholds\.max_goal_error\.value.*'small'"),
        (lambda d: d["thresholds"]["settling_window"].pop("unit"),
         r"thresholds\.settling_window\.unit"),
        (lambda d: d["thresholds"]["settling_window"].update(why="two\nlines"),
         r"thresholds\.settling_window\.why.*one non-empty line"),
        (lambda d: d["thresholds"].update(max_speed={"value": 1, "unit": "rad/s", "why": "x"}),
         r"thresholds\.max_speed"),
        (lambda d: d.update(schedule_checks={}), r"schedule_checks"),
        # a value in another unit would be read in the threshold's own unit
        (lambda d: d["thresholds"]["settling_window"].update(value=500, unit="ms"),
         r"thresholds\.settling_window.*unit 'ms': this threshold is read in 's'"),
        (lambda d: d["thresholds"]["max_goal_error"].update(unit="deg"),
         r"thresholds\.max_goal_error.*unit 'deg'.*read in 'rad'"),
        (lambda d: d["thresholds"]["max_failed_recovery"].update(value=5),
         r"thresholds\.max_failed_recovery.*value 5\.0: a fraction of scenarios lies in \[0, 1\]"),
        (lambda d: d["thresholds"]["max_goal_error"].update(value=float("nan")),
         r"thresholds\.max_goal_error\.value.*nan.*finite"),
        (lambda d: d["thresholds"]["max_goal_error"].update(value=float("inf")),
         r"thresholds\.max_goal_error\.value.*inf.*finite"),
        (lambda d: d["thresholds"]["max_goal_error"].update(value="0.02"),
         r"thresholds\.max_goal_error\.value.*'0\.02'"),
        (lambda d: d["thresholds"]["max_goal_error"].update(value=True),
         r"thresholds\.max_goal_error\.value.*True"),
        (lambda d: d["thresholds"]["settling_window"].update(value=0),
         r"thresholds\.settling_window.*value 0: the settling window must be a positive"),
        (lambda d: d["thresholds"]["tank_max_energy"].update(value=0.01),
         r"tank_max_energy\.value = 0\.01 is below tank_initial_energy\.value = 0\.05"),
        (lambda d: d["schedule_checks"].update(under_dampd={"why": "typo"}),
         r"schedule_checks.*no such check \['under_dampd'\]"),
        (lambda d: d["schedule_checks"].update(energy_tank_empty={"why": "x", "threshold": None,
                                                                  "extra": 1}),
         r"schedule_checks\.energy_tank_empty\.extra"),
    ],
)
def test_bad_criteria_file_names_field_and_value(tmp_path, edit, match):
    data = yaml.safe_load(CRITERIA.read_text(encoding="utf-8"))
    edit(data)
    with pytest.raises(InvalidInputError, match=match):
        load_criteria(_write(tmp_path, data))


def test_criteria_file_errors_name_the_file(tmp_path):
    with pytest.raises(InvalidInputError, match=r"missing\.yaml: cannot read file"):
        load_criteria(tmp_path / "missing.yaml")
    with pytest.raises(InvalidInputError, match=r"criteria\.yaml: expected a mapping"):
        load_criteria(_write(tmp_path, [1, 2]))
    with pytest.raises(InvalidInputError, match=r"cannot read file: Is a directory"):
        load_criteria(tmp_path)
    broken = tmp_path / "broken.yaml"
    broken.write_text("thresholds: [\n", encoding="utf-8")
    with pytest.raises(InvalidInputError, match=r"^\S*broken\.yaml: not a readable YAML "
                                                r"document at line 2, column 1: [^\n]*$"):
        load_criteria(broken)


def test_verdict_orders_reasons_most_severe_first_and_is_json_ready():
    mild, worst = _reason("torque_limit_scenarios", 0.2), _reason("under_damped", 0.98)
    verdict = Verdict.from_reasons([mild, worst])
    assert verdict.verdict == "not_ready" and not verdict.ready
    assert verdict.reasons == (worst, mild)
    document = json.loads(json.dumps(verdict.to_dict()))
    assert document["verdict"] == "not_ready"
    assert [r["check"] for r in document["reasons"]] == ["under_damped", "torque_limit_scenarios"]
    assert set(document["reasons"][0]) >= {"check", "joint", "from_s", "to_s", "value",
                                           "threshold", "unit", "severity", "link", "detail"}
    assert Verdict.from_reasons([]).to_dict() == {"verdict": "ready", "reasons": []}


def test_verdict_and_reason_errors():
    with pytest.raises(InvalidInputError, match="verdict: must be one of.*'maybe'"):
        Verdict("maybe")  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="'ready' with 1 reason"):
        Verdict("ready", (_reason(),))
    with pytest.raises(InvalidInputError, match="'not_ready' needs at least one reason"):
        Verdict("not_ready")
    with pytest.raises(InvalidInputError, match=r"Reason\.value: must be a finite number, got nan"):
        _reason(value=float("nan"))
    with pytest.raises(InvalidInputError, match=r"Reason\.from_s: must be a finite number"):
        _reason(from_s="0")
    with pytest.raises(InvalidInputError, match="Reason.check: must name a check"):
        _reason(check="")


def test_plant_digest_is_stable_across_loads_and_follows_every_parameter(tmp_path):
    default = load_plant()
    assert load_plant().digest == default.digest and len(default.digest) == 64
    changed = default.model_copy(update={"joints": (
        default.joints[0].model_copy(update={"inertia": default.joints[0].inertia * 1.001}),
        *default.joints[1:])})  # fmt: skip
    assert changed.digest != default.digest


def test_urdf_plant_digest_includes_the_urdf_content(tmp_path):
    arm = load_plant(REPO / "config" / "arm_cork_seat.yaml")
    again = load_plant(REPO / "config" / "arm_cork_seat.yaml")
    assert arm.digest == again.digest
    urdf = REPO / "compliant_demo" / "data" / "arm_cork_seat.urdf"
    assert arm.urdf_sha256 == hashlib.sha256(urdf.read_bytes()).hexdigest()
    # the same file with a comment added: same dynamics, other content, other digest
    shutil.copy(REPO / "config" / "arm_cork_seat.yaml", tmp_path / "arm.yaml")
    (tmp_path / "arm_cork_seat.urdf").write_text(
        urdf.read_text(encoding="utf-8") + "<!-- edited -->\n", encoding="utf-8")
    edited = load_plant(tmp_path / "arm.yaml")
    assert edited.chain == arm.chain and edited.digest != arm.digest


@pytest.fixture
def store_with_skill():
    with DemoStore() as store:
        skill_id = store.save_skill("cork_seat", {}, demonstration_ids=[add_demo(store)],
                                    parameters={}).id
        yield store, skill_id


def test_verdicts_are_stored_and_the_latest_is_found(store_with_skill):
    store, skill_id = store_with_skill
    criteria = load_criteria()
    plant = load_plant()
    keys = {"plant_digest": plant.digest, "criteria_digest": criteria.digest}
    assert store.latest_verdict(skill_id, **keys) is None
    campaign = store.create_campaign(skill_id, {"n_scenarios": 2})
    first = Verdict.from_reasons([_reason()])
    first_id = store.save_verdict(first, skill_id=skill_id, campaign_id=campaign,
                                  criteria=criteria.model_dump(mode="json"), **keys)
    record = store.latest_verdict(skill_id, **keys)
    assert record is not None and record.id == first_id
    assert (record.verdict, record.reasons) == ("not_ready", first.to_dict()["reasons"])
    assert (record.skill_version, record.campaign_id) == (1, campaign)
    assert Criteria.model_validate(record.criteria) == criteria
    second_id = store.save_verdict(Verdict.from_reasons([]), skill_id=skill_id, campaign_id=None,
                                   criteria=criteria.model_dump(mode="json"), **keys)
    latest = store.latest_verdict(skill_id, **keys)
    assert latest is not None and (latest.id, latest.verdict, latest.reasons) == (
        second_id, "ready", [])
    other_plant = dict(keys, plant_digest="0" * 64)
    assert store.latest_verdict(skill_id, **other_plant) is None


def test_save_verdict_errors_store_nothing(store_with_skill):
    store, skill_id = store_with_skill
    criteria = load_criteria()
    document = criteria.model_dump(mode="json")
    keys = {"plant_digest": load_plant().digest, "criteria_digest": criteria.digest}
    verdict = Verdict.from_reasons([_reason()])
    with pytest.raises(InvalidInputError, match="plant_digest must be a SHA-256 hex.*'abc'"):
        store.save_verdict(verdict, skill_id=skill_id, campaign_id=None, criteria=document,
                           **dict(keys, plant_digest="abc"))
    with pytest.raises(InvalidInputError, match="criteria_digest .* is not the digest of the"):
        store.save_verdict(verdict, skill_id=skill_id, campaign_id=None, criteria=document,
                           **dict(keys, criteria_digest="f" * 64))
    with pytest.raises(NotFoundError, match="skill id 'nope' not found"):
        store.save_verdict(verdict, skill_id="nope", campaign_id=None, criteria=document, **keys)
    with pytest.raises(NotFoundError, match="campaign 'nope' not found"):
        store.save_verdict(verdict, skill_id=skill_id, campaign_id="nope", criteria=document,
                           **keys)
    other_skill = store.save_skill("cork_seat", {}, demonstration_ids=[], parameters={}).id
    campaign = store.create_campaign(other_skill, {"n_scenarios": 1})
    with pytest.raises(InvalidInputError, match="replays skill .*, not skill_id"):
        store.save_verdict(verdict, skill_id=skill_id, campaign_id=campaign, criteria=document,
                           **keys)
    with pytest.raises(InvalidInputError, match="latest|criteria_digest must be a SHA-256"):
        store.latest_verdict(skill_id, plant_digest=keys["plant_digest"], criteria_digest="x")
    assert store.db.execute("SELECT count(*) FROM verdicts").fetchone() == (0,)


class _Document:
    """A verdict document as any caller may hand the store, bypassing Verdict's own checks."""

    def __init__(self, verdict: object, reasons: object) -> None:
        self.document = {"verdict": verdict, "reasons": reasons}

    def to_dict(self) -> dict:
        return self.document


@pytest.mark.parametrize(
    ("verdict", "reasons", "match"),
    [
        # the gate lets a stored 'ready' through: it must not carry reasons against it
        ("ready", [{"check": "under_damped"}], r"verdict 'ready' with 1 reason\(s\)"),
        ("not_ready", [], r"verdict 'not_ready' with 0 reason\(s\)"),
        ("maybe", [], r"verdict must be 'ready' or 'not_ready', got 'maybe'"),
        ("not_ready", {"check": "x"}, r"reasons must be a list of mappings"),
        ("not_ready", [{"joint": "elbow"}], r"reason 0: 'check' must name a check, got None"),
        ("not_ready", [{"check": "x", "value": float("nan")}], r"every number must be finite"),
    ],
)
def test_the_store_refuses_an_inconsistent_verdict_document(store_with_skill, verdict, reasons,
                                                            match):
    store, skill_id = store_with_skill
    criteria = load_criteria()
    keys = {"plant_digest": load_plant().digest, "criteria_digest": criteria.digest}
    with pytest.raises(InvalidInputError, match=match):
        store.save_verdict(_Document(verdict, reasons), skill_id=skill_id, campaign_id=None,
                           criteria=criteria.model_dump(mode="json"), **keys)
    assert store.db.execute("SELECT count(*) FROM verdicts").fetchone() == (0,)


@pytest.mark.parametrize(
    ("column", "text", "match"),
    [
        ("reasons", "{broken", r"Expecting property name"),
        ("reasons", "{}", r"reasons must be a list of mappings, got \{\}"),
        ("reasons", "[]", r"verdict 'not_ready' with 0 reason\(s\)"),
        ("criteria", "null", r"criteria must be a mapping, got NoneType"),
    ],
)
def test_a_damaged_verdict_row_is_named_by_latest_verdict_and_verify(
    store_with_skill, column, text, match
):
    store, skill_id = store_with_skill
    criteria = load_criteria()
    keys = {"plant_digest": load_plant().digest, "criteria_digest": criteria.digest}
    verdict_id = store.save_verdict(Verdict.from_reasons([_reason()]), skill_id=skill_id,
                                    campaign_id=None, criteria=criteria.model_dump(mode="json"),
                                    **keys)
    assert store.verify() == []
    store.db.execute(f"UPDATE verdicts SET {column} = ?", (text,))
    damaged = rf"verdict '{verdict_id}' has damaged stored data: .*{match}"
    with pytest.raises(StoreCorruptError, match=damaged):
        store.latest_verdict(skill_id, **keys)
    (finding,) = store.verify()
    assert finding.startswith(f"verdict {verdict_id}: damaged stored data")


# --- assess ------------------------------------------------------------------------------------

ELBOW = JointParams(name="elbow", inertia=0.04, viscous_damping=0.0, torque_limit=20.0)
IDEAL = IdealImpedanceParams(stiffness_min=5.0, stiffness_max=150.0, damping_max=20.0,
                             stiffness_rate_limit=1e9, damping_rate_limit=1e9)
PLANT = ReplayPlant(joints=(ELBOW,), mechanism=IDEAL)


def _hold(stiffness, damping) -> Rollout:
    """One joint holding still at 0 rad for 2 s at 1 kHz: no torque, only the schedule counts."""
    t = np.linspace(0.0, 2.0, 2001)
    k = np.broadcast_to(np.asarray(stiffness, dtype=float), t.shape).reshape(-1, 1).copy()
    d = np.broadcast_to(np.asarray(damping, dtype=float), t.shape).reshape(-1, 1).copy()
    zeros = np.zeros_like(k)
    return Rollout(t, zeros, zeros, zeros, k, d, ("elbow",), 2.0)


def test_an_undamped_hold_is_not_ready_with_the_damping_ratio_first():
    criteria = load_criteria()
    t = np.linspace(0.0, 2.0, 2001)
    stiffness = np.full(t.shape, 100.0)
    stiffness[(t >= 1.0) & (t <= 1.2)] = 180.0  # 0.2 s beyond the 150 N*m/rad range
    stiffness[1500] = 160.0  # a 1-sample blip: not a stretch worth a reason
    # zeta = d / (2 sqrt(k I)) = 0.2 / (2 sqrt(100 * 0.04)) = 0.05 (common practice)
    report = schedule_report(_hold(stiffness, 0.2), PLANT, criteria)
    verdict = assess(criteria, PLANT, report)
    assert verdict.verdict == "not_ready"
    first = verdict.reasons[0]
    assert (first.check, first.joint, first.from_s, first.to_s) == ("under_damped", "elbow",
                                                                     0.0, 2.0)
    # the worst ratio is where the realisable stiffness peaks: clamped to 150 N*m/rad
    assert first.threshold == 0.5
    assert first.value == pytest.approx(0.2 / (2 * np.sqrt(150 * 0.04)), rel=1e-12)
    # severity: (0.5 - zeta) / 0.5 over the whole skill
    assert first.severity == pytest.approx((0.5 - first.value) / 0.5)
    assert first.link == stretch_anchor(report.stretches.index(next(
        s for s in report.stretches if s.kind == "under_damped")))
    ranges = [r for r in verdict.reasons if r.check == "stiffness_range"]
    assert len(ranges) == 1  # the blip is left out
    (band,) = ranges
    assert (band.from_s, band.to_s) == pytest.approx((1.0, 1.2))
    assert (band.value, band.threshold, band.unit) == (180.0, 150.0, "N*m/rad")
    # (180 - 150) / 180 over 0.2 of 2 s
    assert band.severity == pytest.approx(30 / 180 * 0.1)
    assert [r.check for r in verdict.reasons] == ["under_damped", "stiffness_range"]


def test_the_criteria_set_the_energy_tank_and_the_expected_push_of_the_schedule_checks(tmp_path):
    data = load_criteria().model_dump(mode="json")
    data["thresholds"]["tank_initial_energy"]["value"] = 0.02
    data["thresholds"]["tank_max_energy"]["value"] = 0.3
    data["thresholds"]["expected_interaction_torque"]["value"] = 1.5
    criteria = load_criteria(_write(tmp_path, data))
    thresholds = schedule_report(_hold(100.0, 2.4), PLANT, criteria).summary["thresholds"]
    assert thresholds["energy_budget_J"] == 0.02 and thresholds["tank_max_energy_J"] == 0.3
    assert thresholds["interaction_torque_Nm"] == [1.5]


def test_a_well_damped_hold_with_a_clean_campaign_is_ready():
    criteria = load_criteria()
    # zeta = 2.0 / (2 sqrt(100 * 0.04)) = 0.5 exactly on the floor is not below it; take 2.4
    report = schedule_report(_hold(100.0, 2.4), PLANT, criteria)
    scenarios = [_result(i, {}) for i in range(10)]
    verdict = assess(criteria, PLANT, report, scenarios)
    assert verdict.to_dict() == {"verdict": "ready", "reasons": []}


def _result(index: int, changes: dict, status: str = "ok") -> ReplayResultInfo:
    metrics = {
        "goal_error_rad": [0.001], "settling_peak_to_peak_rad": [0.0001],
        "settling_from_s": 2.0, "settling_to_s": 2.5, "peak_interaction_torque_Nm": [5.0],
        "recovered": [True],
        "limit_violations": {"torque": {"samples": [0], "duration_s": [0.0],
                                        "worst_excess": [0.0]}},
    }  # fmt: skip
    metrics.update(changes)
    return ReplayResultInfo(
        id=f"00000000-0000-4000-8000-{index:012d}", skill_id="s", campaign_id="c",
        scenario_index=index, status=status, reason=None, metrics=metrics,
        parameters=ReplayParameters(source="campaign", scenario_index=index), trace_channels=(),
        created=0.0,
    )  # fmt: skip


def test_campaign_criteria_give_reasons_per_joint_with_their_worst_scenario():
    criteria = load_criteria()
    report = schedule_report(_hold(100.0, 2.4), PLANT, criteria)
    over = {"torque": {"samples": [3], "duration_s": [0.003], "worst_excess": [1.5]}}
    scenarios = [_result(i, {}) for i in range(20)]
    scenarios[3] = _result(3, {"limit_violations": over}, status="violation")
    scenarios[4] = _result(4, {"peak_interaction_torque_Nm": [95.0]})
    scenarios[5] = _result(5, {"peak_interaction_torque_Nm": [45.0]})
    scenarios[6] = _result(6, {"goal_error_rad": [0.057], "settling_peak_to_peak_rad": [0.062]})
    for i in (7, 8):
        scenarios[i] = _result(i, {"recovered": [True, False]})
    verdict = assess(criteria, PLANT, report, scenarios)
    by_check = {r.check: r for r in verdict.reasons}
    assert set(by_check) == {"torque_limit_scenarios", "interaction_torque", "goal_error",
                             "safety_stops"}
    push = by_check["interaction_torque"]
    assert (push.joint, push.value, push.threshold, push.unit, push.link) == (
        "elbow", 95.0, 40.0, "N*m", "scenario-4")
    # (95 - 40) / 95 times 2 of 20 scenarios
    assert push.severity == pytest.approx(55 / 95 * 0.1)
    goal = by_check["goal_error"]
    assert (goal.value, goal.threshold, goal.from_s, goal.to_s) == (0.057, 0.02, 2.0, 2.5)
    torque = by_check["torque_limit_scenarios"]
    assert (torque.value, torque.threshold, torque.link) == (0.05, 0.0, "scenario-3")
    assert by_check["safety_stops"].joint is None
    # one unsettled and two unrecovered of 20 stay within their caps (10 %)
    assert "unsettled" not in by_check and "failed_recovery" not in by_check
    severities = [r.severity for r in verdict.reasons]
    assert severities == sorted(severities, reverse=True)


def test_assess_refuses_checks_the_criteria_do_not_know(tmp_path):
    data = yaml.safe_load(CRITERIA.read_text(encoding="utf-8"))
    del data["schedule_checks"]["torque_limit"]
    criteria = load_criteria(_write(tmp_path, data))
    report = schedule_report(_hold(100.0, 2.4), PLANT, criteria)
    with pytest.raises(InvalidInputError, match=r"no entry for check\(s\) \['torque_limit'\]"):
        assess(criteria, PLANT, report)


def test_assess_refuses_goal_errors_measured_over_another_window():
    criteria = load_criteria()
    report = schedule_report(_hold(100.0, 2.4), PLANT, criteria)
    short = _result(0, {"settling_window_s": 0.2})
    with pytest.raises(InvalidInputError, match=r"scenario-0: goal error was measured over the "
                                                r"last 0\.2 s; criteria settling_window asks"):
        assess(criteria, PLANT, report, [short])
    with pytest.raises(InvalidInputError, match=r"metric goal_error_rad = \[0\.1, 0\.2\]"):
        assess(criteria, PLANT, report, [_result(0, {"goal_error_rad": [0.1, 0.2]})])


# --- where the verdict shows -------------------------------------------------------------------


def test_summary_lines_show_the_most_severe_reasons(capsys):
    reasons = [_reason(f"check_{i}", severity=i / 10, link=f"stretch-{i}") for i in range(10)]
    print_verdict(Verdict.from_reasons(reasons))
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "verdict: NOT READY (10 reason(s), most severe first)"
    assert lines[1] == ("  1. check_9 on elbow, 0 to 6.2 s: 0.011 against 0.5 1")
    assert len(lines) == 1 + SHOWN_REASONS + 1
    assert lines[-1] == "  ... and 2 more (--json and the report list them all)"
    print_verdict(Verdict.from_reasons([]))
    assert capsys.readouterr().out.startswith("verdict: ready")


def test_report_page_opens_with_the_verdict_and_links_its_reasons(tmp_path):
    reason = _reason(link="stretch-0")
    table = ReportTable("Flagged", ("joint",), (("elbow",),), row_ids=("stretch-0",))
    content = ReportContent("t", (("skill", "x"),), (), (table,), verdict=Verdict.from_reasons(
        [reason]))
    page = write_report(content, tmp_path).html.read_text(encoding="utf-8")
    assert page.index("Readiness verdict: NOT READY") < page.index("Safety cautions")
    assert '<a href="#stretch-0">under_damped on elbow, 0 to 6.2 s</a>' in page
    assert '<tr id="stretch-0"><td>elbow</td></tr>' in page
    ready = ReportContent("t", (), (), verdict=Verdict.from_reasons([]))
    assert "Readiness verdict: ready" in write_report(ready, tmp_path).html.read_text("utf-8")
    with pytest.raises(InvalidInputError, match=r"row_ids: 2 ids for 1 rows of table 'Flagged'"):
        ReportTable("Flagged", ("joint",), (("elbow",),), row_ids=("a", "b"))
