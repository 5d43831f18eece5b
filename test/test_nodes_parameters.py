"""Node parameters: declared ranges and cross-parameter checks refuse bad values, with reasons."""

from __future__ import annotations

from pathlib import Path

import pytest
from nodes_support import TestClient, start_module

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
    assert status != 0
    assert message in nodes.log("node"), nodes.log("node")


def test_a_running_learner_refuses_a_contradictory_change_with_its_reason(tmp_path: Path) -> None:
    from rcl_interfaces.msg import Parameter, ParameterType, ParameterValue
    from rcl_interfaces.srv import SetParameters

    nodes = start_module("compliant_demo.nodes.learner",
                         [f"store_path:={tmp_path / 'store.sqlite'}"], DOMAIN_ID,
                         tmp_path / "learner.log", "learner")
    client = TestClient(DOMAIN_ID, "parameter_test_client")
    try:
        service = client.node.create_client(SetParameters, "/learner/set_parameters")
        client.spin_until(service.service_is_ready, 30.0, "the learner's parameter service")

        def set_double(name: str, value: float):
            request = SetParameters.Request(parameters=[Parameter(
                name=name,
                value=ParameterValue(type=ParameterType.PARAMETER_DOUBLE, double_value=value),
            )])
            future = service.call_async(request)
            client.spin_until(future.done, 20.0, "set_parameters")
            (result,) = future.result().results
            return result

        refused = set_double("stiffness_min", 250.0)
        assert not refused.successful
        assert refused.reason == "stiffness_min (250.0) must be below stiffness_max (200.0)"
        assert set_double("stiffness_min", 8.0).successful
        out_of_range = set_double("stiffness_max", -1.0)  # the declared range refuses it
        assert not out_of_range.successful
        assert nodes.interrupt("learner") == 0, nodes.log("learner")
    finally:
        client.close()
        nodes.close()
