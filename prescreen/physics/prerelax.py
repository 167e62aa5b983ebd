"""A starting geometry from a universal interatomic potential, for the DFT relaxation.

The plane-wave relaxation (:func:`prescreen.physics.dft.relax_monolayer_pw`) decides the
geometry; this module only chooses where it starts. A prototype's generated geometry lies
a median of 5 % off in the in-plane lattice, about ten BFGS steps of plane-wave DFT away.
A universal potential relaxes the same layer in about a second and lands near the DFT
minimum (a median of a few per cent off, ``benchmarks/relax_uip.py``), so the DFT
relaxation started there needs fewer steps (``benchmarks/relax_start.py``).

The potential is CHGNet (``uip`` extra: ``chgnet`` and ``torch``; its weights ship in its
wheel, nothing is downloaded). Any ASE calculator works in :func:`prerelax_monolayer`.

Two rules keep the start from steering the DFT result:

* The start keeps the generated geometry's space group (ASE's ``FixSymmetry``). A DFT
  relaxation from a symmetric start keeps its symmetry, because its forces and stress are
  symmetric; the potential's single-precision forces are not quite, and a start broken
  by ~1e-5 A would leave GPAW fewer symmetries (more k-points) and the DFT free to fall
  into a lower-symmetry minimum that the generated start would not reach.
* A start that falls apart, or whose in-plane lattice moved by more than
  ``max_strain``, is not used: the DFT relaxation then starts from the generated
  geometry, and the record says why.
"""

from __future__ import annotations

import contextlib
import functools
import io
import time
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable

import numpy as np

from prescreen.errors import PrescreenError

if TYPE_CHECKING:  # pragma: no cover
    from pymatgen.core import Structure

__all__ = ["PRERELAX_FMAX", "PRERELAX_STEPS", "PRERELAX_MAX_STRAIN", "PRERELAX_SYMPREC",
           "MissingPotential", "StartGeometry", "potential_calculator", "potential_name",
           "prerelax_monolayer"]

#: Force tolerance of the potential's relaxation (eV/Angstrom). The DFT relaxation does the
#: rest, so a loose one does (our choice).
PRERELAX_FMAX = 0.05
#: Largest number of FIRE steps; a start that has not converged by then is still used.
PRERELAX_STEPS = 300
#: Largest change of an in-plane length (log strain) that a start may bring; beyond it
#: the potential is taken to have moved the layer to another phase, the generated
#: geometry is kept (our choice: ``relax_uip.py`` counts 10 % as a change of phase
#: against the DFT lattice, the DFT relaxations moved the generated lattice by up to 29 %).
PRERELAX_MAX_STRAIN = 0.15
#: Tolerance of the symmetry search (Angstrom) for ``FixSymmetry``. The generated
#: geometries are exactly symmetric, so a tight one finds their full space group.
PRERELAX_SYMPREC = 1e-4
#: How to install the potential, for the errors that say it is missing.
_INSTALL = "install the 'uip' extra: pip install -e '.[uip]' (CHGNet and a CPU build of PyTorch)"


class MissingPotential(PrescreenError, ImportError):
    """The universal potential's package is not installed."""


@dataclass
class StartGeometry:
    """Where a DFT relaxation starts, and how it was chosen.

    ``structure`` is the start; ``used`` says whether it is the potential's (False: the
    generated geometry, for the reason in ``note``). ``strain`` holds the potential's log
    strain of ``a`` and ``b``, ``steps`` its number of FIRE steps, ``seconds`` its time,
    ``converged`` whether FIRE reached its force tolerance, ``residual`` the largest
    generalised force left (eV/Angstrom, the cell's included, as FIRE judged it), and
    ``refusal`` why the potential's geometry was not used: "" (used), "fell_apart" or
    "strain".
    """

    structure: "Structure"
    used: bool
    note: str
    strain: list[float] = field(default_factory=list)
    steps: int = 0
    seconds: float = 0.0
    converged: bool = True
    residual: float = float("nan")
    refusal: str = ""

    def record_fields(self) -> dict[str, Any]:
        """The fields a relaxation record keeps of its start."""
        return {"start": self.note, "start_strain": [round(float(x), 6) for x in self.strain],
                "start_steps": int(self.steps), "start_s": round(float(self.seconds), 2)}


def potential_name() -> str:
    """Name and version of the potential that :func:`potential_calculator` loads."""
    try:
        from importlib.metadata import version

        return f"CHGNet {version('chgnet')}"
    except Exception as exc:  # PackageNotFoundError and friends
        raise MissingPotential(f"the universal potential is not installed ({exc}); {_INSTALL}") from exc


@functools.lru_cache(maxsize=1)
def potential_calculator() -> Any:
    """CHGNet as an ASE calculator on one CPU thread (its weights ship in its wheel),
    loaded once per process.

    Raises :class:`MissingPotential`, naming the extra, when CHGNet or PyTorch is not
    installed."""
    potential_name()
    try:
        import torch
        from chgnet.model import CHGNet
        from chgnet.model.dynamics import CHGNetCalculator
    except ImportError as exc:
        raise MissingPotential(f"the universal potential cannot be imported ({exc}); {_INSTALL}") from exc
    torch.set_num_threads(1)
    with contextlib.redirect_stdout(io.StringIO()):  # "CHGNet v... initialized", "will run on cpu"
        return CHGNetCalculator(model=CHGNet.load(verbose=False), use_device="cpu")


def prerelax_monolayer(structure: "Structure", calc: Any, *,
                       name: str = "the potential",
                       fmax: float = PRERELAX_FMAX, steps: int = PRERELAX_STEPS,
                       max_strain: float = PRERELAX_MAX_STRAIN,
                       symprec: float = PRERELAX_SYMPREC,
                       check_layer: Callable[["Structure"], str] | None = None,
                       ) -> StartGeometry:
    """Relax ``structure``'s positions and in-plane cell with ``calc``, within its space
    group, as a start for the DFT relaxation.

    The in-plane strain (xx, yy, xy) and the positions move, the out-of-plane cell vector
    stays (ASE's ``FrechetCellFilter`` with the DFT relaxation's mask; FIRE to ``fmax``).

    Parameters
    ----------
    structure
        The generated monolayer (pymatgen ``Structure``).
    calc
        An ASE calculator (:func:`potential_calculator` for CHGNet).
    name
        The potential's name for the record (:func:`potential_name`).
    fmax, steps
        FIRE's force tolerance (eV/Angstrom) and largest number of steps.
    max_strain
        Largest absolute log strain of ``a`` or ``b`` accepted.
    symprec
        Symmetry tolerance (Angstrom) of ``FixSymmetry``.
    check_layer
        Returns "" for an intact monolayer, else the reason it is not; None: not checked.

    Returns
    -------
    StartGeometry
        The start and a note: the potential's geometry, or ``structure`` itself with the
        reason the potential's was not used.
    """
    from ase.constraints import FixSymmetry
    from ase.filters import FrechetCellFilter
    from ase.optimize import FIRE
    from pymatgen.io.ase import AseAtomsAdaptor

    atoms = AseAtomsAdaptor.get_atoms(structure)
    atoms.calc = calc
    atoms.set_constraint(FixSymmetry(atoms, symprec=symprec))
    t0 = time.perf_counter()
    cell_filter = FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1])
    opt = FIRE(cell_filter, logfile=None)
    with warnings.catch_warnings():  # CHGNet's own, at every step: its stress, and the
        # constraint that its conversion to pymatgen leaves out (the forces it returns are
        # symmetrised by the constraint all the same)
        warnings.filterwarnings("ignore", message="Converting a tensor with requires_grad")
        warnings.filterwarnings("ignore", message="Only FixAtoms and FixCartesian")
        converged = bool(opt.run(fmax=fmax, steps=steps))
    seconds = time.perf_counter() - t0
    residual = float(np.sqrt((cell_filter.get_forces() ** 2).sum(axis=1).max()))
    atoms.set_constraint()
    atoms.calc = None
    moved = AseAtomsAdaptor.get_structure(atoms)
    strain = np.log(np.asarray(moved.lattice.abc[:2]) / np.asarray(structure.lattice.abc[:2]))
    how = (f"{name} (FixSymmetry, FIRE to {fmax:g} eV/A"
           + (f", {opt.nsteps} step{'' if opt.nsteps == 1 else 's'})" if converged
              else f", not converged in {steps} steps)"))
    common = {"strain": strain.tolist(), "steps": int(opt.nsteps), "seconds": seconds,
              "converged": converged, "residual": residual}
    broke = check_layer(moved) if check_layer is not None else ""
    if broke:
        return StartGeometry(structure, False, f"generated; not {how}: it {broke}",
                             refusal="fell_apart", **common)
    if float(np.max(np.abs(strain))) > max_strain:
        return StartGeometry(structure, False,
                             f"generated; not {how}: in-plane strain "
                             f"{', '.join(f'{x:+.3f}' for x in strain)} beyond "
                             f"{max_strain:g}", refusal="strain", **common)
    return StartGeometry(moved, True, how, **common)
