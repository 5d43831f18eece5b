"""The readiness verdict's criteria, reasons and verdicts; the plant digest; stored verdicts."""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest
import yaml
from store_support import add_demo

from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.plant import load_plant
from compliant_demo.readiness import Criteria, Reason, Verdict, load_criteria
from compliant_demo.store import DemoStore

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
