"""Read a serial arm from a URDF file with Pinocchio into our own chain record.

Pinocchio parses the URDF (joints, placements, link inertias with fixed children merged,
position, effort and velocity limits, ``<dynamics>`` damping and friction); what the simulator
needs is copied into a :class:`compliant_demo.models.ChainParams`, a plain record that the
compiled kernel of :mod:`compliant_demo.sim.rigid_body` reads and that campaigns store as JSON.
Pinocchio is imported only here and only when a URDF is read.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from xml.etree import ElementTree

import numpy as np

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import BodyParams, ChainParams
from compliant_demo.sim.integrate import GRAVITY

__all__ = ["UrdfJoint", "read_urdf", "pinocchio_model"]

_AXES = {"JointModelRX": (1.0, 0.0, 0.0), "JointModelRY": (0.0, 1.0, 0.0),
         "JointModelRZ": (0.0, 0.0, 1.0)}


@dataclass(frozen=True)
class UrdfJoint:
    """What the URDF says about one joint besides its dynamics.

    lower_limit, upper_limit : rad; effort_limit : N*m; velocity_limit : rad/s;
    damping : viscous, N*m*s/rad; friction : Coulomb, N*m.
    """

    name: str
    lower_limit: float
    upper_limit: float
    effort_limit: float
    velocity_limit: float
    damping: float
    friction: float


def pinocchio_model(path: str | Path):  # -> pinocchio.Model (untyped library)
    """The Pinocchio model of a URDF file, gravity set to standard gravity along -z.

    Raises InvalidInputError naming the file when it cannot be read or parsed.
    """
    import pinocchio as pin

    path = Path(path)
    if not path.is_file():
        what = "a directory, not a file" if path.is_dir() else "no such file"
        raise InvalidInputError(f"urdf = {str(path)!r}: {what}")
    try:
        model = pin.buildModelFromUrdf(str(path))
    except (ValueError, RuntimeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InvalidInputError(f"urdf = {str(path)!r}: not a readable URDF: {first}") from None
    model.gravity.linear = np.array([0.0, 0.0, -GRAVITY])
    return model


def _check_every_joint_read(path: Path, read: set[str]) -> None:
    """Refuse a file whose moving joints Pinocchio did not all take: it builds the tree from
    one root link and drops, without a word, joints on a loop or on a second tree."""
    try:
        root = ElementTree.parse(path).getroot()
    except ElementTree.ParseError as exc:
        raise InvalidInputError(f"urdf = {str(path)!r}: not a readable URDF: {exc}") from None
    moving = [str(joint.get("name")) for joint in root.iter("joint")
              if joint.get("type") != "fixed"]
    dropped = [name for name in moving if name not in read]
    if dropped:
        raise InvalidInputError(
            f"urdf = {str(path)!r}: joint(s) {dropped} do not hang from the root link's tree "
            "(a loop of links, or a second tree); only one serial chain is simulated"
        )


def _vector(values) -> tuple[float, float, float]:
    x, y, z = (float(v) for v in values)
    return x, y, z


def _axis(joint, name: str, path: Path) -> tuple[float, float, float]:
    kind = joint.shortname()
    if kind in _AXES:
        return _AXES[kind]
    if kind == "JointModelRevoluteUnaligned":
        return _vector(joint.extract().axis)
    raise InvalidInputError(
        f"urdf = {str(path)!r}: joint {name!r} is {kind}; only revolute joints with limits are "
        "simulated (a continuous joint needs limits)"
    )


def read_urdf(path: str | Path) -> tuple[ChainParams, list[UrdfJoint]]:
    """The chain and per-joint limits of a serial arm of revolute joints in a URDF file.

    Parameters
    ----------
    path : URDF file

    Returns
    -------
    chain : ChainParams, base to tip
    joints : UrdfJoint per joint, same order

    Raises
    ------
    InvalidInputError
        The file is missing or unreadable, a joint is not revolute, the joints do not form one
        serial chain from the base, or a moving link has no mass.
    """
    path = Path(path)
    model = pinocchio_model(path)
    _check_every_joint_read(path, {str(name) for name in model.names})
    bodies, joints = [], []
    for index in range(1, model.njoints):
        name = str(model.names[index])
        if model.parents[index] != index - 1:
            raise InvalidInputError(
                f"urdf = {str(path)!r}: joint {name!r} hangs from joint "
                f"{model.names[model.parents[index]]!r}; only a serial chain is simulated"
            )
        axis = _axis(model.joints[index], name, path)
        inertia = model.inertias[index]
        if not inertia.mass > 0:
            raise InvalidInputError(
                f"urdf = {str(path)!r}: the link moved by joint {name!r} has mass "
                f"{inertia.mass}; every moving link needs a positive mass"
            )
        placement = model.jointPlacements[index]
        rot = np.asarray(inertia.inertia, dtype=float)
        bodies.append(BodyParams(
            joint=name,
            placement_xyz=_vector(placement.translation),
            placement_rotation=tuple(float(x) for x in np.asarray(placement.rotation).ravel()),
            axis=axis,
            mass=float(inertia.mass),
            com=_vector(inertia.lever),
            inertia=(rot[0, 0], rot[0, 1], rot[0, 2], rot[1, 1], rot[1, 2], rot[2, 2]),
            velocity_limit=float(model.velocityLimit[index - 1]),
        ))
        v = index - 1
        joints.append(UrdfJoint(
            name=name,
            lower_limit=float(model.lowerPositionLimit[v]),
            upper_limit=float(model.upperPositionLimit[v]),
            effort_limit=float(model.effortLimit[v]),
            velocity_limit=float(model.velocityLimit[v]),
            damping=float(model.damping[v]),
            friction=float(model.friction[v]),
        ))
    if not bodies:
        raise InvalidInputError(f"urdf = {str(path)!r}: no moving joint")
    # the end effector: the last frame fixed to the last moving link (a tool link on a fixed
    # joint), else that link's own frame at the joint origin
    tip = [f for f in model.frames if f.parentJoint == model.njoints - 1][-1]
    chain = ChainParams(bodies=tuple(bodies), gravity=_vector(model.gravity.linear),
                        source=path.name, tip_xyz=_vector(tip.placement.translation))
    return chain, joints
