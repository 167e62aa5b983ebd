"""Safety flags for candidates containing toxic or radioactive elements.

The flags are a prompt to check local safety rules before anyone makes or handles a
material; they are not a hazard assessment. A composition alone cannot tell oxidation
state (Cr(III) and Cr(VI) differ greatly), so the flags err on the side of asking.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = [
    "RADIOACTIVE_ELEMENTS",
    "TOXIC_ELEMENTS",
    "SAFETY_NOTE",
    "hazard_flags",
    "hazard_text",
]

#: Elements with no stable isotope: Tc, Pm and every element from Po (Z = 84) on.
#: Source: IUPAC/CIAAW, "Atomic weights of the elements" (elements without stable
#: isotopes have no standard atomic weight). Bi (Z = 83) is left out: its only primordial
#: isotope, 209Bi, has a half-life of about 2e19 years (Marcillac et al., Nature 422, 876
#: (2003)), so it is treated as stable in practice.
RADIOACTIVE_ELEMENTS: frozenset[str] = frozenset(
    ["Tc", "Pm", "Po", "At", "Rn", "Fr", "Ra", "Ac", "Th", "Pa", "U", "Np", "Pu",
     "Am", "Cm", "Bk", "Cf", "Es", "Fm", "Md", "No", "Lr"]
)

#: Elements whose compounds are commonly restricted as toxic or carcinogenic.
#: Pb, Hg, Cd and Cr (hexavalent): restricted by the EU RoHS Directive 2011/65/EU.
#: As, Be, Ni and Cd compounds: IARC Group 1 carcinogens (from memory).
#: Tl: acutely toxic, flagged by common practice.
TOXIC_ELEMENTS: frozenset[str] = frozenset(["Pb", "Hg", "Cd", "Cr", "As", "Be", "Ni", "Tl"])

SAFETY_NOTE = (
    "Flags mark elements that are toxic or radioactive in common forms; they defer to "
    "your institution's safety rules and are not a hazard assessment."
)


def hazard_flags(elements: Iterable[str]) -> tuple[str, ...]:
    """Return the sorted hazard flags for a set of element symbols.

    Parameters
    ----------
    elements
        Element symbols of one candidate (duplicates are fine).

    Returns
    -------
    tuple of str
        Zero or more of ``"toxic"`` and ``"radioactive"``, sorted.
    """
    present = set(elements)
    flags = []
    if present & RADIOACTIVE_ELEMENTS:
        flags.append("radioactive")
    if present & TOXIC_ELEMENTS:
        flags.append("toxic")
    return tuple(sorted(flags))


def hazard_text(elements: Iterable[str]) -> str:
    """Human-readable flag text naming the offending elements, or ``""``."""
    present = set(elements)
    parts = []
    tox = sorted(present & TOXIC_ELEMENTS)
    rad = sorted(present & RADIOACTIVE_ELEMENTS)
    if tox:
        parts.append("toxic: " + ",".join(tox))
    if rad:
        parts.append("radioactive: " + ",".join(rad))
    return "; ".join(parts)
