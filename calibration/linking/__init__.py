"""Links between calibration cycles: characteristic-curve constants, the scale transformation, drift tests.

The orchestration (which items are common, the purification rounds, the fixed-parameter fit) is
``calibration.pipeline.link``; these are the numerical steps, on plain arrays and parameters.
"""

from calibration.linking.curves import LINK_GRID, LinkingConstants, characteristic_curve_constants, rescale
from calibration.linking.drift import DriftTest, PublishedItem, drift_tests

__all__ = [
    "LINK_GRID",
    "DriftTest",
    "LinkingConstants",
    "PublishedItem",
    "characteristic_curve_constants",
    "drift_tests",
    "rescale",
]
