"""What any participant on the domain can reach: read-only safety limits and files, confined file
parameters, load errors without file contents, and a discard a stranger cannot trigger."""

from __future__ import annotations

import math
import time
from pathlib import Path

import pytest
from nodes_support import DiagnosticsOf, TestClient, set_parameter, start_module

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.nodes._files import USER_CONFIG_ENV, allowed_config_dirs, load_file_parameter
from compliant_demo.perturbation import load_schedule_yaml
from compliant_demo.plant import load_plant
from compliant_demo.store import DemoStore

DOMAIN_ID = 73
ROOT = Path(__file__).resolve().parent.parent
SECRET = "hunter2-do-not-show"

# -- file parameters without ROS -----------------------------------------------------------------


@pytest.fixture
def user_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    folder = tmp_path / "user_config"
    folder.mkdir()
    monkeypatch.setenv(USER_CONFIG_ENV, str(folder))
    return folder


def test_allowed_places_are_the_checkout_config_and_the_user_folder(user_dir: Path) -> None:
    places = allowed_config_dirs()
    assert ROOT / "config" in places and user_dir.resolve() in places
    assert places[-1] == user_dir.resolve()


def test_user_folder_defaults_to_the_per_user_config_dir(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv(USER_CONFIG_ENV, raising=False)
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "xdg"))
    assert allowed_config_dirs()[-1] == (tmp_path / "xdg" / "compliant_demo").resolve()


def test_a_file_in_an_allowed_place_loads(user_dir: Path) -> None:
    plant = load_file_parameter("plant_file", str(ROOT / "config" / "replay_plant.yaml"),
                                load_plant)
    assert [joint.name for joint in plant.joints] == ["shoulder", "elbow"]
    (user_dir / "bumps.yaml").write_text((ROOT / "config" / "replay_bumps.yaml").read_text())
    schedule = load_file_parameter("schedule_file", str(user_dir / "bumps.yaml"),
                                   load_schedule_yaml)
    assert schedule.perturbations


@pytest.mark.parametrize("value", ["/etc/hostname", "/etc/../etc/passwd", "~/.bashrc",
                                   "config/../../../etc/hostname"])
def test_a_file_outside_the_allowed_places_is_refused_by_name_and_value(
    user_dir: Path, value: str
) -> None:
    expected = f"plant_file = {value!r}: refused, files may only come from "
    with pytest.raises(InvalidInputError, match=expected.replace(".", r"\.")) as refused:
        load_file_parameter("plant_file", value, load_plant)
    assert str(user_dir.resolve()) in str(refused.value)


def test_a_link_out_of_an_allowed_place_is_refused(user_dir: Path, tmp_path: Path) -> None:
    outside = tmp_path / "outside.yaml"
    outside.write_text(f"secret: {SECRET}\n")
    (user_dir / "plant.yaml").symlink_to(outside)
    with pytest.raises(InvalidInputError, match=r"plant_file = '.*plant\.yaml': refused") as err:
        load_file_parameter("plant_file", str(user_dir / "plant.yaml"), load_plant)
    assert SECRET not in str(err.value)


@pytest.mark.parametrize(
    "text, loader, where, problem",
    [
        (f"joints: [\n  {SECRET}: : x", load_plant, "the file", r"YAML document \(line 2, "),
        (f"!!python/object/apply:os.system ['{SECRET}']\n", load_plant, "the file",
         r"YAML document \(line 1, column 1\)"),
        (f"{SECRET}\n", load_plant, "the file", "expected a mapping"),
        (f"joints:\n  - {{name: shoulder, inertia: {SECRET}}}\n", load_plant,
         "field 'joints.0.inertia'", "valid number"),
        (f"joints:\n  - {{name: shoulder, inertia: 0.1}}\n{SECRET}: 1\n", load_plant,
         "the file", "holds a field that is not allowed"),
        ("joints:\n  - {name: shoulder, inertia: 0.1}\nmechanism: {kind: ideal, "
         "stiffness_min: 987654.0, stiffness_max: 2.0}\n", load_plant, "field 'mechanism.ideal'",
         "fails a consistency check"),
        (f"perturbations: {SECRET}\n", load_schedule_yaml, "field 'perturbations'",
         "expected a list"),
        (f"perturbations:\n  - {{kind: {SECRET}}}\n", load_schedule_yaml,
         r"field 'perturbations\[0\]\.kind'", "details withheld"),
        (f"perturbations:\n  - {{kind: impulse, onset_s: {SECRET}}}\n", load_schedule_yaml,
         r"field 'perturbations\[0\]\.onset_s'", "valid number"),
    ],
    ids=["yaml_syntax", "python_tag", "scalar", "bad_number", "unknown_field",
         "consistency", "not_a_list", "unknown_kind", "bad_schedule_number"],
)
def test_load_errors_name_parameter_file_and_field_never_the_contents(
    user_dir: Path, text: str, loader, where: str, problem: str
) -> None:
    path = user_dir / "hostile.yaml"
    path.write_text(text)
    with pytest.raises(InvalidInputError, match=rf"^file = '.*hostile\.yaml': {where}:? "
                                                rf".*{problem}") as err:
        load_file_parameter("file", str(path), loader)
    message = str(err.value)
    assert SECRET not in message and "987654" not in message, message


# -- running nodes -------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def client():
    ros = TestClient(DOMAIN_ID, "exposure_test_client")
    yield ros
    ros.close()


def _skill_store(path: Path) -> None:
    from compliant_demo.learning import learn_skill, save_skill
    from compliant_demo.teaching import cork_seat_scenario, teaching_series

    records = teaching_series(cork_seat_scenario(duration_s=2.0), 2, seed=3)
    demos = [{"t": r.t, "position": r.position, "stiffness": r.hand_stiffness_truth}
             for r in records]
    skill = learn_skill(demos, joints=["shoulder", "elbow"], n_basis=15, alignment="resample",
                        stiffness_range=(5.0, 200.0), name="cork_seat")
    with DemoStore(path) as store:
        save_skill(store, skill)


@pytest.mark.ros
@pytest.mark.slow
def test_a_running_replay_refuses_changes_to_limits_and_files(
    tmp_path: Path, client: TestClient
) -> None:
    store = tmp_path / "store.sqlite"
    _skill_store(store)
    nodes = start_module("compliant_demo.nodes.replay",
                         [f"store_path:={store}", "real_time:=false", "settle_s:=0.1"],
                         DOMAIN_ID, tmp_path / "replay.log", "replay")
    try:
        read_only = [("max_stiffness_rate", 1e9), ("max_live_torque", 1e4), ("max_steps", 10**8),
                     ("plant_file", "/etc/hostname"), ("schedule_file", "/etc/hostname"),
                     ("store_path", str(tmp_path / "elsewhere.sqlite")),
                     ("run_when_available", True), ("diagnostics_period_s", 0.05)]
        for name, value in read_only:
            result = set_parameter(client, "/replay", name, value)
            assert not result.successful and "read-only" in result.reason, (name, result.reason)
        refused = set_parameter(client, "/replay", "goal", [math.nan, 0.0])
        assert refused.reason == "goal must be a list of at most 64 finite numbers, rad"
        refused = set_parameter(client, "/replay", "method", "x" * 10_000)
        assert refused.reason.endswith(f"got {'x' * 40!r}")
        assert set_parameter(client, "/replay", "seed", 7).successful  # run-time settings stay
        assert set_parameter(client, "/replay", "control_rate_hz", 20000.0).successful
        assert set_parameter(client, "/replay", "duration_s", 3600.0).successful
        reply = client.call_trigger("run", timeout_s=30.0)
        assert not reply.success
        assert reply.message == ("72002000 steps ((duration_s + settle_s) x control_rate_hz) "
                                 "exceed max_steps = 1000000")
        assert set_parameter(client, "/replay", "duration_s", 0.5).successful
        assert set_parameter(client, "/replay", "control_rate_hz", 1000.0).successful
        assert set_parameter(client, "/replay", "goal", [0.3, 0.5]).successful
        assert client.call_trigger("run", timeout_s=30.0).success

        def stored():
            with DemoStore(store, read_only=True) as db:
                return list(db.find_replay_results())

        client.spin_until(stored, 30.0, "the replay result")
        assert nodes["replay"].poll() is None, nodes.log("replay")
        assert nodes.interrupt("replay") == 0, nodes.log("replay")
    finally:
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        (result,) = db.find_replay_results()
    assert result.parameters.max_stiffness_rate == 5000.0 and result.parameters.seed == 7
    assert result.parameters.goal == [0.3, 0.5]


@pytest.mark.ros
@pytest.mark.slow
@pytest.mark.parametrize("module, parameter", [("compliant_demo.nodes.replay", "plant_file"),
                                               ("compliant_demo.nodes.replay", "schedule_file"),
                                               ("compliant_demo.nodes.teacher", "scenario_file")])
def test_a_node_refuses_a_file_outside_the_allowed_places_at_launch(
    tmp_path: Path, user_dir: Path, module: str, parameter: str
) -> None:
    outside = tmp_path / "elsewhere.yaml"
    outside.write_text(f"joints: {SECRET}\n")
    nodes = start_module(module, [f"{parameter}:={outside}", f"store_path:={tmp_path / 's.db'}"],
                         DOMAIN_ID, tmp_path / "node.log", "node")
    try:
        status = nodes.wait("node", 60.0)
    finally:
        nodes.close()
    log = nodes.log("node")
    assert status == 2, log
    assert f"{parameter} = '{outside}': refused, files may only come from" in log, log
    assert SECRET not in log


@pytest.mark.ros
@pytest.mark.slow
def test_a_bad_plant_file_in_an_allowed_place_is_reported_without_its_contents(
    tmp_path: Path, user_dir: Path
) -> None:
    plant = user_dir / "plant.yaml"
    plant.write_text(f"joints:\n  - {{name: shoulder, inertia: {SECRET}}}\n")
    nodes = start_module("compliant_demo.nodes.replay", [f"plant_file:={plant}"], DOMAIN_ID,
                         tmp_path / "replay.log", "replay")
    try:
        status = nodes.wait("replay", 60.0)
    finally:
        nodes.close()
    log = nodes.log("replay")
    assert status == 2, log
    assert f"plant_file = '{plant}': field 'joints.0.inertia': Input should be" in log, log
    assert SECRET not in log


def _recorder(tmp_path: Path, store: Path, *extra: str):
    return start_module(
        "compliant_demo.nodes.recorder",
        [f"store_path:={store}", "stiffness_channel:=none", "diagnostics_period_s:=0.2", *extra],
        DOMAIN_ID, tmp_path / "recorder.log", "recorder",
    )  # fmt: skip


def _publish_samples(client: TestClient, publisher, start: float, n: int) -> None:
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import to_stamp

    for i in range(n):
        message = JointState(name=["shoulder", "elbow"], position=[0.1, 0.2],
                             velocity=[0.0, 0.0], effort=[1.0, 2.0])
        message.header.stamp = to_stamp(start + i * 1e-3)
        publisher.publish(message)
    client.spin_for(0.05)


@pytest.mark.ros
@pytest.mark.slow
def test_a_strangers_discard_is_refused_and_the_recording_stays_intact(
    tmp_path: Path, client: TestClient
) -> None:
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import recorded_qos

    store = tmp_path / "store.sqlite"
    nodes = _recorder(tmp_path, store)
    diagnostics = DiagnosticsOf(client, "recorder")
    try:
        publisher = client.node.create_publisher(JointState, "joint_states", recorded_qos(1000))
        client.spin_until(lambda: publisher.get_subscription_count() >= 1, 20.0, "a subscriber")
        assert client.call_trigger("start").success
        t0 = time.time()
        _publish_samples(client, publisher, t0, 200)
        refused = client.call_trigger("discard")
        assert not refused.success
        assert refused.message == ("discard refused: allow_discard is false on this recorder "
                                   "(set it at launch); nothing changed")
        change = set_parameter(client, "/recorder", "allow_discard", True)
        assert not change.successful and "read-only" in change.reason
        _publish_samples(client, publisher, t0 + 0.2, 100)
        client.spin_until(lambda: diagnostics.latest.get("accepted") == "300", 20.0,
                          "300 samples accepted")
        assert diagnostics.latest["recording"] == "true"
        stopped = client.call_trigger("stop")
        assert stopped.success and "complete: 300 stored" in stopped.message, stopped.message
        assert nodes.interrupt("recorder") == 0, nodes.log("recorder")
    finally:
        diagnostics.close()
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations()
    assert info.status == "complete" and info.n_samples == 300 and "discarded" not in info.flags


@pytest.mark.ros
@pytest.mark.slow
def test_discard_works_where_allow_discard_was_set_at_launch(
    tmp_path: Path, client: TestClient
) -> None:
    from sensor_msgs.msg import JointState

    from compliant_demo.nodes._common import recorded_qos

    store = tmp_path / "store.sqlite"
    nodes = _recorder(tmp_path, store, "allow_discard:=true")
    try:
        publisher = client.node.create_publisher(JointState, "joint_states", recorded_qos(1000))
        client.spin_until(lambda: publisher.get_subscription_count() >= 1, 20.0, "a subscriber")
        assert client.call_trigger("start").success
        _publish_samples(client, publisher, time.time(), 50)
        client.spin_for(0.5)
        discarded = client.call_trigger("discard")
        assert discarded.success and discarded.message.startswith("rejected:"), discarded.message
        assert nodes.interrupt("recorder") == 0, nodes.log("recorder")
    finally:
        nodes.close()
    with DemoStore(store, read_only=True) as db:
        (info,) = db.find_demonstrations()
    assert info.status == "rejected" and info.flags["discarded"] == 1


@pytest.mark.ros
@pytest.mark.slow
def test_a_running_learner_keeps_its_stiffness_limits(tmp_path: Path, client: TestClient) -> None:
    nodes = start_module("compliant_demo.nodes.learner",
                         [f"store_path:={tmp_path / 'store.sqlite'}"], DOMAIN_ID,
                         tmp_path / "learner.log", "learner")
    try:
        for name, value in (("stiffness_min", 1e-3), ("stiffness_max", 1e5),
                            ("store_path", "/tmp/elsewhere.sqlite")):
            result = set_parameter(client, "/learner", name, value)
            assert not result.successful and "read-only" in result.reason, (name, result.reason)
        assert nodes.interrupt("learner") == 0, nodes.log("learner")
    finally:
        nodes.close()


# What any participant may change at run time, node by node: the README's table says the same.
_WRITABLE = {
    "recorder": {"skill", "operator", "tags", "notes"},
    "teacher": set(),
    "learner": {"skill", "joints", "tags", "operator", "min_demonstrations", "n_basis",
                "alignment", "stiffness_source", "formulation"},
    "replay": {"skill", "skill_version", "control_rate_hz", "duration_s", "settle_s", "goal",
               "seed", "method", "real_time", "publish_decimation"},
}


def _describe(client: TestClient, node: str) -> dict[str, object]:
    """Every parameter's descriptor, asked through the node's own services as anyone could."""
    from rcl_interfaces.srv import DescribeParameters, ListParameters

    listing = client.node.create_client(ListParameters, f"/{node}/list_parameters")
    describe = client.node.create_client(DescribeParameters, f"/{node}/describe_parameters")
    try:
        client.spin_until(listing.service_is_ready, 30.0, f"{node}'s parameter services")
        client.spin_until(describe.service_is_ready, 30.0, f"{node}'s parameter services")
        future = listing.call_async(ListParameters.Request())
        client.spin_until(future.done, 20.0, "list_parameters")
        names = list(future.result().result.names)
        future = describe.call_async(DescribeParameters.Request(names=names))
        client.spin_until(future.done, 20.0, "describe_parameters")
        return dict(zip(names, future.result().descriptors, strict=True))
    finally:
        client.node.destroy_client(listing)
        client.node.destroy_client(describe)


@pytest.mark.ros
@pytest.mark.slow
@pytest.mark.parametrize("node", sorted(_WRITABLE))
def test_only_the_documented_parameters_change_at_run_time(
    tmp_path: Path, client: TestClient, node: str
) -> None:
    extra = {"teacher": ["wait_for_subscribers:=100", "control_recorder:=false"]}.get(node, [])
    nodes = start_module(f"compliant_demo.nodes.{node}",
                         [f"store_path:={tmp_path / 'store.sqlite'}", *extra], DOMAIN_ID,
                         tmp_path / f"{node}.log", node)
    try:
        descriptors = _describe(client, node)
        writable = {name for name, d in descriptors.items() if not d.read_only}
        assert writable - {"use_sim_time"} == _WRITABLE[node]
        for name, descriptor in descriptors.items():  # every description says what it is
            assert name == "use_sim_time" or descriptor.description, name
        limits_and_files = {name for name in descriptors
                            if name.startswith("max_") or name.endswith(("_file", "_path"))}
        assert limits_and_files and not limits_and_files & writable
        refused = set_parameter(client, f"/{node}", "use_sim_time", True)
        assert refused.reason == "use_sim_time is fixed once the node runs (set it at launch)"
        assert nodes.interrupt(node) == 0, nodes.log(node)
    finally:
        nodes.close()
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    row = next(line for line in readme.splitlines() if line.startswith(f"| {node} |"))
    documented = set(row.split(" | ")[3].replace("`", "").replace(",", " ").split()) & set(
        descriptors)
    assert documented == _WRITABLE[node], row
