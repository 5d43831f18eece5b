"""What every node shares: parameters with descriptors, message helpers, the main loop."""

from __future__ import annotations

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
from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
from rclpy.node import Node
from rclpy.qos import DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy
from std_msgs.msg import Float64MultiArray

from compliant_demo.exceptions import CompliantDemoError, InvalidInputError

__all__ = [
    "declare",
    "recorded_qos",
    "stamp_seconds",
    "to_stamp",
    "float_array",
    "diagnostic_array",
    "check_parameter_changes",
    "list_parameter",
    "open_store",
    "run_node",
]

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
    refuse a later list of strings or numbers); read it back with :func:`list_parameter`.
    """
    descriptor = ParameterDescriptor(description=description, read_only=read_only)
    if low is not None and high is not None:
        if isinstance(default, bool) or not isinstance(default, int | float):
            raise TypeError(f"parameter {name}: a range needs a numeric default")
        if isinstance(default, int):
            descriptor.integer_range = [IntegerRange(from_value=int(low), to_value=int(high))]
        else:
            descriptor.floating_point_range = [FloatingPointRange(from_value=low, to_value=high)]
    if isinstance(default, list) and not default:
        descriptor.dynamic_typing = True
    return node.declare_parameter(name, default, descriptor).value


def check_parameter_changes(
    node: Node, check: Callable[[dict[str, Any]], str | None]
) -> None:
    """Check the declared values now, then refuse changes that ``check`` finds wrong.

    ``check`` sees every parameter's value as it would be after the change (name -> value) and
    returns None to accept or a reason to refuse; rclpy reports the reason to the caller.

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

    reason = check(values_after([]))
    if reason is not None:
        raise InvalidInputError(f"node {node.get_name()}: {reason}")

    def on_set(parameters: list) -> SetParametersResult:
        reason = check(values_after(parameters))
        return SetParametersResult(successful=reason is None, reason=reason or "")

    node.add_on_set_parameters_callback(on_set)


def list_parameter(node: Node, name: str, item_type: type) -> list:
    """A list parameter's value, checked to hold only ``item_type`` items (ints pass as floats).

    Raises
    ------
    InvalidInputError
        The value is not a list of that type; the message names the parameter and value.
    """
    value = node.get_parameter(name).value
    accepted = (int, float) if item_type is float else (item_type,)
    if not isinstance(value, list | tuple) or not all(
        isinstance(item, accepted) and not isinstance(item, bool) for item in value
    ):
        raise InvalidInputError(
            f"parameter {name}: expected a list of {item_type.__name__}, got {value!r}"
        )
    return [item_type(item) for item in value]


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


def run_node(make_node: Callable[[], Node], args: list[str] | None = None) -> int:
    """Create, spin and tear down one node; Ctrl-C and external shutdown end it cleanly.

    A node with a ``close()`` method gets it called before it is destroyed (to finish its
    work, e.g. flush a demonstration to the store), also after Ctrl-C. A node sets ``done`` to
    end on its own and ``exit_status`` to report failure. Returns the process exit status: 0, the
    node's ``exit_status``, or 2 when a parameter or file was refused (the reason is logged).
    """
    rclpy.init(args=args)
    node = None
    status = 0
    try:
        node = make_node()
        executor = _executor()
        executor.add_node(node)
        while rclpy.ok() and not getattr(node, "done", False):
            executor.spin_once(timeout_sec=0.1)
        status = int(getattr(node, "exit_status", 0))
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    except CompliantDemoError as exc:
        rclpy.logging.get_logger("compliant_demo").fatal(f"{type(exc).__name__}: {exc}")
        status = 2
    finally:
        if node is not None:
            close = getattr(node, "close", None)
            if close is not None:
                close()
            node.destroy_node()
        rclpy.try_shutdown()
    return status
