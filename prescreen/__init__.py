"""prescreen: budget-aware screening of two-dimensional candidates for high spin-orbit spillage.

Keep this module light: ``import prescreen`` must not pull in LightGBM, SHAP or matminer.
"""

from __future__ import annotations

__version__ = "0.1.0"

#: Spillage at or above which a candidate counts as a hit (a likely band inversion).
#: Common practice in spillage screening; not derived from a published bound.
SPILLAGE_THRESHOLD: float = 0.5

__all__ = ["__version__", "SPILLAGE_THRESHOLD"]
