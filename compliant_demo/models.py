"""Parameter records shared by the simulation, learning and evaluation: joints and mechanisms.

Every field carries its SI unit in its description. Records validate on construction and load
from YAML through :func:`load_yaml_model` (safe loading only).
"""

from __future__ import annotations

import re
from copy import copy
from pathlib import Path
from typing import Annotated, Any, ClassVar, Literal, TypeVar

import yaml
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SerializerFunctionWrapHandler,
    ValidationError,
    model_serializer,
    model_validator,
)

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "JointParams",
    "IdealImpedanceParams",
    "AntagonisticParams",
    "MechanismParams",
    "ActuatorParams",
    "BodyParams",
    "ChainParams",
    "load_yaml_model",
    "model_from_mapping",
    "read_yaml",
    "validation_message",
    "shown_value",
]

PositiveFloat = Annotated[float, Field(gt=0, allow_inf_nan=False)]
PositiveLimit = Annotated[float, Field(gt=0)]
NonNegativeFloat = Annotated[float, Field(ge=0, allow_inf_nan=False)]
FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


class _Record(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


#: Fields added after records were first stored: left out of a dump while at their defaults, so
#: stored records (campaign configs) still compare equal and infinite limits never reach JSON.
_ACTUATOR_LIMITS = ("spring_tension_limit", "motor_torque_limit", "motor_inertia")


def _without_defaults(data: dict[str, Any], record: BaseModel, names: tuple[str, ...]
                      ) -> dict[str, Any]:
    fields = type(record).model_fields
    for name in names:
        if getattr(record, name) == fields[name].default:
            data.pop(name, None)
    return data


class JointParams(_Record):
    """One single-axis joint: link dynamics, end stops and sensors."""

    name: str = Field("joint1", min_length=1, description="Joint name as in JointState.name.")
    inertia: PositiveFloat = Field(0.05, description="Link inertia about the axis, kg*m^2.")
    gravity_mass: NonNegativeFloat = Field(0.0, description="Link mass for the gravity load, kg.")
    com_distance: NonNegativeFloat = Field(
        0.0, description="Distance from the axis to the link's centre of mass, m."
    )
    gravity_offset: FiniteFloat = Field(
        0.0, description="Angle at which the gravity torque is zero, rad."
    )
    viscous_damping: NonNegativeFloat = Field(
        0.01, description="Viscous friction of the link bearing, N*m*s/rad."
    )
    coulomb_friction: NonNegativeFloat = Field(
        0.0, description="Coulomb friction torque magnitude, N*m."
    )
    friction_smoothing_velocity: PositiveFloat = Field(
        0.01, description="Velocity scale of the tanh-smoothed Coulomb friction, rad/s."
    )
    lower_limit: FiniteFloat = Field(-2.5, description="Lower end stop, rad.")
    upper_limit: FiniteFloat = Field(2.5, description="Upper end stop, rad.")
    limit_stiffness: PositiveFloat = Field(500.0, description="End-stop stiffness, N*m/rad.")
    limit_damping: NonNegativeFloat = Field(2.0, description="End-stop damping, N*m*s/rad.")
    torque_limit: PositiveFloat = Field(
        20.0, description="Largest admissible spring torque on the link, N*m."
    )
    torque_noise_std: NonNegativeFloat = Field(
        0.0, description="Standard deviation of torque-sensor noise, N*m."
    )
    encoder_resolution: NonNegativeFloat = Field(
        0.0, description="Encoder quantisation step, rad (0 = ideal encoder)."
    )

    @model_validator(mode="after")
    def _limits_ordered(self) -> JointParams:
        if not self.lower_limit < self.upper_limit:
            raise ValueError(
                f"lower_limit ({self.lower_limit}) must be below upper_limit ({self.upper_limit})"
            )
        return self


class IdealImpedanceParams(_Record):
    """Ideal variable impedance: stiffness and damping follow commands via lag and rate limit."""

    kind: Literal["ideal"] = "ideal"
    #: A damping command means something to this mechanism.
    has_damping_input: ClassVar[bool] = True
    stiffness_min: PositiveFloat = Field(1.0, description="Lowest realisable stiffness, N*m/rad.")
    stiffness_max: PositiveFloat = Field(
        200.0, description="Highest realisable stiffness, N*m/rad."
    )
    damping_min: NonNegativeFloat = Field(0.0, description="Lowest realisable damping, N*m*s/rad.")
    damping_max: NonNegativeFloat = Field(
        10.0, description="Highest realisable damping, N*m*s/rad."
    )
    time_constant: PositiveFloat = Field(
        0.02, description="First-order lag of stiffness and damping, s."
    )
    stiffness_rate_limit: PositiveFloat = Field(
        2000.0, description="Largest rate of change of realised stiffness, N*m/rad/s."
    )
    damping_rate_limit: PositiveFloat = Field(
        100.0, description="Largest rate of change of realised damping, N*m*s/rad/s."
    )

    @model_validator(mode="after")
    def _ranges_ordered(self) -> IdealImpedanceParams:
        if self.stiffness_min > self.stiffness_max:
            raise ValueError(
                f"stiffness_min ({self.stiffness_min}) is above stiffness_max "
                f"({self.stiffness_max})"
            )
        if self.damping_min > self.damping_max:
            raise ValueError(
                f"damping_min ({self.damping_min}) is above damping_max ({self.damping_max})"
            )
        return self


class AntagonisticParams(_Record):
    """Two tension-only springs, torque k1*phi + k2*phi^2 for elongation phi > 0, on two motors.

    Notes
    -----
    Elongations are phi1 = theta1 - q + d0 and phi2 = q - theta2 + d0 (angular, rad, with the
    pre-tension offset d0). While both are taut the joint stiffness is
    2*k1 + 2*k2*(theta1 - theta2 + 2*d0) (Migliore, Brown, DeWeerth, ICRA 2005).
    """

    kind: Literal["antagonistic"] = "antagonistic"
    #: Two springs set stiffness and equilibrium only: a damping command has nothing to act on.
    has_damping_input: ClassVar[bool] = False
    k1: PositiveFloat = Field(10.0, description="Linear spring coefficient, N*m/rad.")
    k2: PositiveFloat = Field(
        100.0,
        description=(
            "Quadratic spring coefficient, N*m/rad^2 (> 0: it is what makes stiffness adjustable)."
        ),
    )
    pretension_offset: NonNegativeFloat = Field(
        0.0, description="Spring elongation offset d0 at equal motor and link angles, rad."
    )
    motor_time_constant: PositiveFloat = Field(
        0.01, description="First-order lag of each position-servoed motor, s."
    )
    motor_speed_limit: PositiveFloat = Field(10.0, description="Largest motor speed, rad/s.")
    motor_lower: FiniteFloat = Field(-3.5, description="Lower motor range, rad.")
    motor_upper: FiniteFloat = Field(3.5, description="Upper motor range, rad.")
    stiffness_min: PositiveFloat = Field(
        20.0, description="Lowest stiffness commands are clamped to, N*m/rad (>= 2*k1)."
    )
    stiffness_max: PositiveFloat = Field(
        200.0, description="Highest stiffness commands are clamped to, N*m/rad."
    )
    spring_tension_limit: PositiveLimit = Field(
        float("inf"),
        description="Largest tension of either spring, as torque about the joint, N*m (inf: none).",
    )
    motor_torque_limit: PositiveLimit = Field(
        float("inf"), description="Largest torque either motor gives, N*m (inf: none)."
    )
    motor_inertia: NonNegativeFloat = Field(
        0.0, description="Reflected inertia of each motor at the spring, kg*m^2."
    )

    @model_serializer(mode="wrap")
    def _drop_unset_limits(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        return _without_defaults(handler(self), self, _ACTUATOR_LIMITS)

    @model_validator(mode="after")
    def _ranges_ordered(self) -> AntagonisticParams:
        if self.stiffness_min > self.stiffness_max:
            raise ValueError(
                f"stiffness_min ({self.stiffness_min}) is above stiffness_max "
                f"({self.stiffness_max})"
            )
        if self.stiffness_min < 2 * self.k1:
            raise ValueError(
                f"stiffness_min ({self.stiffness_min}) is below 2*k1 ({2 * self.k1}), "
                "the stiffness with both springs at zero elongation"
            )
        if not self.motor_lower < self.motor_upper:
            raise ValueError(
                f"motor_lower ({self.motor_lower}) must be below motor_upper ({self.motor_upper})"
            )
        return self


MechanismParams = Annotated[
    IdealImpedanceParams | AntagonisticParams, Field(discriminator="kind")
]

def _joint_field(name: str) -> Any:
    """A copy of JointParams' field ``name`` (default, description) for another record."""
    return copy(JointParams.model_fields[name])


class ActuatorParams(_Record):
    """What a URDF does not say about one joint: its actuator mechanism, end stops and sensors.

    A plant read from a URDF takes inertias, limits, damping and friction from the URDF and
    these fields from our own YAML (see :func:`compliant_demo.plant.load_plant`).
    """

    mechanism: MechanismParams = Field(..., description="Variable-stiffness mechanism.")
    friction_smoothing_velocity: PositiveFloat = _joint_field("friction_smoothing_velocity")
    limit_stiffness: PositiveFloat = _joint_field("limit_stiffness")
    limit_damping: NonNegativeFloat = _joint_field("limit_damping")
    torque_noise_std: NonNegativeFloat = _joint_field("torque_noise_std")
    encoder_resolution: NonNegativeFloat = _joint_field("encoder_resolution")


Vector3 = tuple[FiniteFloat, FiniteFloat, FiniteFloat]


class BodyParams(_Record):
    """One revolute joint of a serial chain and the rigid link it moves.

    Frames follow the URDF: the joint frame sits at ``placement_xyz`` in the previous joint's
    frame, rotated by ``placement_rotation``; the joint turns about ``axis`` (in its own frame)
    through its origin. Inertial data are in the joint frame.
    """

    joint: str = Field(..., min_length=1, description="Joint name.")
    placement_xyz: Vector3 = Field(
        (0.0, 0.0, 0.0), description="Joint origin in the parent joint frame, m."
    )
    placement_rotation: tuple[FiniteFloat, ...] = Field(
        (1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0),
        min_length=9, max_length=9,
        description="Rotation of the joint frame in the parent frame, row-major 3x3, 1.",
    )
    axis: Vector3 = Field(..., description="Unit rotation axis in the joint frame, 1.")
    mass: PositiveFloat = Field(..., description="Mass of the moved link, kg.")
    com: Vector3 = Field((0.0, 0.0, 0.0), description="Centre of mass in the joint frame, m.")
    inertia: tuple[FiniteFloat, ...] = Field(
        ..., min_length=6, max_length=6,
        description="Inertia about the centre of mass (ixx, ixy, ixz, iyy, iyz, izz), kg*m^2.",
    )
    velocity_limit: PositiveLimit = Field(
        float("inf"), description="Largest joint speed, rad/s (inf = none)."
    )

    @model_serializer(mode="wrap")
    def _drop_unset_limit(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        return _without_defaults(handler(self), self, ("velocity_limit",))

    @model_validator(mode="after")
    def _unit_axis(self) -> BodyParams:
        norm = sum(a * a for a in self.axis) ** 0.5
        if abs(norm - 1.0) > 1e-9:
            raise ValueError(f"axis {self.axis} of joint {self.joint!r} is not a unit vector")
        return self


class ChainParams(_Record):
    """A serial chain of revolute joints from a fixed base: the coupled rigid-body model."""

    bodies: tuple[BodyParams, ...] = Field(..., min_length=1, description="Base to tip.")
    gravity: Vector3 = Field(
        (0.0, 0.0, -9.80665), description="Gravity in the base frame, m/s^2 (ISO 80000-3)."
    )
    source: str = Field("", description="Where the model came from (a URDF file name).")
    tip_xyz: Vector3 = Field(
        (0.0, 0.0, 0.0),
        description="End-effector point in the last joint's frame, m (a URDF's tool frame).",
    )

    @model_serializer(mode="wrap")
    def _drop_unset_tip(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        return _without_defaults(handler(self), self, ("tip_xyz",))

    @property
    def joint_names(self) -> tuple[str, ...]:
        """Joint names, base to tip."""
        return tuple(body.joint for body in self.bodies)


ModelT = TypeVar("ModelT", bound=BaseModel)


def model_from_mapping(model: type[ModelT], data: object, *, source: str = "input") -> ModelT:
    """Validate ``data`` into ``model``; raise InvalidInputError naming the field and value.

    Parameters
    ----------
    model : pydantic model class
    data : mapping to validate
    source : where the data came from, used in the error message (a file name, a topic)
    """
    if not isinstance(data, dict):
        raise InvalidInputError(
            f"{source}: expected a mapping for a {_words(model.__name__)}, got "
            f"{type(data).__name__}"
        )
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise InvalidInputError(f"{source}: {validation_message(exc)}") from None


_SHOWN_VALUE_CHARS = 60


def shown_value(value: object, limit: int = _SHOWN_VALUE_CHARS) -> str:
    """``repr(value)`` cut to ``limit`` characters: an error line shows the value, not a file."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _words(class_name: str) -> str:
    """``PerturbationSchedule`` -> ``perturbation schedule``: a model named for a reader."""
    return re.sub(r"(?<=[a-z0-9])(?=[A-Z])", " ", class_name).lower()


def validation_message(exc: ValidationError, prefix: str = "") -> str:
    """One line naming the first invalid field (under ``prefix``), its value and the rule.

    The value is shown truncated (:func:`shown_value`), so a list of schedules given where one
    is expected names its key and the start of its value, not the whole file; a missing field is
    named without a value, because pydantic's "value" there is the whole enclosing mapping.
    """
    first = exc.errors()[0]
    field = ".".join(str(part) for part in first["loc"])
    where = f"{prefix}.{field}" if prefix and field else prefix or field or "value"
    if first["type"] == "missing":
        return f"field {where!r} is missing (required)"
    if first["type"] == "extra_forbidden":
        return (
            f"field {where!r} = {shown_value(first.get('input'))} is not a field of a "
            f"{_words(exc.title)} (unknown field)"
        )
    return f"field {where!r} = {shown_value(first.get('input'))}: {first['msg']}"


def read_yaml(path: str | Path) -> object:
    """Parse a YAML file with safe loading; every failure is an InvalidInputError naming the file.

    Only ``yaml.safe_load`` is used, so tags such as ``!!python/object`` are refused. Invalid
    UTF-8, nesting too deep for the parser and integers too long to convert are reported too.
    """
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8")
    except OSError as exc:
        raise InvalidInputError(f"{path}: cannot read file: {exc.strerror}") from None
    except UnicodeDecodeError as exc:
        raise InvalidInputError(
            f"{path}: not UTF-8 text: {exc.reason} at byte {exc.start}"
        ) from None
    try:
        return yaml.safe_load(text)
    except RecursionError:
        raise InvalidInputError(f"{path}: YAML nested too deeply") from None
    except (yaml.YAMLError, ValueError) as exc:
        mark = getattr(exc, "problem_mark", None)
        where = "" if mark is None else f" at line {mark.line + 1}, column {mark.column + 1}"
        problem = getattr(exc, "problem", None) or exc
        raise InvalidInputError(
            f"{path}: not a readable YAML document{where}: {' '.join(str(problem).split())}"
        ) from None


def load_yaml_model(model: type[ModelT], path: str | Path, *, key: str | None = None) -> ModelT:
    """Load ``model`` from a YAML file with safe loading, optionally from one top-level ``key``."""
    data = read_yaml(path)
    if key is not None:
        if not isinstance(data, dict) or key not in data:
            raise InvalidInputError(f"{path}: missing top-level key {key!r}")
        data = data[key]
    return model_from_mapping(model, data, source=str(path))
