"""Perturbations for simulated replays: kinds, per-scenario schedules, YAML files and campaigns.

A perturbation acts on one joint of one scenario from ``onset_s`` for ``duration_s``. Torque
kinds (impulse, step, window, sinusoid, band-limited random torque) are functions of time; a wall
is a one-sided spring-damper contact and a hold blocks the link, both acting on the state. A
:class:`PerturbationSchedule` lists what happens in one scenario; a :class:`CampaignSpec` holds
distributions over kind, onset, duration, magnitude, sign and kind-specific fields, and
:func:`draw_scenarios` draws seeded batches of schedules from it. Edges snap to the integration
grid (see :func:`step_span`), so a simulator and a reference integrator agree on when things happen.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal, cast

import numpy as np
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
from compliant_demo.models import read_yaml, validation_message

__all__ = [
    "Impulse",
    "TorqueStep",
    "TorqueWindow",
    "Sinusoid",
    "RandomTorque",
    "Wall",
    "Hold",
    "Perturbation",
    "PERTURBATION_KINDS",
    "PerturbationSchedule",
    "perturbation_from_mapping",
    "schedule_from_mapping",
    "load_schedule_yaml",
    "load_schedules_yaml",
    "Uniform",
    "LogUniform",
    "Normal",
    "Choice",
    "Fixed",
    "Distribution",
    "CampaignSpec",
    "load_campaign_yaml",
    "draw_scenarios",
    "step_span",
    "NEVER",
    "random_torque_coefficients",
    "random_torque_value",
]

NEVER = 2**62  # step index of "never": the stop of open-ended perturbations
_Onset = Annotated[float, Field(ge=0, allow_inf_nan=False, description="Start time, s.")]
_Duration = Annotated[float, Field(ge=0, description="How long it acts, s (inf: to the end).")]
_FiniteDuration = Annotated[
    float, Field(ge=0, allow_inf_nan=False, description="How long it acts, s.")
]
_Joint = Annotated[int, Field(ge=0, description="Joint index in the simulated joint list.")]
_Sign = Annotated[Literal[-1, 1], Field(description="Direction: +1 or -1.")]
_NonNegative = Annotated[float, Field(ge=0, allow_inf_nan=False)]
_Positive = Annotated[float, Field(gt=0, allow_inf_nan=False)]


class _Kind(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    onset_s: _Onset = 0.0
    joint: _Joint = 0


class Impulse(_Kind):
    """Angular impulse: a velocity jump (duration 0) or a rectangular torque pulse of equal area."""

    kind: Literal["impulse"] = "impulse"
    duration_s: _FiniteDuration = 0.0
    magnitude: _NonNegative = Field(0.1, description="Angular impulse, N*m*s.")
    sign: _Sign = 1


class TorqueStep(_Kind):
    """Constant torque from onset on, for ``duration_s`` (default: to the end)."""

    kind: Literal["torque_step"] = "torque_step"
    duration_s: _Duration = math.inf
    magnitude: _NonNegative = Field(1.0, description="Torque, N*m.")
    sign: _Sign = 1


class TorqueWindow(_Kind):
    """Torque window with raised-cosine edges of ``ramp_s`` (a push that builds up and lets go)."""

    kind: Literal["torque_window"] = "torque_window"
    duration_s: _FiniteDuration = 0.2
    magnitude: _NonNegative = Field(1.0, description="Plateau torque, N*m.")
    sign: _Sign = 1
    ramp_s: _NonNegative = Field(0.02, description="Rise and fall time of each edge, s.")

    @model_validator(mode="after")
    def _ramps_fit(self) -> TorqueWindow:
        if 2 * self.ramp_s > self.duration_s:
            raise ValueError(
                f"ramp_s ({self.ramp_s}) is more than half of duration_s ({self.duration_s})"
            )
        return self


class Sinusoid(_Kind):
    """Sinusoidal torque ``sign*magnitude*sin(2*pi*frequency_hz*(t - onset) + phase_rad)``."""

    kind: Literal["sinusoid"] = "sinusoid"
    duration_s: _Duration = math.inf
    magnitude: _NonNegative = Field(0.5, description="Torque amplitude, N*m.")
    sign: _Sign = 1
    frequency_hz: _Positive = Field(2.0, description="Frequency, Hz.")
    phase_rad: float = Field(0.0, allow_inf_nan=False, description="Phase at onset, rad.")


class RandomTorque(_Kind):
    """Band-limited random torque: a seeded Fourier series periodic over its duration.

    The harmonics m/duration_s up to ``bandwidth_hz`` get Gaussian coefficients, scaled so the
    RMS over the window is exactly ``magnitude`` (spectral representation of a random process,
    Shinozuka and Deodatis, Appl. Mech. Rev. 44(4), 1991). ``seed`` None draws from the
    simulation seed and scenario index.
    """

    kind: Literal["random_torque"] = "random_torque"
    duration_s: _FiniteDuration = 1.0
    magnitude: _NonNegative = Field(0.3, description="RMS torque over the window, N*m.")
    sign: _Sign = 1
    bandwidth_hz: _Positive = Field(5.0, description="Highest frequency present, Hz.")
    seed: int | None = Field(None, ge=0, description="Seed of the coefficients.")


class Wall(_Kind):
    """One-sided virtual wall: spring-damper contact that only pushes, never pulls.

    ``sign`` +1 blocks motion above ``position`` (contact while q > position), -1 below it.
    With ``relative`` the surface sits ``position`` from the angle the link has at onset.
    """

    kind: Literal["wall"] = "wall"
    duration_s: _Duration = math.inf
    magnitude: _Positive = Field(300.0, description="Wall stiffness, N*m/rad.")
    sign: _Sign = 1
    position: float = Field(0.0, allow_inf_nan=False, description="Wall surface angle, rad.")
    damping: _NonNegative = Field(1.0, description="Wall damping in contact, N*m*s/rad.")
    relative: bool = Field(
        False,
        description="Position counts from the link angle at onset (an obstacle in the path).",
    )


class Hold(_Kind):
    """The link is blocked where it is at onset (velocity set to zero) for ``duration_s``."""

    kind: Literal["hold"] = "hold"
    duration_s: _Duration = 0.2


Perturbation = Annotated[
    Impulse | TorqueStep | TorqueWindow | Sinusoid | RandomTorque | Wall | Hold,
    Field(discriminator="kind"),
]
_MODELS: dict[str, type[_Kind]] = {
    model.model_fields["kind"].default: model
    for model in (Impulse, TorqueStep, TorqueWindow, Sinusoid, RandomTorque, Wall, Hold)
}
PERTURBATION_KINDS: tuple[str, ...] = tuple(_MODELS)


class PerturbationSchedule(BaseModel):
    """What happens in one scenario: a name and a list of perturbations (may be empty)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: str = Field("scenario", min_length=1)
    perturbations: list[Perturbation] = Field(default_factory=list)

    @property
    def kinds(self) -> list[str]:
        """Kinds in order of appearance."""
        return [p.kind for p in self.perturbations]

    @property
    def kind_label(self) -> str:
        """The kinds joined by "+" (``"wall+impulse"``), or ``"none"`` for an empty schedule."""
        return "+".join(self.kinds) or "none"

    def windows(self, end_s: float) -> tuple[list[float], list[float]]:
        """Sorted ``(onsets, ends)`` of the perturbations that start by ``end_s``, s; ends are
        clipped to ``end_s`` (an impulse's window is its onset)."""
        spans = sorted(
            (p.onset_s, min(p.onset_s + getattr(p, "duration_s", 0.0), end_s))
            for p in self.perturbations
            if p.onset_s <= end_s
        )
        return [a for a, _ in spans], [b for _, b in spans]


def _check_kind(data: object, where: str) -> type[_Kind]:
    if not isinstance(data, Mapping):
        raise InvalidInputError(f"{where}: expected a mapping, got {type(data).__name__}")
    kind = data.get("kind")
    if kind not in _MODELS:
        raise InvalidInputError(
            f"{where}.kind = {kind!r} is not a perturbation kind (known: "
            f"{', '.join(PERTURBATION_KINDS)})"
        )
    return _MODELS[kind]


def perturbation_from_mapping(data: object, *, where: str = "perturbation") -> Perturbation:
    """Validate one perturbation mapping; raise InvalidInputError naming the field and value."""
    model = _check_kind(data, where)
    try:
        return cast(Perturbation, model.model_validate(data))
    except ValidationError as exc:
        raise InvalidInputError(f"{where}: {validation_message(exc)}") from None


def schedule_from_mapping(data: object, *, where: str = "schedule") -> PerturbationSchedule:
    """Validate a schedule mapping ``{name, perturbations: [...]}`` with named errors."""
    if not isinstance(data, Mapping):
        raise InvalidInputError(f"{where}: expected a mapping, got {type(data).__name__}")
    items = data.get("perturbations", [])
    if not isinstance(items, list):
        raise InvalidInputError(f"{where}.perturbations: expected a list, got {items!r}")
    parsed = [
        perturbation_from_mapping(item, where=f"{where}.perturbations[{i}]")
        for i, item in enumerate(items)
    ]
    try:
        return PerturbationSchedule.model_validate({**data, "perturbations": parsed})
    except ValidationError as exc:
        raise InvalidInputError(f"{where}: {validation_message(exc)}") from None


def load_schedule_yaml(path: str | Path) -> PerturbationSchedule:
    """Load one schedule from YAML (safe loading): ``{name, perturbations: [{kind, ...}, ...]}``.

    Raises
    ------
    InvalidInputError
        Unreadable file, unknown ``kind`` (named in the message) or an invalid field.
    """
    data = read_yaml(path)
    if isinstance(data, Mapping) and "perturbations" not in data:
        if "scenarios" in data:
            raise InvalidInputError(
                f"{path}: holds a list of schedules ('scenarios'), one per scenario; one "
                "schedule {name, perturbations: [...]} is needed here, e.g. "
                "config/replay_bumps.yaml"
            )
        if "campaign" in data or "kinds" in data:
            raise InvalidInputError(
                f"{path}: is a campaign spec, not a schedule; use it with "
                "`compliant-demo campaign --spec` (load_campaign_yaml)"
            )
    return schedule_from_mapping(data, where=str(path))


def load_schedules_yaml(path: str | Path) -> list[PerturbationSchedule]:
    """Load a list of schedules from ``{scenarios: [schedule, ...]}`` or one schedule mapping."""
    data = read_yaml(path)
    if isinstance(data, Mapping) and "scenarios" in data:
        scenarios = data["scenarios"]
        if not isinstance(scenarios, list):
            raise InvalidInputError(f"{path}.scenarios: expected a list, got {scenarios!r}")
        return [
            schedule_from_mapping(item, where=f"{path}.scenarios[{i}]")
            for i, item in enumerate(scenarios)
        ]
    return [schedule_from_mapping(data, where=str(path))]


def step_span(perturbation: Perturbation, dt: float) -> tuple[int, int]:
    """Integration steps ``[start, stop)`` during which a perturbation acts.

    Edges snap to the nearest step boundary (a shift of at most dt/2); a non-zero duration
    lasts at least one step; an infinite one never stops (``stop`` = :data:`NEVER`). An
    instantaneous impulse returns ``(start, start)``: a velocity jump at the start of step
    ``start``.
    """
    start = int(round(perturbation.onset_s / dt))
    if perturbation.duration_s == 0:
        return start, start
    if math.isinf(perturbation.duration_s):
        return start, NEVER
    return start, max(start + 1, int(round((perturbation.onset_s + perturbation.duration_s) / dt)))


def random_torque_coefficients(
    perturbation: RandomTorque, period_s: float, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Fourier coefficients of a band-limited random torque over one period.

    Returns
    -------
    frequencies : (m,) array, Hz; the harmonics k/period_s, k = 1..m, up to bandwidth_hz
    coefficients : (m,) complex array, N*m; the torque is Re(sum c_k exp(2j*pi*f_k*t))
    """
    n_harmonics = max(1, int(math.floor(perturbation.bandwidth_hz * period_s)))
    frequencies = np.arange(1, n_harmonics + 1) / period_s
    coefficients = rng.standard_normal(n_harmonics) + 1j * rng.standard_normal(n_harmonics)
    # mean square of Re(c exp(i w t)) over a period is |c|^2 / 2
    rms = math.sqrt(float(np.sum(np.abs(coefficients) ** 2)) / 2.0)
    return frequencies, coefficients * (perturbation.sign * perturbation.magnitude / rms)


def random_torque_value(
    frequencies: np.ndarray, coefficients: np.ndarray, t_since_onset: np.ndarray | float
) -> np.ndarray:
    """Evaluate the series of :func:`random_torque_coefficients` at times since onset (s), N*m."""
    t = np.asarray(t_since_onset, dtype=float)
    phase = np.exp(2j * np.pi * np.multiply.outer(t, frequencies))
    return np.real(phase @ coefficients)


class Uniform(BaseModel):
    """Uniform on [low, high]."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    distribution: Literal["uniform"] = "uniform"
    low: float = Field(allow_inf_nan=False)
    high: float = Field(allow_inf_nan=False)

    @model_validator(mode="after")
    def _ordered(self) -> Uniform:
        if self.low > self.high:
            raise ValueError(f"low ({self.low}) is above high ({self.high})")
        return self

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return rng.uniform(self.low, self.high, n)


class LogUniform(BaseModel):
    """Log-uniform on [low, high], both positive: equal odds per decade."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    distribution: Literal["log_uniform"] = "log_uniform"
    low: _Positive
    high: _Positive

    @model_validator(mode="after")
    def _ordered(self) -> LogUniform:
        if self.low > self.high:
            raise ValueError(f"low ({self.low}) is above high ({self.high})")
        return self

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return np.exp(rng.uniform(math.log(self.low), math.log(self.high), n))


class Normal(BaseModel):
    """Normal with ``mean`` and ``std``, redrawn outside [low, high] when given."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    distribution: Literal["normal"] = "normal"
    mean: float = Field(allow_inf_nan=False)
    std: _NonNegative
    low: float = Field(-math.inf)
    high: float = Field(math.inf)

    @model_validator(mode="after")
    def _bounds_hold_mass(self) -> Normal:
        if not self.low < self.high or not self.low <= self.mean <= self.high:
            raise ValueError(
                f"need low < high and the mean inside: low={self.low}, mean={self.mean}, "
                f"high={self.high}"
            )
        return self

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        values = rng.normal(self.mean, self.std, n)
        outside = (values < self.low) | (values > self.high)
        # the mean is inside, so rejection terminates; clip after many rounds to stay bounded
        for _ in range(100):
            if not outside.any():
                break
            values[outside] = rng.normal(self.mean, self.std, int(outside.sum()))
            outside = (values < self.low) | (values > self.high)
        return np.clip(values, self.low, self.high)


class Choice(BaseModel):
    """One of ``values`` with optional ``weights`` (normalised)."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    distribution: Literal["choice"] = "choice"
    values: list[float] = Field(min_length=1)
    weights: list[_NonNegative] | None = None

    @model_validator(mode="after")
    def _weights_match(self) -> Choice:
        if self.weights is not None and (
            len(self.weights) != len(self.values) or sum(self.weights) <= 0
        ):
            raise ValueError(
                f"weights {self.weights} must match values {self.values} and sum above zero"
            )
        return self

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        p = None if self.weights is None else np.asarray(self.weights) / sum(self.weights)
        return rng.choice(np.asarray(self.values, dtype=float), size=n, p=p)


class Fixed(BaseModel):
    """Always ``value``."""

    model_config = ConfigDict(extra="forbid", frozen=True)
    distribution: Literal["fixed"] = "fixed"
    value: float

    def draw(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return np.full(n, self.value)


Distribution = Annotated[
    Uniform | LogUniform | Normal | Choice | Fixed, Field(discriminator="distribution")
]


class CampaignSpec(BaseModel):
    """Distributions a campaign draws its scenarios from.

    Each scenario gets ``perturbations_per_scenario`` perturbations; each perturbation draws its
    kind (weights ``kinds``), joint (uniform over ``joints``), onset, duration (per kind, else
    ``duration_s``), magnitude (per kind), sign (+1 with ``positive_sign_probability``) and any
    further field in ``fields[kind]`` (e.g. a wall's ``position``, a sinusoid's
    ``frequency_hz``). Fields not drawn keep the kind's default.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: str = Field("campaign", min_length=1)
    kinds: dict[str, _Positive] = Field(min_length=1, description="Kind -> relative weight.")
    joints: list[_Joint] = Field([0], min_length=1)
    perturbations_per_scenario: int = Field(1, ge=0)
    onset_s: Distribution = Field(default_factory=lambda: Uniform(low=0.5, high=2.0))
    duration_s: dict[str, Distribution] = Field(
        default_factory=dict, description="Kind -> duration distribution, s."
    )
    magnitude: dict[str, Distribution] = Field(
        default_factory=dict, description="Kind -> magnitude distribution (the kind's unit)."
    )
    positive_sign_probability: float = Field(0.5, ge=0, le=1)
    fields: dict[str, dict[str, Distribution]] = Field(default_factory=dict)
    # Generalisation (compliant_demo.generalisation.draw_target): new goals and durations per
    # scenario. Left out of the JSON when not drawn, so nominal campaigns store what they did.
    goal_offset_rad: dict[_Joint, Distribution] = Field(
        default_factory=dict, description="Joint index -> offset added to its goal, rad.")
    duration_scale: Distribution | None = Field(
        default=None, description="Factor on the movement duration, 1; None = the setup's "
        "duration.")

    @model_validator(mode="after")
    def _duration_scale_positive(self) -> CampaignSpec:
        scale = self.duration_scale
        lowest = (None if scale is None else scale.value if isinstance(scale, Fixed)
                  else min(scale.values) if isinstance(scale, Choice) else scale.low)
        if lowest is not None and not lowest > 0:
            raise ValueError(f"duration_scale: can draw {lowest}; a duration scale must stay "
                             "above 0 (give a positive low)")
        return self

    @model_serializer(mode="wrap")
    def _drop_undrawn(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        data = handler(self)
        if not self.goal_offset_rad:
            data.pop("goal_offset_rad", None)
        if self.duration_scale is None:
            data.pop("duration_scale", None)
        return data

    @model_validator(mode="after")
    def _names_known(self) -> CampaignSpec:
        for table in ("kinds", "duration_s", "magnitude", "fields"):
            for kind in getattr(self, table):
                if kind not in _MODELS:
                    raise ValueError(
                        f"{table} names {kind!r}, not a perturbation kind "
                        f"(known: {', '.join(PERTURBATION_KINDS)})"
                    )
        for kind, extra in self.fields.items():
            for name in extra:
                if name not in _MODELS[kind].model_fields or name in ("kind", "joint"):
                    raise ValueError(f"fields.{kind} names {name!r}, not a drawable field")
        for kind in self.magnitude:
            if "magnitude" not in _MODELS[kind].model_fields:
                raise ValueError(f"magnitude given for {kind!r}, which has no magnitude")
        return self


def load_campaign_yaml(path: str | Path) -> CampaignSpec:
    """Load a :class:`CampaignSpec` from YAML (safe loading), optionally under key ``campaign``."""
    data = read_yaml(path)
    if isinstance(data, Mapping) and "campaign" in data:
        data = data["campaign"]
    if not isinstance(data, Mapping):
        raise InvalidInputError(f"{path}: expected a mapping, got {type(data).__name__}")
    if "kinds" not in data and ("perturbations" in data or "scenarios" in data):
        raise InvalidInputError(
            f"{path}: holds perturbation schedules, not a campaign spec (kinds, onset_s, "
            "duration_s, magnitude); a single schedule goes to `compliant-demo replay "
            "--schedule` (load_schedule_yaml)"
        )
    try:
        return CampaignSpec.model_validate(data)
    except ValidationError as exc:
        raise InvalidInputError(f"{path}: {validation_message(exc)}") from None


def draw_scenarios(
    spec: CampaignSpec, n_scenarios: int, seed: int | np.random.SeedSequence | None
) -> list[PerturbationSchedule]:
    """Draw ``n_scenarios`` schedules from ``spec``; equal seeds give equal schedules.

    Draws are made per field across the whole batch (vectorised), then assembled. A drawn
    value a kind rejects (say a negative magnitude from a wide normal) raises
    InvalidInputError naming the scenario, field and value.
    """
    if isinstance(n_scenarios, bool) or not isinstance(n_scenarios, int) or n_scenarios < 0:
        raise InvalidInputError(f"n_scenarios = {n_scenarios!r}: expected an integer >= 0")
    rng = np.random.default_rng(seed)
    n = n_scenarios * spec.perturbations_per_scenario
    names = list(spec.kinds)
    weights = np.asarray([spec.kinds[k] for k in names])
    kind_index = rng.choice(len(names), size=n, p=weights / weights.sum())
    joints = rng.choice(np.asarray(spec.joints), size=n)
    onsets = spec.onset_s.draw(rng, n)
    signs = np.where(rng.random(n) < spec.positive_sign_probability, 1, -1)
    values: dict[str, dict[str, np.ndarray]] = {}
    for kind in names:
        drawn = {name: dist.draw(rng, n) for name, dist in spec.fields.get(kind, {}).items()}
        if kind in spec.duration_s:
            drawn["duration_s"] = spec.duration_s[kind].draw(rng, n)
        if kind in spec.magnitude:
            drawn["magnitude"] = spec.magnitude[kind].draw(rng, n)
        values[kind] = drawn
    schedules = []
    for s in range(n_scenarios):
        items = []
        per = spec.perturbations_per_scenario
        for i in range(s * per, (s + 1) * per):
            kind = names[kind_index[i]]
            model = _MODELS[kind]
            data: dict[str, Any] = {"kind": kind, "joint": int(joints[i]), "onset_s": onsets[i]}
            if "sign" in model.model_fields:
                data["sign"] = int(signs[i])
            data.update({name: float(v[i]) for name, v in values[kind].items()})
            if "seed" in model.model_fields and "seed" not in data:
                data["seed"] = int(rng.integers(0, 2**31 - 1))
            elif "seed" in data:
                data["seed"] = int(data["seed"])
            items.append(perturbation_from_mapping(data, where=f"scenario {s}, draw {i}"))
        schedules.append(PerturbationSchedule(name=f"{spec.name}_{s:05d}", perturbations=items))
    return schedules
