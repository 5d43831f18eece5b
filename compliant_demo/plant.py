"""The simulated target of a replay: its joints and its variable-stiffness mechanism.

One plant description serves every replay (the replay node, ``compliant-demo replay``, campaigns,
the report and the tour). Without a file the package's default plant is used everywhere: the
cork_seat bench arm on antagonistic spring pairs (``config/joint_cork_seat_antagonistic.yaml``),
the mechanism a real variable-stiffness joint of that kind has, with no damping input.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field

from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import (
    IdealImpedanceParams,
    JointParams,
    MechanismParams,
    load_yaml_model,
)
from compliant_demo.resources import package_file

__all__ = ["DEFAULT_PLANT_FILE", "ReplayPlant", "default_plant_path", "load_plant"]

#: The plant every command, node and the tour use when none is given (in ``config/``).
DEFAULT_PLANT_FILE = "joint_cork_seat_antagonistic.yaml"


class ReplayPlant(BaseModel):
    """The simulated target: one JointParams per joint and the shared mechanism."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    joints: tuple[JointParams, ...] = Field(..., min_length=1, description="Target joints.")
    mechanism: MechanismParams = Field(
        default_factory=lambda: IdealImpedanceParams.model_validate({}),
        description="Variable-stiffness mechanism.",
    )

    def for_joints(self, names: Sequence[str]) -> list[JointParams]:
        """The joint records for ``names``, in that order; InvalidInputError if one is missing."""
        by_name = {joint.name: joint for joint in self.joints}
        missing = [name for name in names if name not in by_name]
        if missing:
            raise InvalidInputError(
                f"plant joints {sorted(by_name)} lack {missing} that the skill moves"
            )
        return [by_name[name] for name in names]

    def describe(self) -> str:
        """One line for summaries: joints and mechanism kind."""
        names = ", ".join(joint.name for joint in self.joints)
        return f"{self.mechanism.kind} mechanism on joints {names}"


def default_plant_path() -> Path:
    """Path of the package's default plant file (see :data:`DEFAULT_PLANT_FILE`)."""
    return package_file("config", DEFAULT_PLANT_FILE)


def load_plant(path: str | Path | None = None) -> ReplayPlant:
    """The plant from a YAML file ``{joints: [...], mechanism: {kind: ...}}``; None or "" gives
    the package's default plant (:data:`DEFAULT_PLANT_FILE`)."""
    return load_yaml_model(ReplayPlant, path or default_plant_path())
