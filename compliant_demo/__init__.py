"""compliant_demo: kinesthetic demonstrations on compliant, variable-stiffness joints.

Record demonstrations with a stiffness estimate, keep them in a queryable store, learn dynamic
movement primitives with stiffness profiles, and check the learned skill in perturbed simulation
of the target joint. The core modules never import rclpy; ROS 2 adapters live in
``compliant_demo.nodes``.
"""

# First import: numba's compiled-function cache must go to a per-user directory, never into the
# installed package, and numba reads NUMBA_CACHE_DIR once, when it is imported.
import compliant_demo._numba_cache  # noqa: F401
from compliant_demo.exceptions import (
    CompliantDemoError,
    InvalidInputError,
    NotFoundError,
    SchemaVersionError,
    StoreError,
)

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "CompliantDemoError",
    "InvalidInputError",
    "NotFoundError",
    "SchemaVersionError",
    "StoreError",
]
