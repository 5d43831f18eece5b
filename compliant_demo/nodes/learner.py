"""Learner node: a ``fit`` service learns a skill from the demonstrations its parameters select."""

from __future__ import annotations

from rclpy.node import Node
from std_srvs.srv import Trigger

from compliant_demo.exceptions import CompliantDemoError
from compliant_demo.generalisation import FORMULATION_CHOICES
from compliant_demo.learning import LearnRequest, learn_from_store, matching_demonstrations
from compliant_demo.nodes._common import (
    check_parameter_changes,
    declare,
    guarded_service,
    is_list,
    list_parameter,
    open_store,
    run_node,
    text_problem,
)

__all__ = ["LearnerNode", "main"]


class LearnerNode(Node):
    """Serves ``fit`` (std_srvs/Trigger); can also fit once on its own when enough demos exist."""

    def __init__(self) -> None:
        super().__init__("learner")
        d = declare
        self._store_path = d(self, "store_path", "", "Store file; empty = the default store.")
        d(self, "skill", "cork_seat", "Skill to select and save under.", read_only=False)
        d(self, "joints", ["shoulder", "elbow"], "Joints to learn, in order.", read_only=False)
        d(self, "tags", [], "Select demonstrations carrying all these tags.", read_only=False)
        d(self, "operator", "", "Select one operator's demonstrations; empty = any.",
          read_only=False)
        d(self, "min_demonstrations", 2, "Least number of matching complete demonstrations.",
          low=1, high=10000, read_only=False)
        d(self, "n_basis", 30, "Basis functions per joint.", low=2, high=1000, read_only=False)
        d(self, "alignment", "dtw", "Time alignment: dtw, resample or none.", read_only=False)
        d(self, "stiffness_source", "auto", "Stiffness profile: auto, recorded or variability.",
          read_only=False)
        d(self, "formulation", [],
          "DMP form per joint in the order of 'joints', each auto, classic or goal_robust; one "
          "entry applies to every joint; empty = auto for all (classic where start-to-goal is "
          "at least half the excursion, else goal_robust).", read_only=False)
        # The learned stiffness profile stays inside these limits: set at launch only.
        d(self, "stiffness_min", 5.0, "Target joint's lowest stiffness, N*m/rad.",
          low=1e-3, high=1e5)
        d(self, "stiffness_max", 200.0, "Target joint's highest stiffness, N*m/rad.",
          low=1e-3, high=1e5)
        d(self, "fit_when_available", 0,
          "Fit once by itself as soon as this many demonstrations match (0 = only on request).",
          low=0, high=10000)
        d(self, "poll_period_s", 1.0, "How often to look for demonstrations, s.",
          low=0.05, high=60.0)
        d(self, "exit_after_fit", False, "End the node after the automatic fit.")
        check_parameter_changes(self, _check_parameters)
        self.create_service(Trigger, "fit", guarded_service(self, "fit", self._on_fit))
        self.done = False
        self.exit_status = 0
        self._wait_for = self.get_parameter("fit_when_available").value
        if self._wait_for:
            self._poll = self.create_timer(
                self.get_parameter("poll_period_s").value, self._on_poll
            )

    def _request(self) -> LearnRequest:
        value = self.get_parameter
        return LearnRequest(
            skill=value("skill").value,
            joints=tuple(list_parameter(self, "joints", str)),
            tags=tuple(list_parameter(self, "tags", str)),
            operator=value("operator").value,
            min_demonstrations=value("min_demonstrations").value,
            options={
                "n_basis": value("n_basis").value,
                "alignment": value("alignment").value,
                "stiffness_source": value("stiffness_source").value,
                "formulation": _formulation(list_parameter(self, "formulation", str),
                                            len(list_parameter(self, "joints", str))),
                "stiffness_range": (value("stiffness_min").value, value("stiffness_max").value),
            },
        )

    def _fit(self) -> tuple[bool, str]:
        try:
            with open_store(self._store_path) as store:
                outcome = learn_from_store(store, self._request())
        except CompliantDemoError as exc:
            self.get_logger().error(f"fit refused: {exc}")
            return False, str(exc)
        self.get_logger().info(outcome.report)
        return True, f"saved {outcome.name!r} version {outcome.version} ({outcome.skill_id})"

    def _on_fit(self, _request: Trigger.Request, response: Trigger.Response):
        response.success, response.message = self._fit()
        return response

    def _on_poll(self) -> None:
        try:
            with open_store(self._store_path, read_only=True) as store:
                available = len(matching_demonstrations(store, self._request()))
        except CompliantDemoError as exc:
            self.get_logger().warning(f"cannot query the store yet: {exc}", throttle_duration_sec=5)
            return
        if available < self._wait_for:
            return
        self._poll.cancel()
        success, message = self._fit()
        if self.get_parameter("exit_after_fit").value:
            self.exit_status = 0 if success else 1
            self.done = True


def _check_parameters(values: dict) -> str | None:
    """Reasons to refuse a parameter change that spans parameters or has a fixed set of values."""
    if not values["skill"]:
        return "skill must not be empty"
    text = text_problem(values, ("skill", "joints", "tags", "operator"))
    if text is not None:
        return text
    if not values["joints"]:
        return "joints must name at least one joint"
    if values["alignment"] not in ("dtw", "resample", "none"):
        return f"alignment must be dtw, resample or none, got {values['alignment'][:40]!r}"
    if values["stiffness_source"] not in ("auto", "recorded", "variability"):
        return (f"stiffness_source must be auto, recorded or variability, got "
                f"{values['stiffness_source'][:40]!r}")
    forms = values["formulation"]
    if not is_list(forms) or len(forms) not in (0, 1, len(values["joints"])) or any(
            form not in FORMULATION_CHOICES for form in forms):
        return (f"formulation must list {', '.join(FORMULATION_CHOICES)}: none, one, or one per "
                f"joint ({len(values['joints'])}), got {str(forms)[:80]}")
    if not values["stiffness_min"] < values["stiffness_max"]:
        return (f"stiffness_min ({values['stiffness_min']}) must be below stiffness_max "
                f"({values['stiffness_max']})")
    return None


def _formulation(forms: list[str], n_joints: int) -> str | list[str]:
    """``formulation`` as :func:`compliant_demo.learning.learn_skill` takes it."""
    return list(forms) if len(forms) == n_joints and n_joints > 1 else (forms or ["auto"])[0]


def main(args: list[str] | None = None) -> int:
    """Run the learner node until Ctrl-C, shutdown, or the end of an automatic fit."""
    return run_node(LearnerNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
