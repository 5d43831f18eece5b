"""The simulated target of a replay: its joints and its variable-stiffness mechanism.

One plant description serves every replay (the replay node, ``compliant-demo replay``, campaigns,
the report and the tour). Without a file the package's default plant is used everywhere: the
cork_seat bench arm on antagonistic spring pairs (``config/joint_cork_seat_antagonistic.yaml``),
the mechanism a real variable-stiffness joint of that kind has, with no damping input.

A plant file either lists independent joints (``{joints: [...], mechanism: {...}}``) or names a
URDF of a serial arm and gives each joint's actuator (``{urdf: FILE, actuators: {joint:
{mechanism: {...}, ...}}}``, see :class:`compliant_demo.models.ActuatorParams`): the links are
then one coupled rigid-body chain. ``config/arm_cork_seat.yaml`` is the cork_seat bench arm
read that way (``compliant_demo/data/arm_cork_seat.urdf``); it is not the default plant.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SerializerFunctionWrapHandler,
    model_serializer,
    model_validator,
)

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import (
    ActuatorParams,
    ChainParams,
    IdealImpedanceParams,
    JointParams,
    MechanismParams,
    model_from_mapping,
    read_yaml,
)
from compliant_demo.resources import package_file

__all__ = [
    "DEFAULT_PLANT_FILE",
    "ReplayPlant",
    "default_plant_path",
    "load_plant",
    "plant_from_urdf",
]

#: The plant every command, node and the tour use when none is given (in ``config/``).
DEFAULT_PLANT_FILE = "joint_cork_seat_antagonistic.yaml"

_DATA_DIR = Path(__file__).resolve().parent / "data"


class ReplayPlant(BaseModel):
    """The simulated target: one JointParams per joint and the shared mechanism.

    A plant read from a URDF also holds its coupled ``chain`` and one mechanism record per
    joint (``mechanisms``, all of the kind of ``mechanism``, which is the first joint's).
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    joints: tuple[JointParams, ...] = Field(..., min_length=1, description="Target joints.")
    mechanism: MechanismParams = Field(
        default_factory=lambda: IdealImpedanceParams.model_validate({}),
        description="Variable-stiffness mechanism.",
    )
    mechanisms: tuple[MechanismParams, ...] | None = Field(
        None, description="One mechanism per joint (same kind), or None: all share `mechanism`."
    )
    chain: ChainParams | None = Field(
        None, description="Coupled rigid-body model of the joints, or None: independent joints."
    )
    urdf_sha256: str | None = Field(
        None, pattern="^[0-9a-f]{64}$",
        description="SHA-256 (hex) of the URDF file's bytes the chain was read from, or None.",
    )

    @model_validator(mode="after")
    def _consistent(self) -> ReplayPlant:
        names = tuple(joint.name for joint in self.joints)
        if self.chain is not None and self.chain.joint_names != names:
            raise ValueError(
                f"chain joints {list(self.chain.joint_names)} differ from joints {list(names)}"
            )
        if self.mechanisms is not None:
            if len(self.mechanisms) != len(names):
                raise ValueError(
                    f"mechanisms: {len(self.mechanisms)} records for {len(names)} joints"
                )
            kinds = {m.kind for m in self.mechanisms}
            if kinds != {self.mechanism.kind}:
                raise ValueError(
                    f"mechanisms: kinds {sorted(kinds)}; all must be {self.mechanism.kind!r}"
                )
        return self

    @model_serializer(mode="wrap")
    def _drop_unset(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        # plants without a chain serialise as before, so stored campaign configs still match
        data = handler(self)
        for key in ("mechanisms", "chain", "urdf_sha256"):
            if data.get(key) is None:
                data.pop(key, None)
        return data

    def for_joints(self, names: Sequence[str]) -> list[JointParams]:
        """The joint records for ``names``, in that order; InvalidInputError if one is missing.

        A coupled plant moves all its joints together: ``names`` must be all of them, in order.
        """
        by_name = {joint.name: joint for joint in self.joints}
        missing = [name for name in names if name not in by_name]
        if missing:
            raise InvalidInputError(
                f"plant joints {sorted(by_name)} lack {missing} that the skill moves"
            )
        if self.chain is not None and tuple(names) != self.chain.joint_names:
            raise InvalidInputError(
                f"skill joints {list(names)}: the coupled plant {self.chain.source!r} replays "
                f"skills over all its joints in order {list(self.chain.joint_names)}"
            )
        return [by_name[name] for name in names]

    def mechanisms_for(self, names: Sequence[str]) -> list[MechanismParams]:
        """The mechanism record of each joint in ``names`` (see :meth:`for_joints`)."""
        self.for_joints(names)
        if self.mechanisms is None:
            return [self.mechanism] * len(names)
        by_name = {j.name: m for j, m in zip(self.joints, self.mechanisms, strict=True)}
        return [by_name[name] for name in names]

    @property
    def digest(self) -> str:
        """SHA-256 (hex) of the plant's canonical JSON (sorted keys, no spaces): every parameter,
        and for a plant read from a URDF the file's content (``urdf_sha256``). Two loads of the
        same files give the same digest; any parameter change gives another."""
        text = json.dumps(self.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def describe(self) -> str:
        """One line for summaries: joints and mechanism kind (and the URDF of a chain)."""
        names = ", ".join(joint.name for joint in self.joints)
        text = f"{self.mechanism.kind} mechanism on joints {names}"
        if self.chain is not None:
            text += f" (coupled arm {self.chain.source})"
        return text


def default_plant_path() -> Path:
    """Path of the package's default plant file (see :data:`DEFAULT_PLANT_FILE`)."""
    return package_file("config", DEFAULT_PLANT_FILE)


def _urdf_path(value: object, plant_file: Path) -> Path:
    if not isinstance(value, str) or not value:
        raise InvalidInputError(f"{plant_file}: field 'urdf' = {value!r}: expected a file name")
    given = Path(value)
    if given.is_absolute():
        return given
    beside = plant_file.parent / given
    return beside if beside.is_file() else _DATA_DIR / given


def plant_from_urdf(urdf: str | Path, actuators: object, *, source: str = "actuators"
                    ) -> ReplayPlant:
    """A coupled plant from a URDF file and one actuator record per joint.

    Parameters
    ----------
    urdf : URDF file of a serial arm of revolute joints (read with Pinocchio)
    actuators : mapping joint name -> :class:`ActuatorParams` fields, one per URDF joint
    source : where ``actuators`` came from, for error messages

    Notes
    -----
    Each joint's ``inertia`` is the diagonal of the mass matrix at zero angles, the inertia a
    joint feels with the others held still (damping policy, damping ratio); the chain carries
    the gravity load, limits come from ``<limit>`` (effort: ``torque_limit``), viscous damping
    and Coulomb friction from ``<dynamics>``.
    """
    import numpy as np

    from compliant_demo.sim.rigid_body import ChainKernel
    from compliant_demo.sim.urdf import read_urdf

    chain, urdf_joints = read_urdf(urdf)
    urdf_sha256 = hashlib.sha256(Path(urdf).read_bytes()).hexdigest()
    if not isinstance(actuators, dict):
        raise InvalidInputError(f"{source}: expected a mapping joint name -> actuator")
    names = [joint.name for joint in urdf_joints]
    unknown = sorted(set(actuators) - set(names))
    missing = [name for name in names if name not in actuators]
    if unknown or missing:
        raise InvalidInputError(
            f"{source}: actuators for {sorted(map(str, actuators))}, URDF joints {names}"
            + (f"; unknown {unknown}" if unknown else "")
            + (f"; missing {missing}" if missing else "")
        )
    records = [model_from_mapping(ActuatorParams, actuators[name], source=f"{source}.{name}")
               for name in names]
    inertia = ChainKernel(chain).mass_matrix(np.zeros((len(names), 1)))[0].diagonal()
    joints = tuple(
        JointParams(
            name=u.name, inertia=float(inertia[i]), viscous_damping=u.damping,
            coulomb_friction=u.friction, lower_limit=u.lower_limit, upper_limit=u.upper_limit,
            torque_limit=u.effort_limit,
            **a.model_dump(exclude={"mechanism"}),
        )
        for i, (u, a) in enumerate(zip(urdf_joints, records, strict=True))
    )
    mechanisms = tuple(a.mechanism for a in records)
    return model_from_mapping(ReplayPlant, {"joints": joints, "mechanism": mechanisms[0],
                                            "mechanisms": mechanisms, "chain": chain,
                                            "urdf_sha256": urdf_sha256},
                              source=source)


def load_plant(path: str | Path | None = None) -> ReplayPlant:
    """The plant from a YAML file ``{joints: [...], mechanism: {kind: ...}}`` or ``{urdf: FILE,
    actuators: {...}}``; None or "" gives the package's default plant
    (:data:`DEFAULT_PLANT_FILE`). A relative URDF name is looked up beside the YAML file, then
    among the package's data files."""
    path = Path(path or default_plant_path())
    data = read_yaml(path)
    if isinstance(data, dict) and "urdf" in data:
        extra = sorted(set(data) - {"urdf", "actuators"})
        if extra:
            raise InvalidInputError(f"{path}: unknown field(s) {extra} beside 'urdf'")
        return plant_from_urdf(_urdf_path(data["urdf"], path), data.get("actuators"),
                               source=f"{path}: actuators")
    return model_from_mapping(ReplayPlant, data, source=str(path))
