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
from collections.abc import Callable, Mapping
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
    "raised_cosine_edges",
    "WALL_SIDES",
    "place_relative_walls",
    "PLANT_PARAMETERS",
]

#: Plant parameters a campaign can vary, with what each scales. Joint parameters come from
#: :class:`compliant_demo.models.JointParams`; spring constants and lags from the mechanism.
PLANT_PARAMETERS: dict[str, str] = {
    "inertia": "link inertia about the axis, kg*m^2 (a coupled arm: the link's mass and inertia "
               "tensor together)",
    "gravity_mass": "link mass of the gravity load, kg (independent joints only)",
    "viscous_damping": "viscous friction of the bearing, N*m*s/rad",
    "coulomb_friction": "Coulomb friction torque, N*m",
    "torque_noise_std": "torque-sensor noise, N*m",
    "k1": "linear spring coefficient of the antagonistic springs, N*m/rad",
    "k2": "quadratic spring coefficient of the antagonistic springs, N*m/rad^2",
    "motor_time_constant": "lag of the antagonistic mechanism's motors, s",
    "time_constant": "lag of the ideal mechanism's stiffness and damping, s",
}
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
    """Band-limited random torque: a seeded Fourier series periodic over its duration, tapered.

    The harmonics m/duration_s up to ``bandwidth_hz`` get Gaussian coefficients (spectral
    representation of a random process, Shinozuka and Deodatis, Appl. Mech. Rev. 44(4), 1991).
    The series is multiplied by a Tukey (tapered-cosine) window (Harris, Proc. IEEE 66(1),
    1978): raised-cosine edges that together span ``taper_fraction`` of the duration, so the
    torque rises from zero and falls back to zero instead of switching on and off with a step.
    The coefficients are scaled so the RMS over the untapered middle is exactly ``magnitude``.
    The default 0.2 (each edge 10 % of the window: 50-150 ms for windows of 0.5-1.5 s, at
    least the half period of the band's highest harmonic at 5 Hz and above) keeps 80 % of the
    window at full strength (a common Tukey choice; a value from practice, not a standard).
    ``seed`` None draws from the simulation seed and scenario index.
    """

    kind: Literal["random_torque"] = "random_torque"
    duration_s: _FiniteDuration = 1.0
    magnitude: _NonNegative = Field(0.3, description="RMS torque over the window, N*m.")
    sign: _Sign = 1
    bandwidth_hz: _Positive = Field(5.0, description="Highest frequency present, Hz.")
    seed: int | None = Field(None, ge=0, description="Seed of the coefficients.")
    taper_fraction: float = Field(
        0.2, ge=0, lt=1, allow_inf_nan=False,
        description="Fraction of the duration in the two raised-cosine edges, 1 (0: steps).",
    )


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

    def touched(self, t: np.ndarray, q: np.ndarray) -> bool:
        """Whether the joint went beyond the surface at a sample inside the wall's window.

        Parameters
        ----------
        t : (n_samples,) s; q : (n_samples,) rad, the angle of the wall's joint

        Notes
        -----
        A relative surface counts from the angle interpolated at ``onset_s``. Only recorded
        samples are looked at: a graze shorter than the sample spacing can pass unseen.
        """
        times, angle = np.asarray(t, dtype=float), np.asarray(q, dtype=float)
        surface = self.position + (float(np.interp(self.onset_s, times, angle))
                                   if self.relative else 0.0)
        inside = (times >= self.onset_s) & (times <= self.onset_s + self.duration_s)
        return bool(np.any((angle[inside] - surface) * self.sign > 0))


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

    def _spans(self, end_s: float) -> list[tuple[float, float, Perturbation]]:
        """(onset, end clipped to ``end_s``, perturbation) of those starting by ``end_s``, s,
        sorted by onset and end (stable)."""
        spans = [(p.onset_s, min(p.onset_s + getattr(p, "duration_s", 0.0), end_s), p)
                 for p in self.perturbations if p.onset_s <= end_s]
        return sorted(spans, key=lambda span: span[:2])

    def windows(self, end_s: float) -> tuple[list[float], list[float]]:
        """Sorted ``(onsets, ends)`` of the perturbations that start by ``end_s``, s; ends are
        clipped to ``end_s`` (an impulse's window is its onset)."""
        spans = self._spans(end_s)
        return [a for a, _, _ in spans], [b for _, b, _ in spans]

    def acted(self, t: np.ndarray, q: np.ndarray) -> list[bool]:
        """Per window of :meth:`windows` (same order): False for a wall the link never touched
        (:meth:`Wall.touched`), True for every other perturbation.

        Parameters
        ----------
        t : (n_samples,) s; q : (n_samples, n_joints) rad
        """
        angles = np.asarray(q, dtype=float)
        return [not isinstance(p, Wall) or p.touched(t, angles[:, p.joint])
                for _, _, p in self._spans(float(t[-1]))]


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

    Scaled so the series' RMS over the untapered middle ``[r, period_s - r]`` of the window,
    r = taper_fraction * period_s / 2, is exactly ``magnitude`` (:func:`_mean_square`).

    Returns
    -------
    frequencies : (m,) array, Hz; the harmonics k/period_s, k = 1..m, up to bandwidth_hz
    coefficients : (m,) complex array, N*m; the torque is Re(sum c_k exp(2j*pi*f_k*t)) times
        the window's :func:`raised_cosine_edges`
    """
    n_harmonics = max(1, int(math.floor(perturbation.bandwidth_hz * period_s)))
    frequencies = np.arange(1, n_harmonics + 1) / period_s
    coefficients = rng.standard_normal(n_harmonics) + 1j * rng.standard_normal(n_harmonics)
    ramp = 0.5 * perturbation.taper_fraction * period_s
    rms = math.sqrt(_mean_square(frequencies, coefficients, ramp, period_s - ramp))
    return frequencies, coefficients * (perturbation.sign * perturbation.magnitude / rms)


def _mean_square(
    frequencies: np.ndarray, coefficients: np.ndarray, start: float, stop: float
) -> float:
    """Exact mean of x(t)^2 over [start, stop] for x = Re(sum c_k exp(2j*pi*f_k*t)).

    Notes
    -----
    x^2 = (Re(z^2) + |z|^2) / 2 with z = sum c_k exp(2j*pi*f_k*t), and the mean of
    exp(2j*pi*f*t) over an interval of length L centred on m is exp(2j*pi*f*m) * sinc(f*L)
    (normalised sinc; common practice). Over whole periods it reduces to sum |c_k|^2 / 2
    (Parseval).
    """
    length, centre = stop - start, 0.5 * (start + stop)
    total = 0.0
    for offsets, products in (
        (np.add.outer(frequencies, frequencies), np.outer(coefficients, coefficients)),
        (np.subtract.outer(frequencies, frequencies),
         np.outer(coefficients, coefficients.conj())),
    ):
        mean_phase = np.exp(2j * np.pi * offsets * centre) * np.sinc(offsets * length)
        total += float(np.real(np.sum(products * mean_phase)))
    return 0.5 * total


def random_torque_value(
    frequencies: np.ndarray, coefficients: np.ndarray, t_since_onset: np.ndarray | float
) -> np.ndarray:
    """Evaluate the series of :func:`random_torque_coefficients` at times since onset (s), N*m
    (untapered: multiply by :func:`raised_cosine_edges` for the applied torque)."""
    t = np.asarray(t_since_onset, dtype=float)
    phase = np.exp(2j * np.pi * np.multiply.outer(t, frequencies))
    return np.real(phase @ coefficients)


def raised_cosine_edges(
    t_since_onset: np.ndarray | float, length_s: float, ramp_s: float, height: float = 1.0
) -> np.ndarray:
    """Window of a perturbation of ``length_s`` with raised-cosine edges of ``ramp_s`` each.

    ``height * (1 - cos(pi * e)) / 2`` with e = min(t, length_s - t) / ramp_s clipped to
    [0, 1]: 0 at both ends, ``height`` between the edges (a Tukey window; ``ramp_s`` 0 gives
    ``height`` throughout). Times in s; the result has the unit of ``height``.
    """
    t = np.asarray(t_since_onset, dtype=float)
    if ramp_s == 0:
        return np.full(np.shape(t), height)
    edge = np.clip(np.minimum(t, length_s - t) / ramp_s, 0.0, 1.0)
    return height * 0.5 * (1.0 - np.cos(np.pi * edge))


#: Where a campaign puts its relative walls (:func:`place_relative_walls`).
WALL_SIDES: tuple[str, ...] = ("toward", "away", "both", "as_drawn")


def place_relative_walls(
    schedule: PerturbationSchedule,
    motion: Callable[[int, float, float], float],
    side: str,
) -> PerturbationSchedule:
    """The schedule with its relative walls on the side the joint moves toward (or away from).

    Parameters
    ----------
    schedule : drawn schedule
    motion : ``(joint, onset_s, duration_s) -> displacement`` of the unperturbed motion over the
        wall's window (rad); only its sign is used: the direction the joint goes
    side : ``"toward"``: each relative wall sits ``|position|`` from the link's angle at onset
        in the direction it goes and blocks further motion that way; ``"away"``: as far on the
        other side, blocking a return; ``"both"``: toward when the drawn sign is +1, away when
        it is -1; ``"as_drawn"``: sign and position as drawn (campaigns stored before this
        setting)

    Notes
    -----
    The direction is that of the motion over the window rather than the velocity at onset: a
    joint that turns round just after the onset (near a turning point of the path) would
    otherwise get a wall on the side it leaves. A displacement of exactly 0 keeps the drawn
    sign. Walls with absolute positions are left as they are.
    """
    if side not in WALL_SIDES:
        raise InvalidInputError(f"side = {side!r}: expected one of {', '.join(WALL_SIDES)}")
    if side == "as_drawn":
        return schedule
    placed: list[Perturbation] = []
    for p in schedule.perturbations:
        if isinstance(p, Wall) and p.relative:
            moving = int(np.sign(motion(p.joint, p.onset_s, p.duration_s))) or p.sign
            toward = side == "toward" or (side == "both" and p.sign == 1)
            sign = moving if toward else -moving
            p = p.model_copy(update={"sign": sign, "position": sign * abs(p.position)})
        placed.append(p)
    return schedule.model_copy(update={"perturbations": placed})


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
    ``frequency_hz``). Fields not drawn keep the kind's default. A campaign then puts relative
    walls on the side ``wall_side`` of the motion (:func:`place_relative_walls`; the drawn
    position's magnitude is kept).
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

    # walls and plant variation: where relative walls go, and model uncertainty
    wall_side: Literal["toward", "away", "both", "as_drawn"] = Field(
        default="toward",
        description="Side of the motion relative walls are put on (place_relative_walls).",
    )
    plant_variation: dict[str, Distribution] = Field(
        default_factory=dict,
        description="Plant parameter (PLANT_PARAMETERS) -> distribution of the factor on its "
                    "nominal value, 1 (compliant_demo.plant_variation); empty: the nominal plant.",
    )

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
        for name, factor in self.plant_variation.items():
            if name not in PLANT_PARAMETERS:
                raise ValueError(f"plant_variation names {name!r}, not a plant parameter "
                                 f"(known: {', '.join(PLANT_PARAMETERS)})")
            if not _smallest(factor) > 0:
                raise ValueError(f"plant_variation.{name} can draw the factor "
                                 f"{_smallest(factor)}; factors must be > 0 (bound a normal "
                                 "with low)")
        return self


def _smallest(distribution: Uniform | LogUniform | Normal | Choice | Fixed) -> float:
    """The smallest value ``distribution`` can draw."""
    if isinstance(distribution, Choice):
        return min(distribution.values)
    if isinstance(distribution, Fixed):
        return distribution.value
    return distribution.low


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
