"""Parameter records shared by the simulation, learning and evaluation: joints and mechanisms.

Every field carries its SI unit in its description. Records validate on construction and load
from YAML through :func:`load_yaml_model` (safe loading only).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Annotated, ClassVar, Literal, TypeVar

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "JointParams",
    "IdealImpedanceParams",
    "AntagonisticParams",
    "MechanismParams",
    "load_yaml_model",
    "model_from_mapping",
    "read_yaml",
    "validation_message",
    "shown_value",
]

PositiveFloat = Annotated[float, Field(gt=0, allow_inf_nan=False)]
NonNegativeFloat = Annotated[float, Field(ge=0, allow_inf_nan=False)]
FiniteFloat = Annotated[float, Field(allow_inf_nan=False)]


class _Record(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


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
        raise InvalidInputError(f"{path}: not a readable YAML document: {exc}") from None


def load_yaml_model(model: type[ModelT], path: str | Path, *, key: str | None = None) -> ModelT:
    """Load ``model`` from a YAML file with safe loading, optionally from one top-level ``key``."""
    data = read_yaml(path)
    if key is not None:
        if not isinstance(data, dict) or key not in data:
            raise InvalidInputError(f"{path}: missing top-level key {key!r}")
        data = data[key]
    return model_from_mapping(model, data, source=str(path))
