"""Descriptors of candidates: composition, spin-orbit and monolayer-structure features.

Use :func:`featurise` for a table; :func:`schema_version` identifies the feature schema
(store it with anything built from the features).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Sequence

from prescreen.featurise.base import (
    ERROR_COLUMN,
    FeatureBatch,
    FeatureBlock,
    Featuriser,
    default_featurisers,
    featurise,
    schema_version,
)
from prescreen.featurise.composition import (
    IonicCharacterFeaturiser,
    MagpieFeaturiser,
    StoichiometryFeaturiser,
    ValenceOrbitalFeaturiser,
)
from prescreen.featurise.formula import ParsedFormulas, parse_formulas, parse_one
from prescreen.featurise.spinorbit import SpinOrbitFeaturiser
from prescreen.featurise.structure import MonolayerStructureFeaturiser

if TYPE_CHECKING:  # pragma: no cover - typing only
    import pandas as pd

    from prescreen.candidate import Candidate

__all__ = [
    "ERROR_COLUMN",
    "FeatureBatch",
    "FeatureBlock",
    "Featuriser",
    "default_featurisers",
    "featurise",
    "schema_version",
    "featurise_candidates",
    "MagpieFeaturiser",
    "StoichiometryFeaturiser",
    "ValenceOrbitalFeaturiser",
    "IonicCharacterFeaturiser",
    "SpinOrbitFeaturiser",
    "MonolayerStructureFeaturiser",
    "ParsedFormulas",
    "parse_formulas",
    "parse_one",
]


def featurise_candidates(
    candidates: Sequence[Candidate],
    *,
    featurisers: Sequence[Featuriser] | None = None,
    progress: bool = True,
    n_jobs: int = 1,
) -> pd.DataFrame:
    """Featurise :class:`prescreen.candidate.Candidate` records (see :func:`featurise`).

    Parameters
    ----------
    candidates
        Sequence of ``Candidate``; ``formula`` and ``structure`` are used.

    Returns
    -------
    pandas.DataFrame
        Indexed by candidate ``id``, feature columns then ``error``.
    """
    candidates = list(candidates)
    frame = featurise([c.formula for c in candidates], [c.structure for c in candidates],
                      featurisers=featurisers, progress=progress, n_jobs=n_jobs)
    frame.index = [c.id for c in candidates]
    return frame
