"""Node parameters: declared ranges and cross-parameter checks refuse bad values, with reasons."""

from __future__ import annotations

from pathlib import Path

import pytest
from nodes_support import TestClient, set_parameter, start_module

pytestmark = [pytest.mark.ros, pytest.mark.slow]

DOMAIN_ID = 45


@pytest.mark.parametrize(
    "module, parameters, message",
    [
        ("compliant_demo.nodes.learner", ["alignment:=sideways"],
         "alignment must be dtw, resample or none, got 'sideways'"),
        ("compliant_demo.nodes.learner", ["stiffness_min:=300.0"],
         "stiffness_min (300.0) must be below stiffness_max (200.0)"),
        ("compliant_demo.nodes.replay", ["method:=leapfrog"], "method must be one of"),
        ("compliant_demo.nodes.recorder", ["stiffness_channel:=guess", "store_path:={store}"],
         "stiffness_channel: must be one of"),
        ("compliant_demo.nodes.recorder", ["flush_interval_s:=0.5", "store_path:={store}"],
         "flush_interval_s"),
        # rclpy's own refusals of launch values: one line, not a traceback
        ("compliant_demo.nodes.recorder", ["nominal_rate_hz:=1000", "store_path:={store}"],
         "Trying to set parameter 'nominal_rate_hz' to '1000' of type 'INTEGER', expecting "
         "type 'DOUBLE'"),
        ("compliant_demo.nodes.recorder", ["buffer_capacity:=10", "store_path:={store}"],
         "Parameter buffer_capacity out of range. Min: 1000, Max: 10000000, value: 10"),
        ("compliant_demo.nodes.recorder", ["skill:=5", "store_path:={store}"],
         "node recorder: skill = 5: expected text, got an integer"),
    ],
)
def test_a_node_refuses_bad_start_values_and_exits(
    tmp_path: Path, module: str, parameters: list[str], message: str
) -> None:
    store = tmp_path / "store.sqlite"
    nodes = start_module(module, [p.format(store=store) for p in parameters], DOMAIN_ID,
                         tmp_path / "node.log", "node")
    try:
        status = nodes.wait("node", 60.0)
    finally:
        nodes.close()
    log = nodes.log("node")
    assert status == 2 and "Traceback" not in log, log
    assert message in log, log


def test_a_running_learner_refuses_bad_changes_with_their_reasons(tmp_path: Path) -> None:
    nodes = start_module("compliant_demo.nodes.learner",
                         [f"store_path:={tmp_path / 'store.sqlite'}"], DOMAIN_ID,
                         tmp_path / "learner.log", "learner")
    client = TestClient(DOMAIN_ID, "parameter_test_client")
    try:
        refused = set_parameter(client, "/learner", "alignment", "sideways")
        assert not refused.successful
        assert refused.reason == "alignment must be dtw, resample or none, got 'sideways'"
        assert set_parameter(client, "/learner", "alignment", "resample").successful
        assert set_parameter(client, "/learner", "n_basis", 12).successful
        out_of_range = set_parameter(client, "/learner", "n_basis", 1)  # the declared range
        assert not out_of_range.successful
        too_long = set_parameter(client, "/learner", "operator", "x" * 201)
        assert too_long.reason == "operator: at most 200 characters, got 201"
        too_many = set_parameter(client, "/learner", "tags", [f"t{i}" for i in range(65)])
        assert too_many.reason == "tags: at most 64 items, got 65"
        unknown_form = set_parameter(client, "/learner", "formulation", ["auto", "sideways"])
        assert unknown_form.reason == ("formulation must list auto, classic, goal_robust: none, "
                                       "one, or one per joint (2), got ['auto', 'sideways']")
        assert set_parameter(client, "/learner", "formulation",
                             ["classic", "goal_robust"]).successful
        assert nodes.interrupt("learner") == 0, nodes.log("learner")
    finally:
        client.close()
        nodes.close()
