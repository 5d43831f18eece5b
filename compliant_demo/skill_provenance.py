"""What a skill records about its making: demonstrations, alignment, fit quality, clamping.

Kept apart from the primitives themselves (:mod:`compliant_demo.primitives` re-exports both
records), so the record a store keeps can grow without touching the numerics.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from compliant_demo import __version__

__all__ = ["ClampedStretch", "Provenance"]


class ClampedStretch(BaseModel):
    """A stretch of the skill where the teacher's stiffness lay outside the target's range;
    times in the skill's own (demonstrated) time, s from its start."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)

    joint: str = Field(..., min_length=1)
    from_s: float = Field(..., ge=0, description="First sample outside the range, s.")
    to_s: float = Field(..., ge=0, description="Last sample outside the range, s.")
    teacher_stiffness: float = Field(..., description="The teacher's extreme there, N*m/rad.")
    clamped_to: float = Field(..., gt=0, description="The bound commanded instead, N*m/rad.")

    @model_validator(mode="after")
    def _ordered(self) -> ClampedStretch:
        if self.to_s < self.from_s:
            raise ValueError(f"to_s = {self.to_s} is before from_s = {self.from_s}")
        return self


class Provenance(BaseModel):
    """Where a skill came from: demonstrations, alignment, fit quality, software version."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    demonstration_ids: list[str] = Field(default_factory=list)
    n_demonstrations: int = Field(1, ge=1)
    alignment: dict[str, Any] = Field(
        default_factory=dict, description="Summary of the time alignment (method, band, costs)."
    )
    stiffness_source: Literal["recorded", "variability", "constant"] = "recorded"
    n_basis: int = Field(..., ge=2)
    fit_rmse: list[float] = Field(
        ...,
        description="Position RMSE per joint of the primitive (rolled out from the mean start to "
        "the mean goal over the demonstrated duration) against the mean of the aligned "
        "demonstrations on their common time base, rad.",
    )
    demo_spread_rmse: list[float] | None = Field(
        None,
        description="RMS spread per joint of the aligned demonstrations about their mean, rad "
        "(None for one demonstration); RMSE against each demonstration is "
        "sqrt(fit_rmse^2 + demo_spread_rmse^2).",
    )
    stiffness_fit_rmse: list[float] | None = Field(
        None, description="RMSE of the learned stiffness per joint, N*m/rad."
    )
    formulation_choice: list[dict[str, Any]] | None = Field(
        None, description="Per joint: the DMP form, whether the criterion or an override chose "
        "it, and the criterion's figures (see compliant_demo.generalisation)."
    )
    teacher_stiffness_clamped: list[ClampedStretch] | None = Field(
        None, description="Stretches where the teacher's stiffness (recorded, or from the "
        "demonstrations' variability) lay outside the target's range and was clamped to it; "
        "None for skills learned before this was recorded."
    )
    package_version: str = __version__
    created_utc: str = Field(default_factory=lambda: datetime.now(UTC).isoformat())
