"""Composition features: Magpie statistics, stoichiometry norms, valence orbitals, ionicity.

All features mirror the composition attributes of L. Ward, A. Agrawal, A. Choudhary and
C. Wolverton, "A general-purpose machine learning framework for predicting properties
of inorganic materials", npj Comput. Mater. 2, 16028 (2016), as implemented in matminer
(``ElementProperty.from_preset("magpie")``, ``Stoichiometry``, ``ValenceOrbital``,
``IonProperty``), which is the reference the tests compare against. They are computed
with numpy over the whole table at once.

Element data are the Magpie element tables that matminer ships
(``matminer/utils/data_files/magpie_elementdata/*.table``), read from the installed
matminer package at run time (nothing is copied into prescreen). matminer is
distributed under a BSD-style licence (Copyright (c) 2015, The Regents of the University
of California, through Lawrence Berkeley National Laboratory; see the ``LICENSE`` file
of the matminer distribution). Missing values are imputed by the mean over the 118
elements, as matminer's ``MagpieData(impute_nan=True)`` does.
"""

from __future__ import annotations

import importlib.util
from functools import lru_cache
from pathlib import Path

import numpy as np

from prescreen.errors import PrescreenError
from prescreen.featurise.base import FeatureBatch, FeatureBlock
from prescreen.featurise.formula import MAX_Z

__all__ = [
    "WARD_2016",
    "MAGPIE_PROPERTIES",
    "MAGPIE_STATS",
    "STOICHIOMETRY_P",
    "ORBITALS",
    "magpie_data_dir",
    "magpie_table",
    "magpie_statistics",
    "MagpieFeaturiser",
    "StoichiometryFeaturiser",
    "ValenceOrbitalFeaturiser",
    "IonicCharacterFeaturiser",
]

WARD_2016 = (
    "L. Ward, A. Agrawal, A. Choudhary, C. Wolverton, A general-purpose machine learning "
    "framework for predicting properties of inorganic materials, npj Comput. Mater. 2, "
    "16028 (2016), doi:10.1038/npjcompumats.2016.28"
)
MATMINER = (
    "L. Ward et al., Matminer: An open source toolkit for materials data mining, "
    "Comput. Mater. Sci. 152, 60-69 (2018) (Magpie element tables)"
)

#: The 22 element properties of matminer's "magpie" preset, in its order.
MAGPIE_PROPERTIES: tuple[str, ...] = (
    "Number", "MendeleevNumber", "AtomicWeight", "MeltingT", "Column", "Row",
    "CovalentRadius", "Electronegativity", "NsValence", "NpValence", "NdValence",
    "NfValence", "NValence", "NsUnfilled", "NpUnfilled", "NdUnfilled", "NfUnfilled",
    "NUnfilled", "GSvolume_pa", "GSbandgap", "GSmagmom", "SpaceGroupNumber",
)
#: The six statistics of the preset, in its order.
MAGPIE_STATS: tuple[str, ...] = ("minimum", "maximum", "range", "mean", "avg_dev", "mode")
#: p of the stoichiometry p-norms (Ward et al. 2016, Table 1; matminer's default).
STOICHIOMETRY_P: tuple[int, ...] = (0, 2, 3, 5, 7, 10)
ORBITALS: tuple[str, ...] = ("s", "p", "d", "f")
#: Relative and absolute tolerance for ties of the largest fraction in the "mode"
#: statistic (numpy.isclose defaults, as matminer's PropertyStats.mode uses).
MODE_RTOL, MODE_ATOL = 1e-5, 1e-8
#: Ionic character of a pair, I = 1 - exp(-(dX)^2 / 4) with dX the Pauling
#: electronegativity difference (L. Pauling, The Nature of the Chemical Bond, 1960;
#: as used by Ward et al. 2016). This is the 1/4 factor.
IONIC_EXPONENT = 0.25


def magpie_data_dir() -> Path:
    """Folder of the Magpie element tables inside the installed matminer package."""
    spec = importlib.util.find_spec("matminer")
    if spec is None or not spec.submodule_search_locations:
        raise PrescreenError("matminer is not installed; it provides the Magpie element tables "
                             "(pip install matminer)")
    folder = Path(list(spec.submodule_search_locations)[0]) / "utils" / "data_files" / "magpie_elementdata"
    if not folder.is_dir():
        raise PrescreenError(f"Magpie element tables not found in {folder}")
    return folder


@lru_cache(maxsize=None)
def magpie_table(names: tuple[str, ...] = MAGPIE_PROPERTIES) -> np.ndarray:
    """Element property table with NaNs imputed by the mean over Z = 1-118.

    Parameters
    ----------
    names
        Magpie property names (file stems of the ``.table`` files).

    Returns
    -------
    numpy.ndarray
        ``(119, len(names))``; row ``Z`` holds element ``Z``, row 0 (padding) is 0.
        Read-only.
    """
    folder = magpie_data_dir()
    table = np.zeros((MAX_Z + 1, len(names)))
    for j, name in enumerate(names):
        lines = (folder / f"{name}.table").read_text().splitlines()
        col = np.full(MAX_Z, np.nan)
        for z in range(1, MAX_Z + 1):
            try:
                col[z - 1] = float(lines[z - 1])
            except (ValueError, IndexError):
                pass
        col[np.isnan(col)] = np.nanmean(col)
        table[1:, j] = col
    table.setflags(write=False)
    return table


def _weights(amount: np.ndarray) -> np.ndarray:
    """Row-normalised fractions, ``(n, k)``; rows with no atoms give zeros."""
    total = amount.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(total > 0, amount / np.where(total > 0, total, 1.0), 0.0)
    return w


def magpie_statistics(z: np.ndarray, amount: np.ndarray, table: np.ndarray) -> np.ndarray:
    """Composition-weighted statistics of element properties, vectorised.

    Parameters
    ----------
    z
        ``(n, k)`` atomic numbers, 0 = padding.
    amount
        ``(n, k)`` atoms per formula, 0 = padding.
    table
        ``(119, p)`` element properties.

    Returns
    -------
    numpy.ndarray
        ``(n, p, 6)``: minimum, maximum, range, mean, mean absolute deviation, mode
        (value of the most abundant element, the smallest value on ties), as in
        matminer's ``PropertyStats``. Rows without atoms are NaN.
    """
    n, k = z.shape
    mask = amount > 0
    valid = mask.any(axis=1)
    total = amount.sum(axis=1)
    inv_total = 1.0 / np.where(valid, total, 1.0)
    w = amount * inv_total[:, None]  # (n, k) fractions
    top = amount.max(axis=1)
    tie = mask & (np.abs(amount - top[:, None]) <= MODE_ATOL + MODE_RTOL * np.abs(top)[:, None])
    # padding rows (Z = 0) that drop out of min / max without masking
    t_lo, t_hi = _padded_tables(table)
    z_tie = np.where(tie, z, 0)
    lo = t_lo[z[:, 0]]
    hi = t_hi[z[:, 0]]
    mode = t_lo[z_tie[:, 0]]
    for j in range(1, k):
        np.minimum(lo, t_lo[z[:, j]], out=lo)
        np.maximum(hi, t_hi[z[:, j]], out=hi)
        np.minimum(mode, t_lo[z_tie[:, j]], out=mode)
    t_zero = np.array(table, dtype=float)
    t_zero[0] = 0.0  # padding contributes nothing to the weighted sums
    x = t_zero[z]  # (n, k, p)
    mean = np.matmul(w[:, None, :], x)[:, 0, :]
    dev = np.matmul(w[:, None, :], np.abs(x - mean[:, None, :]))[:, 0, :]
    out = np.stack([lo, hi, hi - lo, mean, dev, mode], axis=2)
    out[~valid] = np.nan
    return out


def _padded_tables(table: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Copies of ``table`` whose padding row is +inf (for minima) and -inf (for maxima)."""
    t_lo = np.array(table, dtype=float)
    t_hi = t_lo.copy()
    t_lo[0] = np.inf
    t_hi[0] = -np.inf
    return t_lo, t_hi


class MagpieFeaturiser:
    """Magpie composition statistics, identical to matminer's magpie preset (132 features).

    Feature ``"magpie {stat} {property}"`` for each of the 22 properties of
    :data:`MAGPIE_PROPERTIES` and the 6 statistics of :data:`MAGPIE_STATS`, in matminer's
    order (property-major).
    """

    name = "magpie"
    version = "1"

    def feature_names(self) -> list[str]:
        return [f"magpie {s} {p}" for p in MAGPIE_PROPERTIES for s in MAGPIE_STATS]

    def citations(self) -> list[str]:
        return [WARD_2016, MATMINER]

    def compute(self, batch: FeatureBatch) -> FeatureBlock:
        p = batch.parsed
        stats = magpie_statistics(p.z, p.amount, magpie_table())
        values = stats.reshape(len(p.z), -1)
        return FeatureBlock(values=values, errors=np.full(len(p.z), None, dtype=object))


class StoichiometryFeaturiser:
    """Stoichiometric p-norms ``(sum_i x_i^p)^(1/p)`` of the atomic fractions x_i.

    p = 0 gives the number of elements (Ward et al. 2016; matminer ``Stoichiometry``).
    Independent of how the formula is scaled (FeO = Fe2O2 = Fe0.5O0.5).
    """

    name = "stoichiometry"
    version = "1"

    def __init__(self, p_list: tuple[int, ...] = STOICHIOMETRY_P) -> None:
        self.p_list = tuple(p_list)

    def feature_names(self) -> list[str]:
        return [f"stoich {p}-norm" for p in self.p_list]

    def citations(self) -> list[str]:
        return [WARD_2016]

    def compute(self, batch: FeatureBatch) -> FeatureBlock:
        amount = batch.parsed.amount
        w = _weights(amount)
        valid = (amount > 0).any(axis=1)
        cols = []
        for p in self.p_list:
            if p == 0:
                cols.append((amount > 0).sum(axis=1).astype(float))
            else:
                cols.append((w**p).sum(axis=1) ** (1.0 / p))
        values = np.stack(cols, axis=1) if cols else np.zeros((len(amount), 0))
        values[~valid] = np.nan
        return FeatureBlock(values=values, errors=np.full(len(amount), None, dtype=object))


class ValenceOrbitalFeaturiser:
    """Fraction of the valence electrons in s, p, d and f orbitals.

    ``mean(N_o valence) / mean(N valence)`` with composition weights and Magpie
    ``N{o}Valence`` data (Ward et al. 2016; matminer ``ValenceOrbital``, ``frac`` part).
    """

    name = "valence_orbital"
    version = "1"

    def feature_names(self) -> list[str]:
        return [f"valence frac {o}" for o in ORBITALS]

    def citations(self) -> list[str]:
        return [WARD_2016]

    def compute(self, batch: FeatureBatch) -> FeatureBlock:
        p = batch.parsed
        names = tuple(f"N{o}Valence" for o in ORBITALS) + ("NValence",)
        x = magpie_table(names)[p.z]  # (n, k, 5)
        w = _weights(p.amount)
        mean = np.einsum("nk,nkp->np", w, x)
        valid = (p.amount > 0).any(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            values = mean[:, :4] / mean[:, 4:5]
        values[~valid] = np.nan
        return FeatureBlock(values=values, errors=np.full(len(w), None, dtype=object))


class IonicCharacterFeaturiser:
    """Electronegativity spread and ionic character (Magpie Pauling electronegativity).

    Features
    --------
    ``ionic max character``
        max over element pairs of ``1 - exp(-(X_i - X_j)^2 / 4)`` (0 for one element).
    ``ionic mean character``
        ``sum_{i<j} x_i x_j I_ij`` over distinct pairs, as matminer ``IonProperty``
        computes it (Ward et al. 2016 write the sum over all ordered pairs, twice this).
    ``electronegativity std``
        composition-weighted (population) standard deviation of X. matminer's
        ``PropertyStats.std_dev`` applies a reliability-weight correction that depends on
        how the formula is scaled (FeO vs Fe2O2); that is deliberately not mirrored.
    """

    name = "ionic_character"
    version = "1"

    def feature_names(self) -> list[str]:
        return ["ionic max character", "ionic mean character", "electronegativity std"]

    def citations(self) -> list[str]:
        return [WARD_2016, "L. Pauling, The Nature of the Chemical Bond, 3rd ed. (Cornell, 1960)"]

    def compute(self, batch: FeatureBatch) -> FeatureBlock:
        p = batch.parsed
        mask = p.amount > 0
        valid = mask.any(axis=1)
        chi = magpie_table(("Electronegativity",))[p.z][:, :, 0]  # (n, k)
        w = _weights(p.amount)
        hi = np.where(mask, chi, -np.inf).max(axis=1)
        lo = np.where(mask, chi, np.inf).min(axis=1)
        max_char = 1.0 - np.exp(-IONIC_EXPONENT * (hi - lo) ** 2)
        d = chi[:, :, None] - chi[:, None, :]
        pair = 1.0 - np.exp(-IONIC_EXPONENT * d**2)
        mean_char = 0.5 * np.einsum("ni,nj,nij->n", w, w, pair)
        mu = (w * chi).sum(axis=1)
        std = np.sqrt((w * (chi - mu[:, None]) ** 2).sum(axis=1))
        values = np.stack([max_char, mean_char, std], axis=1)
        values[~valid] = np.nan
        return FeatureBlock(values=values, errors=np.full(len(w), None, dtype=object))
