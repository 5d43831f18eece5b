"""What every node shares: parameters with descriptors, message helpers, the main loop."""

from __future__ import annotations

import signal
import traceback
from array import array
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import rclpy
from builtin_interfaces.msg import Time
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from rcl_interfaces.msg import (
    FloatingPointRange,
    IntegerRange,
    ParameterDescriptor,
)
from rclpy.exceptions import ParameterException
from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node
from rclpy.parameter import Parameter
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from rclpy.signals import SignalHandlerOptions
from std_msgs.msg import Float64MultiArray

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError

__all__ = [
    "MAX_TEXT_CHARS",
    "NODE_FAILED",
    "RejectCounter",
    "guarded_service",
    "text_problem",
    "declare",
    "recorded_qos",
    "stamp_seconds",
    "to_stamp",
    "float_array",
    "diagnostic_array",
    "check_parameter_changes",
    "list_parameter",
    "is_list",
    "open_store",
    "run_node",
]

MAX_TEXT_CHARS = 200
NODE_FAILED = 70
"""Exit status of a node that raised an unexpected exception (EX_SOFTWARE of the BSD
``sysexits.h``, common practice), apart from the statuses nodes give as their verdict."""
MAX_LIST_ITEMS = 64

_LEVELS = {
    "ok": DiagnosticStatus.OK,
    "warn": DiagnosticStatus.WARN,
    "error": DiagnosticStatus.ERROR,
}


def declare(
    node: Node,
    name: str,
    default: Any,
    description: str,
    *,
    low: float | None = None,
    high: float | None = None,
    read_only: bool = True,
) -> Any:
    """Declare one parameter with a descriptor (range where given) and return its value.

    An empty list default gets dynamic typing (rclpy would otherwise fix it to a byte array and
    refuse a later list of strings or numbers); read it back with :func:`list_parameter`. So does
    a parameter settable at run time, so that a value of another type is refused by
    :func:`check_parameter_changes` with a reason naming the parameter and the value (rclpy's own
    refusal names neither).

    Raises
    ------
    InvalidInputError
        A run-time parameter was given (at launch) a value of another type than its default.
    """
    descriptor = ParameterDescriptor(description=description, read_only=read_only)
    if low is not None and high is not None:
        if isinstance(default, bool) or not isinstance(default, int | float):
            raise TypeError(f"parameter {name}: a range needs a numeric default")
        if isinstance(default, int):
            descriptor.integer_range = [IntegerRange(from_value=int(low), to_value=int(high))]
        else:
            descriptor.floating_point_range = [FloatingPointRange(from_value=low, to_value=high)]
    if (isinstance(default, list) and not default) or not read_only:
        descriptor.dynamic_typing = True
    parameter = node.declare_parameter(name, default, descriptor)
    problem = _type_change(parameter, Parameter.Type.from_parameter_value(default))
    if problem is not None:
        raise InvalidInputError(f"node {node.get_name()}: {problem}")
    return parameter.value


def _type_change(parameter: Parameter, expected: Parameter.Type) -> str | None:
    """Why ``parameter`` may not take a value of another type than ``expected``; None if it may.

    A list may become a list of another item type (an empty list's type is not even known); the
    node's own check looks at the items (:func:`text_problem`, :func:`list_parameter`).
    """
    if parameter.type_ == expected or {parameter.type_, expected} <= _LIST_TYPES:
        return None
    shown = repr(parameter.value)
    shown = shown if len(shown) <= 60 else shown[:57] + "..."
    return f"{parameter.name} = {shown}: expected {_kind(expected)}, got {_kind(parameter.type_)}"


def _kind(parameter_type: Parameter.Type) -> str:
    if parameter_type in _LIST_TYPES:
        return "a list"
    return {Parameter.Type.STRING: "text", Parameter.Type.INTEGER: "an integer",
            Parameter.Type.DOUBLE: "a floating-point number",
            Parameter.Type.BOOL: "true or false"}.get(parameter_type, "no value")


_LIST_TYPES = {Parameter.Type.BYTE_ARRAY, Parameter.Type.BOOL_ARRAY, Parameter.Type.INTEGER_ARRAY,
               Parameter.Type.DOUBLE_ARRAY, Parameter.Type.STRING_ARRAY}

# Declared by rclpy itself without read_only; switching a running node to a clock any participant
# can publish (/clock) would move its stamp checks, so it is fixed once the node runs.
_FIXED_AT_LAUNCH = ("use_sim_time",)


def check_parameter_changes(
    node: Node, check: Callable[[dict[str, Any]], str | None] | None = None
) -> None:
    """Check the declared values now, then refuse changes that ``check`` finds wrong.

    ``check`` sees every parameter's value as it would be after the change (name -> value) and
    returns None to accept or a reason to refuse; rclpy reports the reason to the caller.
    ``use_sim_time`` is refused at run time on every node that calls this.

    Raises
    ------
    InvalidInputError
        The values the node started with (defaults, parameter files, overrides) are refused.
    """
    from rcl_interfaces.msg import SetParametersResult

    def values_after(parameters: list) -> dict[str, Any]:
        current = node.get_parameters_by_prefix("")
        values = {name: parameter.value for name, parameter in current.items()}
        values.update({parameter.name: parameter.value for parameter in parameters})
        return values

    reason = None if check is None else check(values_after([]))
    if reason is not None:
        raise InvalidInputError(f"node {node.get_name()}: {reason}")

    def on_set(parameters: list) -> SetParametersResult:
        fixed = [p.name for p in parameters if p.name in _FIXED_AT_LAUNCH]
        retyped = [problem for p in parameters
                   if (problem := _type_change(p, node.get_parameter(p.name).type_)) is not None]
        refusal: str | None = None
        if fixed:
            refusal = f"{fixed[0]} is fixed once the node runs (set it at launch)"
        elif retyped:
            refusal = retyped[0]
        elif check is not None:
            refusal = check(values_after(parameters))
        return SetParametersResult(successful=refusal is None, reason=refusal or "")

    node.add_on_set_parameters_callback(on_set)


def text_problem(
    values: dict[str, Any], names: Sequence[str], max_chars: int = MAX_TEXT_CHARS
) -> str | None:
    """A reason to refuse when a text parameter (or list of texts) in ``names`` is not text, too
    long, or a list of more than 64 items; None when all are fine.

    Run-time parameters reach the store and the logs, so their size is bounded.
    """
    for name in names:
        value = values[name]
        items = value if is_list(value) else [value]
        if len(items) > MAX_LIST_ITEMS:
            return f"{name}: at most {MAX_LIST_ITEMS} items, got {len(items)}"
        for item in items:
            if not isinstance(item, str):
                return f"{name}: expected text, got {type(item).__name__} {str(item)[:40]!r}"
            if len(item) > max_chars:
                return f"{name}: at most {max_chars} characters, got {len(item)}"
    return None


def list_parameter(node: Node, name: str, item_type: type) -> list:
    """A list parameter's value, checked to hold only ``item_type`` items (ints pass as floats).

    Raises
    ------
    InvalidInputError
        The value is not a list of that type; the message names the parameter and value.
    """
    value = node.get_parameter(name).value
    accepted = (int, float) if item_type is float else (item_type,)
    if not is_list(value) or not all(
        isinstance(item, accepted) and not isinstance(item, bool) for item in value
    ):
        raise InvalidInputError(
            f"parameter {name}: expected a list of {item_type.__name__}, got {value!r}"
        )
    return [item_type(item) for item in value]


class RejectCounter:
    """Messages a node ignored, counted by topic and reason, each with a rate-limited warning.

    Any participant on the domain can publish to a node's topics, so a callback checks what it
    receives, calls :meth:`reject` for what it cannot use, and never raises (:meth:`guard`).
    """

    def __init__(self, node: Node):
        self._node = node
        self.counts: dict[str, int] = {}

    def reject(self, topic: str, reason: str, detail: str) -> None:
        """Count one ignored message on ``topic`` for ``reason``; ``detail`` goes to the log."""
        key = f"rejected/{topic}/{reason}"
        self.counts[key] = self.counts.get(key, 0) + 1
        self._node.get_logger().warning(
            f"{topic}: message ignored ({reason}: {detail[:200]})", throttle_duration_sec=5.0
        )

    @property
    def total(self) -> int:
        """Messages ignored so far, all topics and reasons."""
        return sum(self.counts.values())

    def values(self) -> dict[str, str]:
        """Diagnostic key-values: ``rejected`` (total) and ``rejected/<topic>/<reason>``."""
        return {"rejected": str(self.total), **{k: str(v) for k, v in self.counts.items()}}

    def guard(self, topic: str, callback: Callable[[Any], None]) -> Callable[[Any], None]:
        """``callback`` for ``topic`` that never raises: an exception counts as
        ``callback_error``."""

        def guarded(message: Any) -> None:
            try:
                callback(message)
            except Exception as exc:  # a message from any participant must not end the node
                self.reject(topic, "callback_error", f"{type(exc).__name__}: {exc}")

        return guarded


def guarded_service(node: Node, service: str, callback: Callable[[Any, Any], Any]) -> Callable:
    """``callback`` for ``service`` that never raises: an exception becomes a refusal."""

    def guarded(request: Any, response: Any) -> Any:
        try:
            return callback(request, response)
        except Exception as exc:  # a request from any participant must not end the node
            node.get_logger().error(f"{service}: failed ({type(exc).__name__})",
                                    throttle_duration_sec=5.0)
            response.success = False
            response.message = f"{service} failed: {type(exc).__name__}"
            return response

    return guarded


def is_list(value: Any) -> bool:
    """True for a list parameter's value (rclpy gives number lists as ``array.array``)."""
    return isinstance(value, list | tuple | array)


def recorded_qos(depth: int) -> QoSProfile:
    """Reliable, keep-last ``depth``: recorded data must not be lost to a short stall."""
    return QoSProfile(
        depth=depth,
        reliability=ReliabilityPolicy.RELIABLE,
        history=HistoryPolicy.KEEP_LAST,
        durability=DurabilityPolicy.VOLATILE,
    )


def stamp_seconds(stamp: Time) -> float:
    """A header stamp in seconds (float64)."""
    return stamp.sec + stamp.nanosec * 1e-9


def to_stamp(seconds: float) -> Time:
    """Seconds (float64, non-negative) as a header stamp."""
    sec = int(seconds // 1)
    nanosec = min(int(round((seconds - sec) * 1e9)), 999_999_999)
    return Time(sec=sec, nanosec=nanosec)


def float_array(values: Sequence[float] | np.ndarray) -> Float64MultiArray:
    """One value per joint, in the node's ``joints`` order (no layout dimensions needed)."""
    message = Float64MultiArray()
    message.data = [float(v) for v in values]
    return message


def diagnostic_array(
    node: Node, name: str, level: str, message: str, values: dict[str, str]
) -> DiagnosticArray:
    """One DiagnosticStatus named ``name`` in a stamped DiagnosticArray."""
    array = DiagnosticArray()
    array.header.stamp = node.get_clock().now().to_msg()
    status = DiagnosticStatus(
        level=_LEVELS[level], name=name, message=message, hardware_id=node.get_name()
    )
    status.values = [KeyValue(key=key, value=value) for key, value in values.items()]
    array.status = [status]
    return array


def open_store(path: str, read_only: bool = False) -> Any:
    """The demonstration store at ``path`` (empty: the default store), as a context manager."""
    from compliant_demo.store import DemoStore
    from compliant_demo.store.location import default_store_path

    return DemoStore(path or default_store_path(), read_only=read_only)


def _executor() -> Any:
    """The events executor where this rclpy has it (several times the message rate), else the
    single-threaded one."""
    try:
        from rclpy.experimental import EventsExecutor
    except ImportError:
        return SingleThreadedExecutor()
    return EventsExecutor()


def _ignore_stop_signals() -> None:
    for signum in (signal.SIGINT, signal.SIGTERM):
        try:
            signal.signal(signum, signal.SIG_IGN)
        except ValueError:  # not the main thread: the node runs inside a test or a tool
            return


def _stop_on_signals() -> list[int]:
    """Have SIGINT and SIGTERM only ask the spin loop to end (the list collects the signals).

    No exception is raised into the loop, so no signal can land between catching the first one
    and the clean finish; rclpy's own handlers, which raise KeyboardInterrupt, are not installed.
    """
    received: list[int] = []
    for signum in (signal.SIGINT, signal.SIGTERM):
        try:
            signal.signal(signum, lambda number, _frame: received.append(number))
        except ValueError:  # not the main thread: the caller handles signals
            break
    return received


def run_node(make_node: Callable[[], Node], args: list[str] | None = None) -> int:
    """Create, spin and tear down one node; Ctrl-C and external shutdown end it cleanly.

    A node with a ``close()`` method gets it called before it is destroyed (to finish its
    work, e.g. flush a demonstration to the store), also after Ctrl-C. A node sets ``done`` to
    end on its own and ``exit_status`` to report failure. Returns the process exit status: 0, the
    node's ``exit_status``, 2 when a parameter or file was refused (the reason is logged), or
    :data:`NODE_FAILED` when the node raised anything else (the traceback is logged).
    """
    rclpy.init(args=args, signal_handler_options=SignalHandlerOptions.NO)
    stop_signals = _stop_on_signals()
    node = None
    status = 0
    try:
        node = make_node()
        executor = _executor()
        executor.add_node(node)
        while rclpy.ok() and not stop_signals and not getattr(node, "done", False):
            executor.spin_once(timeout_sec=0.1)
        if not stop_signals:
            status = int(getattr(node, "exit_status", 0))
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except (CompliantDemoError, ParameterException) as exc:
        # ParameterException: rclpy refused a launch value (its type, its declared range).
        rclpy.logging.get_logger("compliant_demo").fatal(f"{type(exc).__name__}: {exc}")
        status = 2
    except Exception:
        # A fault of ours: its own status, so no caller takes it for the node's verdict
        rclpy.logging.get_logger("compliant_demo").fatal(traceback.format_exc())
        status = NODE_FAILED
    finally:
        # A second Ctrl-C or a SIGTERM while the node finishes its work (flushing a
        # demonstration, writing a file) must not undo a clean finish; a supervisor that runs out
        # of patience sends SIGKILL.
        _ignore_stop_signals()
        if node is not None:
            close = getattr(node, "close", None)
            if close is not None:
                close()
            node.destroy_node()
        rclpy.try_shutdown()
    return status
