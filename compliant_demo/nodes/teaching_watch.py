"""Teaching watch node: reads the recorder's ``teaching_feedback`` and says, for every finished
demonstration, whether to keep it or take it again, and why.

Subscribes ``teaching_feedback`` (diagnostic_msgs/DiagnosticArray, status
``recorder/teaching_feedback``; reliable, keep last 10, volatile, as the recorder publishes it)
and prints one line per finished demonstration on stdout (:func:`compliant_demo.teaching_feedback.
advice`; JSON with ``json``), and with ``live`` a line per update while recording. It ends after
``demonstrations`` verdicts or ``timeout_s`` seconds (0: neither); the exit status is 0 when every
watched demonstration can be kept, 1 when one should be taken again, 3 when the time ran out
before ``demonstrations`` verdicts (with a line on stderr), 70 when the node failed (see
:func:`compliant_demo.nodes._common.run_node`).
"""

from __future__ import annotations

import sys
import time

from diagnostic_msgs.msg import DiagnosticArray
from rclpy.node import Node

from compliant_demo.nodes._common import (
    RejectCounter,
    check_parameter_changes,
    declare,
    recorded_qos,
    run_node,
)
from compliant_demo.teaching_feedback import RecentIds, advice, progress

__all__ = ["TeachingWatchNode", "main"]

_STATUS = "recorder/teaching_feedback"
_MAX_VALUES = 64
# Demonstration ids remembered as judged (a repeat of an older one is judged again).
_REMEMBERED_IDS = 10_000


class TeachingWatchNode(Node):
    """Prints the advice of the recorder's live feedback for each finished demonstration."""

    def __init__(self) -> None:
        super().__init__("teaching_watch")
        d = declare
        topic = d(self, "topic", "teaching_feedback", "Feedback topic of the recorder.")
        self._limit = d(self, "demonstrations", 0, "End after this many verdicts (0: never).",
                        low=0, high=1000000)
        timeout = d(self, "timeout_s", 0.0, "End after this long, s (0: never).",
                    low=0.0, high=1e7)
        self._live = d(self, "live", False, "Also print a line per update while recording.")
        self._json = d(self, "json", False, "Print verdicts as JSON objects.")
        check_parameter_changes(self)
        self._timeout = timeout
        self._deadline = time.monotonic() + timeout if timeout > 0 else None
        self._judged = RecentIds(_REMEMBERED_IDS)
        self._verdicts = 0
        self._retake = False
        self.done = False
        self.exit_status = 0
        self.rejects = RejectCounter(self)
        self.create_subscription(DiagnosticArray, topic,
                                 self.rejects.guard(topic, self._on_feedback), recorded_qos(10))
        self.create_timer(0.1, self._check_deadline)

    def _on_feedback(self, msg: DiagnosticArray) -> None:
        for status in msg.status:
            if status.name != _STATUS:
                continue
            values = {kv.key: kv.value for kv in status.values[:_MAX_VALUES]}
            if self._live and (line := progress(values)) is not None:
                print(line, flush=True)
            demo = values.get("demonstration_id", "")
            line = advice(values, as_json=self._json)
            if line is None or not demo or not self._judged.add(demo):
                continue
            self._verdicts += 1
            self._retake |= values.get("retake") == "true"
            print(line, flush=True)
            if self._limit and self._verdicts >= self._limit:
                self._finish(timed_out=False)

    def _check_deadline(self) -> None:
        if self._deadline is not None and time.monotonic() >= self._deadline and not self.done:
            self._finish(timed_out=bool(self._limit))

    def _finish(self, timed_out: bool) -> None:
        if timed_out:
            print(f"teaching watch: timeout_s = {self._timeout} s passed after "
                  f"{self._verdicts} of {self._limit} verdicts", file=sys.stderr, flush=True)
        self.exit_status = 3 if timed_out else int(self._retake)
        self.done = True


def main(args: list[str] | None = None) -> int:
    """Run the watch until its verdicts or its time are done, Ctrl-C or shutdown."""
    return run_node(TeachingWatchNode, args)


if __name__ == "__main__":
    raise SystemExit(main())
