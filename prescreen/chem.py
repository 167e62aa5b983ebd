"""Small chemistry helpers shared by the store and the readers: formula keys."""

from __future__ import annotations

from functools import lru_cache

from prescreen.errors import InputError

__all__ = ["formula_keys"]


@lru_cache(maxsize=200_000)
def formula_keys(formula: str) -> tuple[str, str, tuple[str, ...]]:
    """Reduced formula, chemical system and sorted element symbols of a formula.

    Parameters
    ----------
    formula
        A chemical formula such as ``"Mo2S4"`` or ``"Bi"``.

    Returns
    -------
    tuple
        ``(reduced_formula, chemsys, elements)``, e.g. ``("MoS2", "Mo-S", ("Mo", "S"))``,
        with pymatgen's conventions (``Composition.reduced_formula`` and
        ``Composition.chemical_system``).

    Raises
    ------
    InputError
        When the formula cannot be parsed or has no atoms.
    """
    import warnings

    from pymatgen.core import Composition

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            comp = Composition(formula)
    except (ValueError, KeyError, TypeError) as exc:
        raise InputError("cannot parse formula", value=formula,
                         expected="a formula of element symbols and amounts, e.g. MoS2") from exc
    if comp.num_atoms <= 0:
        raise InputError("formula has no atoms", value=formula, expected="e.g. MoS2")
    elements = tuple(sorted(el.symbol for el in comp.elements))
    return comp.reduced_formula, comp.chemical_system, elements
