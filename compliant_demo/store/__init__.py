"""The demonstration store: demonstrations, skills and replay results in one SQLite file.

``DemoStore`` is the Python API for scripts and nodes; ``compliant_demo.store.io`` and
``compliant_demo.store.bags`` import and export CSV, NPZ and ROS 2 bag files. The file layout is
documented in the README ("Demonstration store") so that other languages can read it.
"""

from compliant_demo.store._schema import SCHEMA_VERSION
from compliant_demo.store._sql import folder_writable as store_folder_writable
from compliant_demo.store.core import DemoStore
from compliant_demo.store.records import (
    CampaignInfo,
    CampaignProgress,
    Demonstration,
    DemonstrationInfo,
    MergeConflict,
    MergeReport,
    ReplayParameters,
    ReplayResult,
    ReplayResultInfo,
    SkillRecord,
    VerdictRecord,
)

__all__ = [
    "SCHEMA_VERSION",
    "store_folder_writable",
    "DemoStore",
    "Demonstration",
    "DemonstrationInfo",
    "SkillRecord",
    "CampaignInfo",
    "CampaignProgress",
    "ReplayParameters",
    "ReplayResultInfo",
    "ReplayResult",
    "MergeConflict",
    "MergeReport",
    "VerdictRecord",
]
