"""The Z2 invariant of a centrosymmetric monolayer from DFT parity eigenvalues.

A high spillage hints at a band inversion; an invariant says whether the inversion is
topological. For layers with an inversion centre and time-reversal symmetry (no
magnetism), Fu and Kane, Phys. Rev. B 76, 045302 (2007), showed that

    (-1)^nu = prod_i delta_i,    delta_i = prod_m xi_2m(Gamma_i),

over the four time-reversal-invariant momenta Gamma_i of the 2D Brillouin zone, where
xi_2m = +-1 is the parity eigenvalue of the m-th occupied Kramers pair. This module
computes it at the labeller's level of theory (:mod:`prescreen.physics.dft`: GPAW LCAO,
PBE, dzp, spin-orbit coupling added non-self-consistently):

1. spglib finds the inversion ``r -> -r + t`` (within :data:`SYMPREC_A`); each atom
   ``a`` maps onto an atom ``P(a)`` of the same species, ``t - tau_a = tau_P(a) + L_a``
   with a lattice vector ``L_a``. The atoms are moved to make the inversion exact and
   wrapped into the cell as GPAW reads them, and the ``L_a`` are taken in that frame
   (checked against GPAW's positions after the calculation).
2. A ground state with GPAW's symmetry reduction on an even Gamma-centred mesh, which
   contains the four TRIMs (0, 0), (1/2, 0), (0, 1/2), (1/2, 1/2); the direct gap with
   SOC is checked over the whole (unfolded) mesh. Then one non-self-consistent run
   (GPAW's ``fixed_density``, no symmetry) at the four TRIMs gives the states whose
   parities are counted: symmetry-reduced states may be rotated images of each other,
   which the inversion matrix below does not allow for.
3. In GPAW's Bloch sums ``Phi_Mk(r) = sum_R exp(i k.R) phi_M(r - tau_a - R)`` an atomic
   orbital of angular momentum ``l`` has parity ``(-1)^l``, so at a TRIM the inversion
   acts on the LCAO basis as ``D[(P(a), mu), (a, mu)] = (-1)^l exp(2 pi i k.L_a)``. Its
   matrix in the states without SOC is ``P = C* S D C^T`` (coefficients ``C_nM``,
   overlap ``S_MM``), and in the spinor states with SOC ``V* (P (x) 1_2) V^T`` with the
   eigenvectors ``V`` of :func:`gpaw.spinorbit.soc_eigenstates` (basis ``2 j + s``, as in
   :mod:`prescreen.physics.dft`). Its eigenvalues over the occupied states are +-1 in
   pairs; ``delta_i = (-1)^(N_minus / 2)``.

The eigenvalues are checked: they must lie within :data:`PARITY_TOL` of +-1 and the
minus signs must come in pairs, else the result is refused (a basis-convention or
degeneracy problem, never a silent guess). The method needs an insulator with spin-orbit
coupling at every TRIM; metals and magnetic settings are refused with the reason (a
spin-paired run of a layer that is really magnetic is not detected here). Layers
without an inversion centre need Wilson loops (:mod:`prescreen.physics.wilson`)
instead.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from prescreen.errors import InputError, LabellingError, NoDirectGap
from prescreen.physics.dft import (
    METAL_GAP_EV,
    LabelSettings,
    _formula,
    _gpaw_calculator,
    _one_thread,
    _run_in,
    choose_kpts,
    code_versions,
    direct_band_gap,
    in_lcao,
    kramers_occupied,
    prepare_monolayer,
)

if TYPE_CHECKING:  # pragma: no cover - typing only
    from ase import Atoms
    from pymatgen.core import Structure

__all__ = ["PARITY_TOL", "SYMPREC_A", "TRIMS", "Inversion", "ParityZ2", "inversion_map",
           "even_mesh", "z2_from_parities"]

#: Largest distance of a computed parity eigenvalue from +-1 accepted (dimensionless).
#: Exact symmetry gives 0; the LCAO basis is mapped onto itself, so deviations come
#: from finite SCF convergence only. Chosen here (numerical tolerance).
PARITY_TOL: float = 1e-3

#: The four time-reversal-invariant momenta of a 2D Brillouin zone (fractional).
TRIMS: tuple[tuple[float, float, float], ...] = (
    (0.0, 0.0, 0.0), (0.5, 0.0, 0.0), (0.0, 0.5, 0.0), (0.5, 0.5, 0.0))

#: Symmetry tolerance (Angstrom) for finding the inversion centre with spglib. Relaxed
#: structures break a symmetry they started with by far less; the inversion is then made
#: exact (:func:`inversion_map`), so this only decides what counts as centrosymmetric.
#: Common practice for relaxed structures.
SYMPREC_A: float = 1e-2


def even_mesh(kmesh: tuple[int, int, int]) -> tuple[int, int, int]:
    """In-plane sizes rounded up to even numbers, so that the mesh holds every TRIM.

    A size divisible by 3 stays divisible by 3 (9 becomes 12, not 10), so a hexagonal
    mesh keeps its K points: the smallest direct gap of a Dirac layer is there.
    """
    def up(n: int) -> int:
        if n % 2 == 0:
            return n
        return n + 3 if n % 3 == 0 else n + 1

    n1, n2, n3 = (int(n) for n in kmesh)
    return (up(n1), up(n2), n3)


@dataclass(frozen=True)
class ParityZ2:
    """The Z2 invariant of one monolayer from parities at the TRIMs.

    Attributes
    ----------
    id, formula
        Identifier and reduced formula.
    z2
        0 (trivial) or 1 (quantum spin Hall insulator).
    delta
        ``delta_i`` (+1 or -1) at each TRIM, in the order of :data:`TRIMS`.
    n_minus
        Occupied spinor states of odd parity at each TRIM.
    parity_error
        Largest distance of a parity eigenvalue from +-1 (see :data:`PARITY_TOL`).
    direct_gap_soc_eV
        Smallest direct gap with SOC over the mesh between the occupied and the empty
        states (the invariant belongs to the occupied states; the layer can still be a
        semimetal if bands overlap between different k).
    kmesh
        The mesh of the ground state and of the gap check (even in-plane); the parities
        come from a separate run at the four TRIMs.
    inversion_centre
        ``t / 2`` in fractional coordinates: the point the inversion fixes. The
        individual ``delta`` depend on which centre is chosen; the product does not.
    symmetrised_by_A
        Largest displacement (Angstrom) applied to make the inversion exact.
    settings, versions, wall_s
        Level of theory, code versions, wall time (s).
    """

    id: str | None
    formula: str
    z2: int
    delta: tuple[int, int, int, int]
    n_minus: tuple[int, int, int, int]
    parity_error: float
    direct_gap_soc_eV: float
    kmesh: tuple[int, int, int]
    inversion_centre: tuple[float, float, float]
    symmetrised_by_A: float
    settings: dict[str, Any] = field(repr=False)
    versions: dict[str, str] = field(repr=False)
    wall_s: float = 0.0


@dataclass(frozen=True)
class Inversion:
    """An inversion centre of a structure, made exact.

    Attributes
    ----------
    atoms : ase.Atoms
        The structure with each atom moved onto the mean of itself and its partner's
        image (so the inversion is exact) and wrapped into the cell, as GPAW will read
        it (``get_scaled_positions()``).
    t : ndarray, shape (3,)
        Fractional translation of the inversion ``x -> -x + t``.
    partner : ndarray of int, shape (n_atoms,)
        ``partner[a]`` is the atom that ``a`` is mapped onto (same species).
    shift : ndarray of int, shape (n_atoms, 3)
        Lattice vectors ``L_a`` (fractional) with ``-x_a + t = x_partner[a] + L_a`` for the
        wrapped positions ``x`` of ``atoms``.
    max_move_A : float
        Largest displacement (Angstrom) the symmetrisation applied.
    """

    atoms: Any
    t: np.ndarray
    partner: np.ndarray
    shift: np.ndarray
    max_move_A: float


def _partners(x: np.ndarray, numbers: np.ndarray, t: np.ndarray,
              cell: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Partner, lattice shift and distance (Angstrom) of each atom's inverted image."""
    partner = np.empty(len(x), dtype=int)
    shift = np.empty((len(x), 3), dtype=int)
    dist = np.empty(len(x))
    for a in range(len(x)):
        diff = (-x[a] + t)[None, :] - x
        nearest = np.rint(diff)
        d = np.linalg.norm((diff - nearest) @ cell, axis=1)
        d[numbers != numbers[a]] = np.inf
        b = int(np.argmin(d))
        partner[a], shift[a], dist[a] = b, nearest[b].astype(int), d[b]
    return partner, shift, dist


def inversion_map(atoms: "Atoms", symprec: float = SYMPREC_A) -> Inversion:
    """Find the inversion of a structure and make it exact.

    spglib looks for an operation with rotation ``-1`` within ``symprec`` Angstrom; each
    atom and its partner are then moved symmetrically (onto the mean of the atom and the
    partner's image), and the positions wrapped into the cell the way GPAW reads them,
    so that the lattice shifts ``L_a`` are those of GPAW's Bloch sums.

    Raises
    ------
    InputError
        If the structure has no inversion centre within ``symprec``.
    """
    import spglib

    cell = np.asarray(atoms.cell)
    numbers = atoms.get_atomic_numbers()
    x = atoms.get_scaled_positions(wrap=False)
    data = spglib.get_symmetry_dataset((cell, x, numbers), symprec=symprec)
    found = None if data is None else next(
        (t for r, t in zip(data.rotations, data.translations)
         if np.array_equal(r, -np.eye(3, dtype=int))), None)
    if found is None:
        raise InputError("the structure has no inversion centre", value=_formula(atoms),
                         expected=f"a centrosymmetric layer within {symprec:g} A for the "
                         "parity method (use Wilson loops otherwise)")
    t = np.asarray(found, dtype=float)
    partner, shift, dist = _partners(x, numbers, t, cell)
    if sorted(partner) != list(range(len(atoms))) or dist.max() > 2 * symprec:
        raise InputError("the inversion spglib found does not map the atoms onto each other",
                         value=f"{_formula(atoms)}: largest mismatch {dist.max():.2e} A",
                         expected=f"a one-to-one map within {2 * symprec:g} A")
    # x_a <- mean of x_a and the image of its partner, -x_b + t - L_b (L_b = L_a)
    sym = 0.5 * (x + (-x[partner] + t - shift[partner]))
    moved = float(np.linalg.norm((sym - x) @ cell, axis=1).max())
    out = atoms.copy()
    out.set_scaled_positions(sym)
    out.wrap()
    out.set_scaled_positions(out.get_scaled_positions())  # exactly what GPAW will read
    w = out.get_scaled_positions()
    partner2, shift2, dist2 = _partners(w, numbers, t, cell)
    if not np.array_equal(partner2, partner) or dist2.max() > 1e-8:
        raise InputError("symmetrising the inversion failed", value=f"{_formula(atoms)}: "
                         f"residual {dist2.max():.2e} A", expected="an exact inversion")
    return Inversion(atoms=out, t=t, partner=partner2, shift=shift2, max_move_A=moved)


def _centre(t: np.ndarray) -> tuple[float, float, float]:
    """The point ``t / 2`` the inversion fixes, in [0, 1) without -0 or 1 - 1e-16."""
    c = np.round(np.mod(np.asarray(t, dtype=float) / 2, 1.0), 12) % 1.0
    return tuple(float(v) + 0.0 for v in c)


def _basis_layout(setups: Any) -> list[tuple[int, int, int]]:
    """(atom, radial function J, l) of every LCAO basis function M, in GPAW's order."""
    layout = []
    for a, setup in enumerate(setups):
        for j, spline in enumerate(setup.basis_functions_J):
            layout += [(a, j, spline.l)] * (2 * spline.l + 1)
    return layout


def _inversion_in_basis(layout: list[tuple[int, int, int]], partner: np.ndarray,
                        shift: np.ndarray, k_c: np.ndarray) -> np.ndarray:
    """Matrix D of the inversion on the Bloch sums at a TRIM ``k_c`` (fractional)."""
    first: dict[tuple[int, int], int] = {}
    for M, (a, j, _) in enumerate(layout):
        first.setdefault((a, j), M)
    D = np.zeros((len(layout), len(layout)), dtype=complex)
    for M, (a, j, ell) in enumerate(layout):
        m = M - first[(a, j)]
        target = first[(int(partner[a]), j)] + m
        D[target, M] = (-1) ** ell * np.exp(2j * np.pi * float(np.dot(k_c, shift[a])))
    return D


def z2_from_parities(structure: "Structure | Atoms", settings: LabelSettings = LabelSettings(),
                     *, id: str | None = None, workdir: Path | None = None) -> ParityZ2:
    """Compute the Z2 invariant of a centrosymmetric, non-magnetic insulating monolayer.

    Parameters
    ----------
    structure
        The monolayer (pymatgen ``Structure`` or ``ase.Atoms``), relaxed or as given.
    settings
        Level of theory (:class:`~prescreen.physics.dft.LabelSettings`); the mesh is the
        settings' mesh with each in-plane size rounded up to an even number. ``spinpol``
        must be False.
    id
        Identifier carried into the result.
    workdir
        Folder for GPAW's log; a temporary folder when None.

    Returns
    -------
    ParityZ2

    Raises
    ------
    InputError
        No inversion centre, or magnetic settings.
    LabellingError
        GPAW failed, the layer is a metal with SOC (no gap at some k), or the parity
        eigenvalues are not +-1 within :data:`PARITY_TOL`.
    """
    if settings.spinpol:
        raise InputError("the parity method needs time-reversal symmetry", value="spinpol=True",
                         expected="a non-magnetic calculation (spinpol=False)")
    t0 = time.perf_counter()
    settings = in_lcao(settings)  # the parities are taken from LCAO coefficients
    inversion = inversion_map(prepare_monolayer(structure, settings.vacuum_A))
    atoms, partner, shift = inversion.atoms, inversion.partner, inversion.shift
    formula = _formula(atoms)
    name = id or formula
    kmesh = even_mesh(choose_kpts(atoms, settings))
    try:
        from gpaw.spinorbit import soc_eigenstates
    except ImportError as exc:
        raise LabellingError(f"{name}: GPAW is not importable; install it with "
                             "`bash scripts/install_gpaw.sh .venv` (or `make dft-env`)") from exc
    trims = np.array(TRIMS, dtype=float)
    with _run_in(workdir) as folder, _one_thread():
        try:
            calc = _gpaw_calculator(settings, kmesh, folder / "gpaw-parity.txt", False)
            atoms.calc = calc
            atoms.get_potential_energy()
            n_electrons = float(calc.get_number_of_electrons())
            # The gap over the whole mesh, SOC states unfolded from the reduced zone.
            e_mesh = soc_eigenstates(calc, scale=settings.soc_scale).eigenvalues()
            nscf = calc.fixed_density(kpts=trims, symmetry="off",
                                      txt=str(folder / "gpaw-parity-trims.txt"))
            soc = soc_eigenstates(nscf, scale=settings.soc_scale)
            v_kmn = soc.eigenvectors()  # [k, SOC state m, basis 2 j + s]
            e_trim = soc.eigenvalues()
            kpts = np.asarray(nscf.get_bz_k_points(), dtype=float)
            wfs_by_k = {int(w.k): (w.C_nM.data.copy(), w.S_MM.data.copy())
                        for w in nscf.dft.ibzwfs}
            layout = _basis_layout(nscf.dft.setups)
            relpos = np.asarray(nscf.dft.relpos_ac, dtype=float)
        except Exception as exc:  # GPAW raises many types; keep the cause
            raise LabellingError(f"{name}: GPAW calculation failed: "
                                 f"{type(exc).__name__}: {exc}") from exc
    if not np.allclose(relpos, atoms.get_scaled_positions(), atol=1e-10):
        raise LabellingError(f"{name}: GPAW placed the atoms elsewhere than the inversion map "
                             "assumed; no invariant is given")
    if kpts.shape != trims.shape or len(wfs_by_k) != len(trims):
        raise LabellingError(f"{name}: expected the four TRIMs without symmetry reduction, "
                             f"got {len(wfs_by_k)} states at {kpts.shape[0]} k points")
    n_occ = kramers_occupied(name, n_electrons)
    gap = min(direct_band_gap(e_mesh, n_occ), direct_band_gap(e_trim, n_occ))
    if gap < METAL_GAP_EV:
        raise NoDirectGap(f"{name}: no direct gap with spin-orbit coupling at some k "
                          f"(smallest {gap:.3f} eV < {METAL_GAP_EV} eV): the occupied "
                          "states, and so the invariant, are not defined", gap)
    deltas, minus, worst = [], [], 0.0
    for trim in TRIMS:
        offset = np.abs(((kpts - np.asarray(trim)) + 0.5) % 1.0 - 0.5).sum(axis=1)
        k = int(np.argmin(offset))
        if offset[k] > 1e-8:
            raise LabellingError(f"{name}: GPAW did not return the TRIM {trim} (got k points "
                                 f"{kpts.tolist()})")
        C, S = wfs_by_k[k]
        D = _inversion_in_basis(layout, partner, shift, np.asarray(trim))
        P = C.conj() @ S @ D @ C.T  # inversion in the states without SOC
        V = v_kmn[k, :n_occ, :]
        M = V.conj() @ np.kron(P, np.eye(2)) @ V.T
        xi = np.linalg.eigvalsh(0.5 * (M + M.conj().T))
        worst = max(worst, float(np.max(np.abs(np.abs(xi) - 1.0))))
        n_minus = int(np.sum(xi < 0))
        if worst > PARITY_TOL or n_minus % 2:
            raise LabellingError(
                f"{name}: parity eigenvalues at k = {trim[:2]} are not +-1 in Kramers pairs "
                f"(largest deviation {worst:.2e}, {n_minus} negative); the basis mapping or "
                "the convergence is in doubt, so no invariant is given")
        deltas.append(-1 if (n_minus // 2) % 2 else 1)
        minus.append(n_minus)
    z2 = 0 if int(np.prod(deltas)) == 1 else 1
    sdict = settings.as_dict()
    sdict.update(kmesh=list(kmesh), mode="lcao", nbands="nao",
                 symmetry="ground state reduced; TRIM states unreduced")
    return ParityZ2(id=id, formula=formula, z2=z2, delta=tuple(deltas), n_minus=tuple(minus),
                    parity_error=worst, direct_gap_soc_eV=gap, kmesh=kmesh,
                    inversion_centre=_centre(inversion.t),
                    symmetrised_by_A=inversion.max_move_A, settings=sdict,
                    versions=code_versions(), wall_s=time.perf_counter() - t0)
