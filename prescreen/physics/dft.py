"""One DFT spin-orbit spillage calculation with GPAW: a monolayer in, a record out.

Method
------
1. The monolayer is turned so that its plane is the xy plane, and its cell is rebuilt
   with the out-of-plane vector along z and :attr:`LabelSettings.vacuum_A` of vacuum
   between periodic images (non-periodic along z).
2. An LCAO ground state (GPAW, ``mode='lcao'``, PBE, dzp basis, ``nbands='nao'``,
   Fermi–Dirac smearing) on a uniform Gamma-centred k mesh. Hexagonal cells get meshes
   with N divisible by 3, so that the K points belong to the mesh (a mesh that misses K
   gives a false negative for a Dirac-point inversion such as stanene's).
3. Spin-orbit coupling added non-self-consistently with
   :func:`gpaw.spinorbit.soc_eigenstates`. Its eigenvectors ``v_kmn`` are written in the
   basis of the states without SOC, spin-interleaved in GPAW 26.x: basis index
   ``2 j + s`` is band ``j`` of spin ``s`` (see ``WaveFunction.wavefunctions`` and
   ``extract_ibz_wave_functions`` in ``gpaw/spinorbit.py``). Since that basis is
   orthonormal, ``<psi_(2j+s)|psi~_m> = v_kmn[k, m, 2j+s]`` and the overlap the spillage
   needs is the transpose of that matrix; nothing is projected again.
4. Occupations from the Fermi level of each calculation at every k
   (:func:`prescreen.physics.spillage.occupations_at_fermi_level` with the smearing
   width), then gamma(k) by :func:`prescreen.physics.spillage.spillage_from_overlap`
   (Liu and Vanderbilt, Phys. Rev. B 90, 125133 (2014)).

Magnetism: by default the ground state is spin-paired (non-magnetic). With
``spinpol=True`` it is collinear spin-polarised from a ferromagnetic start and SOC is
added with the spin axis along z (out of plane); antiferromagnetic orders that need a
supercell, non-collinear magnets and self-consistent SOC are not handled.
"""

from __future__ import annotations

import math
import tempfile
import time
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from prescreen import __version__ as PRESCREEN_VERSION
from prescreen.errors import InputError, LabellingError

if TYPE_CHECKING:  # pragma: no cover - typing only
    from ase import Atoms
    from pymatgen.core import Structure

__all__ = [
    "DEFAULT_VACUUM_A",
    "DEFAULT_KPT_DENSITY",
    "LabelSettings",
    "LabelRecord",
    "prepare_monolayer",
    "choose_kpts",
    "is_hexagonal",
    "band_gap",
    "direct_band_gap",
    "kramers_occupied",
    "label_structure",
    "relax_monolayer",
    "relax_monolayer_pw",
    "in_lcao",
    "label_cutoff_eV",
    "honeycomb_monolayer",
]

#: Total vacuum (Angstrom) between a monolayer and its periodic image along z.
#: Common practice for LCAO monolayer calculations (10-20 A); not from a published bound.
DEFAULT_VACUUM_A: float = 15.0

#: k-point density (points per reciprocal Angstrom, |b| including the 2 pi): each
#: in-plane mesh size is at least ``density * |b_i|`` (rounded up to a multiple of 3 on
#: hexagonal cells, so that K is on the mesh). 5.0 gives 9x9 for buckled Bi/Sn/Ge
#: honeycombs, 12x12 for MoS2 and 15x15 for graphene and hBN. Common practice, not
#: from a published bound.
DEFAULT_KPT_DENSITY: float = 5.0

#: Smallest in-plane mesh size accepted (points).
MIN_KPTS: int = 3

#: Tolerances (dimensionless / degrees) for calling an in-plane lattice hexagonal, so
#: that its mesh keeps K. Loose on purpose: a slightly strained hexagonal cell still has
#: its smallest direct gap near K, and a mesh that is a multiple of 3 costs nothing
#: (chosen here; 1e-3 and 0.1 degree missed K for stanene strained by 0.15 %).
HEX_LENGTH_RTOL: float = 1e-2
HEX_ANGLE_TOL_DEG: float = 0.5

#: Smallest empty gap (Angstrom) along the normal that marks the input as a slab;
#: common practice (a bonded layer has no gap above ~4 A inside it).
MIN_SLAB_GAP_A: float = 5.0

#: Gaps below this (eV) count as metallic; the smearing scale of the default settings.
METAL_GAP_EV: float = 0.02

#: GPAW's default real-space grid spacing (Angstrom) in LCAO mode (its
#: ``gpaw.utilities.gpts.get_number_of_grid_points``: 0.2 A, points divisible by 4).
DEFAULT_GRID_SPACING_A: float = 0.2

#: Default residual-force tolerance for :func:`relax_monolayer` (eV/Angstrom),
#: common practice for structure relaxations before band-structure work.
DEFAULT_FMAX_EV_PER_A: float = 0.05


@dataclass(frozen=True)
class LabelSettings:
    """Level of theory of one spillage calculation.

    Attributes
    ----------
    basis
        GPAW LCAO basis-set name (``"dzp"``: double-zeta polarised, shipped in
        ``gpaw-data``); used when ``mode`` is ``"lcao"``.
    xc
        Exchange-correlation functional (``"PBE"``).
    kpts
        Explicit Gamma-centred mesh ``(n1, n2, 1)``; ``None`` derives it from
        ``kpt_density``. An explicit mesh for a hexagonal cell must have n1 = n2
        divisible by 3 (so it contains K).
    kpt_density
        Points per reciprocal Angstrom (|b_i| including 2 pi) when ``kpts`` is None.
    smearing_eV
        Fermi–Dirac width k_B T (eV), used for the ground state and for the occupations
        of the spillage.
    vacuum_A
        Total vacuum (Angstrom) between the layer and its periodic image.
    spinpol
        ``False``: spin-paired ground state. ``True``: collinear spin-polarised from a
        ferromagnetic start of ``initial_magmom_muB`` per atom, SOC axis along z.
    initial_magmom_muB
        Starting magnetic moment per atom (Bohr magnetons) when ``spinpol``.
    soc_scale
        Factor (dimensionless) on the spin-orbit term: 1 is physical; 0 switches SOC
        off, a check of the pipeline (the spillage must then vanish).
    mode
        ``"lcao"`` (the ``basis``; every Kohn-Sham state of the basis enters the SOC
        Hamiltonian) or ``"pw"``: plane waves, :data:`PW_LABEL_NBANDS` of the occupied
        count, all but the top :data:`PW_LABEL_UNCONVERGED` converged. The spillage does
        not depend on the basis (the states with SOC are written in the states without
        it); the band energies do (``benchmarks/label_basis.py``). The Z2 methods work
        from LCAO coefficients and always run in LCAO.
    ecut_eV
        Plane-wave cutoff (eV) when ``mode`` is ``"pw"``; None picks
        :func:`plane_wave_cutoff_eV` of the structure's elements (the dataset
        relaxation's choice). Must be None in LCAO mode.
    """

    basis: str = "dzp"
    xc: str = "PBE"
    kpts: tuple[int, int, int] | None = None
    kpt_density: float = DEFAULT_KPT_DENSITY
    smearing_eV: float = 0.01
    vacuum_A: float = DEFAULT_VACUUM_A
    spinpol: bool = False
    initial_magmom_muB: float = 1.0
    soc_scale: float = 1.0
    mode: str = "lcao"
    ecut_eV: float | None = None

    def __post_init__(self) -> None:
        if self.kpts is not None:
            k = tuple(int(x) for x in self.kpts)
            if len(k) != 3 or k[2] != 1 or min(k[:2]) < 1 or tuple(self.kpts) != k:
                raise InputError("kpts must be a 2D mesh", value=self.kpts,
                                 expected="(n1, n2, 1) with positive integers n1, n2")
            object.__setattr__(self, "kpts", k)
        for name, low in (("kpt_density", 0.0), ("smearing_eV", 0.0), ("vacuum_A", 5.0)):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and not isinstance(value, bool)
                    and math.isfinite(value) and value > low):
                raise InputError(f"LabelSettings.{name} out of range", value=value,
                                 expected=f"a finite number > {low}")
        if not isinstance(self.spinpol, bool):  # "no" would count as true
            raise InputError("LabelSettings.spinpol must be True or False", value=self.spinpol,
                             expected="a bool")
        if not (isinstance(self.initial_magmom_muB, (int, float))
                and not isinstance(self.initial_magmom_muB, bool)
                and math.isfinite(self.initial_magmom_muB)):
            raise InputError("LabelSettings.initial_magmom_muB must be a finite number",
                             value=self.initial_magmom_muB, expected="e.g. 1.0 (Bohr magnetons)")
        if not (math.isfinite(self.soc_scale) and self.soc_scale >= 0):
            raise InputError("LabelSettings.soc_scale out of range", value=self.soc_scale,
                             expected="a finite number >= 0 (1 = physical)")
        if not isinstance(self.basis, str) or not isinstance(self.xc, str):
            raise InputError("basis and xc must be strings", value=(self.basis, self.xc),
                             expected="e.g. basis='dzp', xc='PBE'")
        if self.mode not in ("lcao", "pw"):
            raise InputError("LabelSettings.mode unknown", value=self.mode,
                             expected="'lcao' or 'pw'")
        if self.ecut_eV is not None and (
                self.mode != "pw" or isinstance(self.ecut_eV, bool)
                or not isinstance(self.ecut_eV, (int, float))
                or not (math.isfinite(self.ecut_eV) and self.ecut_eV > 0)):
            raise InputError("LabelSettings.ecut_eV out of range", value=(self.mode, self.ecut_eV),
                             expected="None, or a cutoff > 0 eV with mode='pw'")

    def as_dict(self) -> dict[str, Any]:
        """JSON-friendly dictionary (``kpts`` as a list or None)."""
        d = asdict(self)
        d["kpts"] = None if self.kpts is None else list(self.kpts)
        return d

    def describe(self, *, mesh: bool = True) -> str:
        """The level of theory in words, e.g. for a report or a methods section.

        ``mesh=False`` leaves out the k mesh (for a calculation on a mesh of its own, such
        as the parity method's even mesh).
        """
        parts = [self.xc, f"GPAW LCAO {self.basis} basis" if self.mode == "lcao" else
                 "GPAW plane waves (" + (f"{self.ecut_eV:g} eV" if self.ecut_eV else
                                         "500 eV, 700 eV with N, O or F") + ")"]
        if mesh:
            parts.append(f"a {self.kpts[0]}x{self.kpts[1]} Gamma-centred k mesh"
                         if self.kpts is not None else
                         f"a Gamma-centred k mesh of {self.kpt_density:g} points per inverse "
                         "Angstrom")
        parts += [f"Fermi-Dirac width {self.smearing_eV:g} eV",
                  f"{self.vacuum_A:g} Angstrom vacuum",
                  f"collinear spin-polarised from {self.initial_magmom_muB:g} Bohr magnetons "
                  "per atom" if self.spinpol else "spin-paired"]
        if self.soc_scale == 0:
            parts.append("spin-orbit coupling switched off (soc_scale 0)")
        elif self.soc_scale == 1:
            parts.append("spin-orbit coupling added non-self-consistently")
        else:
            parts.append(f"spin-orbit coupling scaled by {self.soc_scale:g}, added "
                         "non-self-consistently")
        return ", ".join(parts)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "LabelSettings":
        """Inverse of :meth:`as_dict`; unknown keys are an error."""
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - names)
        if unknown:
            raise InputError("unknown label settings", value=unknown,
                             expected=f"keys among {sorted(names)}")
        d = dict(data)
        if d.get("kpts") is not None:
            d["kpts"] = tuple(d["kpts"])
        return cls(**d)


@dataclass(frozen=True, eq=False)
class LabelRecord:
    """Result (or failure) of one spillage calculation.

    Attributes
    ----------
    id
        The structure's identifier, or None.
    formula
        Reduced formula (e.g. ``"MoS2"``).
    spillage
        max_k gamma(k) (electrons, dimensionless); NaN when failed.
    k_max
        Shape (3,), fractional k of the maximum.
    gap_nosoc_eV, gap_soc_eV
        Band gaps (eV) without and with SOC on the mesh; 0 for metals.
    is_metal
        True if the calculation with SOC has no gap of at least 0.02 eV, or a non-integer
        electron count (a spin-paired odd count always lands here: Kramers pairs).
    magmom
        Total magnetic moment (Bohr magnetons per cell); 0 when spin-paired.
    settings
        The :class:`LabelSettings` as a dict plus the resolved ``kmesh``, ``mode``,
        ``nbands`` and ``occupations``.
    versions
        Code versions: ``gpaw``, ``ase``, ``prescreen``.
    wall_s
        Wall time (s) of the calculation.
    core_hours
        Cores times wall time (hours); every calculation runs on one core.
    cpu_s
        CPU time (s) the calculation used; below ``wall_s`` when the core was shared.
    direct_gap_soc_eV
        Smallest direct gap with SOC on the mesh (:func:`direct_band_gap`, eV); positive
        in a band-inverted semimetal too, where a Z2 invariant is still defined. NaN in
        records written before it was stored, and when failed.
    gamma
        Shape (nk,), gamma(k) on the full mesh (electrons).
    kpts
        Shape (nk, 3), fractional k points of ``gamma``.
    status
        ``"ok"`` or ``"failed"``.
    error
        Why it failed (``"Type: message"``), else None.
    """

    id: str | None
    formula: str
    spillage: float
    k_max: np.ndarray
    gap_nosoc_eV: float
    gap_soc_eV: float
    is_metal: bool
    magmom: float
    settings: dict[str, Any]
    versions: dict[str, str]
    wall_s: float
    core_hours: float
    gamma: np.ndarray = field(repr=False)
    kpts: np.ndarray = field(repr=False)
    status: str = "ok"
    error: str | None = None
    cpu_s: float = math.nan
    direct_gap_soc_eV: float = math.nan

    def __post_init__(self) -> None:
        if self.status not in ("ok", "failed"):
            raise InputError("unknown record status", value=self.status,
                             expected="'ok' or 'failed'")
        object.__setattr__(self, "k_max", np.asarray(self.k_max, dtype=float).reshape(3))
        gamma = np.asarray(self.gamma, dtype=float).reshape(-1)
        kpts = np.asarray(self.kpts, dtype=float).reshape(-1, 3)
        if gamma.shape[0] != kpts.shape[0]:
            raise InputError("gamma and kpts differ in length",
                             value=(gamma.shape, kpts.shape), expected="(nk,) and (nk, 3)")
        object.__setattr__(self, "gamma", gamma)
        object.__setattr__(self, "kpts", kpts)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @classmethod
    def failed(cls, id: str | None, formula: str, settings: LabelSettings | dict,
               error: str, wall_s: float = 0.0) -> "LabelRecord":
        """A record of a calculation that did not finish, with the reason."""
        sdict = settings.as_dict() if isinstance(settings, LabelSettings) else dict(settings)
        return cls(id=id, formula=formula, spillage=math.nan, k_max=np.full(3, np.nan),
                   gap_nosoc_eV=math.nan, gap_soc_eV=math.nan, is_metal=False,
                   magmom=math.nan, settings=sdict, versions=code_versions(),
                   wall_s=float(wall_s), core_hours=float(wall_s) / 3600.0,
                   gamma=np.zeros(0), kpts=np.zeros((0, 3)), status="failed", error=error)

    def as_dict(self, arrays: bool = True) -> dict[str, Any]:
        """JSON-friendly dict; ``arrays=False`` leaves out ``gamma`` and ``kpts``."""
        d: dict[str, Any] = {}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name in ("gamma", "kpts") and not arrays:
                continue
            if isinstance(value, np.ndarray):
                value = value.tolist()
            elif isinstance(value, float) and not math.isfinite(value):
                value = None  # JSON has no NaN
            d[f.name] = value
        if d["k_max"] is not None and any(x != x for x in d["k_max"]):
            d["k_max"] = None
        return d

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "LabelRecord":
        """Inverse of :meth:`as_dict` (missing arrays become empty)."""
        names = [f.name for f in fields(cls)]
        required = [n for n in names
                    if n not in ("gamma", "kpts", "status", "error", "cpu_s",
                                 "direct_gap_soc_eV")]
        missing = [n for n in required if n not in data]
        if missing:
            raise InputError("label record lacks keys", value=sorted(data),
                             expected=f"also {missing}")
        d = {n: data[n] for n in names if n in data}
        for key in ("spillage", "gap_nosoc_eV", "gap_soc_eV", "magmom", "cpu_s",
                    "direct_gap_soc_eV"):
            d[key] = math.nan if d.get(key) is None else float(d[key])
        d["k_max"] = np.full(3, np.nan) if d["k_max"] is None else d["k_max"]
        d.setdefault("gamma", np.zeros(0))
        d.setdefault("kpts", np.zeros((0, 3)))
        return cls(**d)


def code_versions() -> dict[str, str]:
    """Versions of GPAW (if importable), ASE and prescreen."""
    import ase

    try:
        import gpaw

        gpaw_version = gpaw.__version__
    except ImportError:
        gpaw_version = "not installed"
    return {"gpaw": gpaw_version, "ase": ase.__version__, "prescreen": PRESCREEN_VERSION}


def _to_atoms(structure: "Structure | Atoms") -> "Atoms":
    from ase import Atoms

    if isinstance(structure, Atoms):
        return structure.copy()
    try:
        from pymatgen.core import Structure
    except ImportError as exc:  # pragma: no cover - pymatgen is a core dependency
        raise InputError("cannot convert structure", value=type(structure).__name__,
                         expected="ase.Atoms") from exc
    if isinstance(structure, Structure):
        from pymatgen.io.ase import AseAtomsAdaptor

        atoms = AseAtomsAdaptor.get_atoms(structure)
        atoms.calc = None
        for key in list(atoms.arrays):  # drop site properties (magmom, ...)
            if key not in ("numbers", "positions"):
                del atoms.arrays[key]
        atoms.info.clear()
        return atoms
    raise InputError("unsupported structure type", value=type(structure).__name__,
                     expected="pymatgen Structure or ase.Atoms")


def _formula(atoms: "Atoms") -> str:
    from pymatgen.core import Composition

    return Composition(atoms.get_chemical_formula()).reduced_formula


def prepare_monolayer(structure: "Structure | Atoms", vacuum_A: float = DEFAULT_VACUUM_A,
                      *, name: str | None = None) -> "Atoms":
    """Return the monolayer in standard orientation with the requested vacuum.

    The first two lattice vectors span the layer; the result has ``a1`` along x, the
    layer in the xy plane, ``a3 = (0, 0, thickness + vacuum_A)``, the layer centred in
    z, and ``pbc = (True, True, False)``.

    Parameters
    ----------
    structure
        A monolayer with an empty gap of at least :data:`MIN_SLAB_GAP_A` along the
        normal; the lattice vector across the widest gap is taken as out of plane (the
        axes are relabelled cyclically when it is a1 or a2).
    vacuum_A
        Total vacuum (Angstrom) between the layer and its image.
    name
        Used in error messages.

    Raises
    ------
    InputError
        If the in-plane vectors are parallel, or the structure is not a slab (no empty
        gap along the normal).
    """
    from ase import Atoms

    atoms = _to_atoms(structure)
    where = name or _formula(atoms)
    axis = _vacuum_axis(atoms)
    if axis != 2:  # vacuum along a1 or a2: relabel the axes cyclically (same handedness)
        order = [(axis + 1) % 3, (axis + 2) % 3, axis]
        atoms = Atoms(numbers=atoms.numbers, cell=np.asarray(atoms.cell)[order],
                      scaled_positions=atoms.get_scaled_positions(wrap=True)[:, order],
                      pbc=True)
    cell = np.asarray(atoms.cell, dtype=float)
    a1, a2, a3 = cell
    normal = np.cross(a1, a2)
    area = np.linalg.norm(normal)
    if area < 1e-6:
        raise InputError("the first two lattice vectors are parallel", line=where,
                         value=cell.tolist(), expected="a layer spanned by a1 and a2")
    normal /= area
    period = abs(float(a3 @ normal))
    # Heights along the normal, folded into one period, and the largest empty gap.
    frac = atoms.get_scaled_positions(wrap=True)
    z = (frac[:, 2] * period) % period if period > 1e-6 else frac[:, 2] * 0.0
    zs = np.sort(z)
    gaps = np.diff(np.concatenate([zs, [zs[0] + period]]))
    i = int(np.argmax(gaps))
    if gaps[i] < MIN_SLAB_GAP_A:
        raise InputError("structure is not a monolayer slab: no vacuum gap along the normal",
                         line=where, value=round(float(gaps[i]), 3),
                         expected=f"an empty gap >= {MIN_SLAB_GAP_A} A along a3")
    bottom = zs[(i + 1) % len(zs)]
    height = (z - bottom) % period  # 0 at the lowest atom of the layer
    thickness = float(height.max())
    # New frame: x along a1, z along the normal, y completing a right-handed set.
    ex = a1 / np.linalg.norm(a1)
    ey = np.cross(normal, ex)
    rot = np.array([ex, ey, normal])
    new_a1, new_a2 = rot @ a1, rot @ a2
    new_a1[2] = new_a2[2] = 0.0
    c = thickness + float(vacuum_A)
    new_cell = np.array([new_a1, new_a2, [0.0, 0.0, c]])
    # Cartesian positions of one contiguous slab (each atom's image along a3 chosen so its
    # height is ``height``), turned into the new frame; a tilted a3 contributes its
    # in-plane part here, so bond lengths are kept.
    f3 = (height + bottom) / period if period > 1e-6 else frac[:, 2]
    cart = frac[:, :1] * a1 + frac[:, 1:2] * a2 + f3[:, None] * a3
    inplane = (cart @ rot.T)[:, :2]
    positions = np.column_stack([inplane, height + 0.5 * (c - thickness)])
    return Atoms(numbers=atoms.numbers, positions=positions, cell=new_cell,
                 pbc=(True, True, False))


def _vacuum_axis(atoms: "Atoms") -> int:
    """The lattice vector across the widest empty gap (Angstrom between lattice planes);
    ties go to a3, the usual vacuum axis."""
    cell = np.asarray(atoms.cell, dtype=float)
    if abs(np.linalg.det(cell)) < 1e-9:
        return 2
    spacing = 1.0 / np.linalg.norm(np.linalg.inv(cell).T, axis=1)  # between lattice planes
    frac = np.sort(atoms.get_scaled_positions(wrap=True), axis=0)
    gaps = np.diff(np.vstack([frac, frac[:1] + 1.0]), axis=0).max(axis=0) * spacing
    return int(np.argmax(gaps + np.array([0.0, 0.0, 1e-6])))


def is_hexagonal(cell: np.ndarray) -> bool:
    """True if the in-plane lattice (rows 0, 1 of ``cell``, Angstrom) is hexagonal."""
    a1, a2 = np.asarray(cell, dtype=float)[:2]
    l1, l2 = np.linalg.norm(a1), np.linalg.norm(a2)
    angle = math.degrees(math.acos(np.clip(a1 @ a2 / (l1 * l2), -1.0, 1.0)))
    return (abs(l1 - l2) <= HEX_LENGTH_RTOL * max(l1, l2)
            and min(abs(angle - 60.0), abs(angle - 120.0)) <= HEX_ANGLE_TOL_DEG)


def choose_kpts(atoms: "Atoms", settings: LabelSettings) -> tuple[int, int, int]:
    """Gamma-centred mesh ``(n1, n2, 1)`` for a prepared monolayer.

    Hexagonal cells get ``n1 = n2`` rounded up to a multiple of 3 so that K and K'
    lie on the mesh.

    Raises
    ------
    InputError
        If an explicit mesh for a hexagonal cell would miss K.
    """
    hexagonal = is_hexagonal(atoms.cell)
    if settings.kpts is not None:
        n1, n2, _ = settings.kpts
        if hexagonal and (n1 != n2 or n1 % 3):
            raise InputError("this k mesh misses the K point of a hexagonal cell",
                             line=_formula(atoms), value=settings.kpts,
                             expected="(n, n, 1) with n divisible by 3")
        return settings.kpts
    b = 2.0 * math.pi * np.linalg.norm(atoms.cell.reciprocal()[:2], axis=1)
    n = [max(MIN_KPTS, math.ceil(settings.kpt_density * bi - 1e-9)) for bi in b]
    if hexagonal:
        m = max(n)
        m = 3 * math.ceil(m / 3)
        n = [m, m]
    return (int(n[0]), int(n[1]), 1)


def _sorted_with_count(eigenvalues: np.ndarray,
                       n_electrons: float) -> tuple[np.ndarray, int | None]:
    """Eigenvalues sorted at each k, and the occupied-state count (None when the count
    is not an integer or leaves no occupied or no empty state)."""
    e = np.sort(np.asarray(eigenvalues, dtype=float), axis=1)
    n = int(round(n_electrons))
    if abs(n - n_electrons) > 1e-6 or n <= 0 or n >= e.shape[1]:
        return e, None
    return e, n


def band_gap(eigenvalues: np.ndarray, n_electrons: float) -> tuple[float, bool]:
    """Band gap on the mesh from spinor eigenvalues and the electron count.

    Parameters
    ----------
    eigenvalues
        Shape (nk, nstates), eV, one electron per state, sorted at each k.
    n_electrons
        Valence electrons per cell.

    Returns
    -------
    (gap_eV, is_metal)
        ``gap = min_k e[k, N] - max_k e[k, N - 1]``; a non-integer count or a gap below
        :data:`METAL_GAP_EV` gives ``(0.0, True)``.
    """
    e, n = _sorted_with_count(eigenvalues, n_electrons)
    if n is None:
        return 0.0, True
    gap = float(e[:, n].min() - e[:, n - 1].max())
    if gap < METAL_GAP_EV:
        return 0.0, True
    return gap, False


def direct_band_gap(eigenvalues: np.ndarray, n_electrons: float) -> float:
    """Smallest direct gap on the mesh between the occupied and the empty states.

    ``min_k (e[k, N] - e[k, N - 1])`` (eV) for ``N`` electrons, one per state (spinor
    eigenvalues). The occupied states are separated from the empty ones at every k, and a
    Z2 invariant of them is defined, when this is positive, even where the indirect gap
    (:func:`band_gap`) is closed, as in a band-inverted semimetal. A non-integer or
    out-of-range count gives 0.0: no set of occupied states exists then.
    """
    e, n = _sorted_with_count(eigenvalues, n_electrons)
    return 0.0 if n is None else float(np.min(e[:, n] - e[:, n - 1]))


def kramers_occupied(name: str, n_electrons: float) -> int:
    """The number of occupied spinor states of a time-reversal-symmetric layer.

    Raises
    ------
    LabellingError
        A non-integer electron count (no set of occupied states exists).
    NoDirectGap
        An odd count, with ``odd_count=True``: by Kramers' theorem the last occupied state
        meets its partner at the time-reversal-invariant momenta, so the occupied states,
        and a Z2 invariant of them, are not defined.
    """
    from prescreen.errors import NoDirectGap

    n_occ = int(round(n_electrons))
    if abs(n_occ - n_electrons) > 1e-6:
        raise LabellingError(f"{name}: {n_electrons:g} valence electrons; a time-reversal-"
                             "symmetric insulator needs an even number")
    if n_occ % 2:
        raise NoDirectGap(f"{name}: {n_occ} valence electrons, an odd number: the highest "
                          "occupied state and its Kramers partner meet at the time-reversal-"
                          "invariant momenta, so the occupied states, and the invariant, are "
                          "not defined", 0.0, odd_count=True)
    return n_occ


#: Bands of a plane-wave label, as a share of the occupied count (GPAW's notation), and
#: how many of the top ones are left unconverged (chosen here: SOC mixes the occupied
#: states mostly with the lowest empty ones).
PW_LABEL_NBANDS: str = "200%"
PW_LABEL_UNCONVERGED: int = 4


def in_lcao(settings: LabelSettings) -> LabelSettings:
    """``settings`` in LCAO mode (the rest kept): for the methods that need the LCAO
    coefficients (the Z2 invariants)."""
    return replace(settings, mode="lcao", ecut_eV=None)


def label_cutoff_eV(settings: LabelSettings, symbols: Sequence[str]) -> float | None:
    """The plane-wave cutoff of a label of these elements (None in LCAO mode)."""
    if settings.mode != "pw":
        return None
    return float(settings.ecut_eV) if settings.ecut_eV else plane_wave_cutoff_eV(symbols)


def _gpaw_calculator(settings: LabelSettings, kmesh: tuple[int, int, int],
                     txt: str | Path | None, magnetic: bool, *,
                     symbols: Sequence[str] = (), **extra: Any) -> Any:
    """GPAW in the mode of ``settings``; ``symbols`` pick a plane-wave cutoff left open."""
    from gpaw import GPAW, PW, FermiDirac

    if settings.mode == "pw":
        ecut = label_cutoff_eV(settings, symbols)
        basis = dict(mode=PW(ecut), nbands=PW_LABEL_NBANDS,
                     convergence={"bands": -PW_LABEL_UNCONVERGED})
    else:
        basis = dict(mode="lcao", basis=settings.basis, nbands="nao")
    return GPAW(xc=settings.xc, kpts={"size": kmesh, "gamma": True},
                occupations=FermiDirac(settings.smearing_eV), spinpol=magnetic,
                txt=txt, **basis, **extra)


def _run_in(workdir: Path | None):
    """A context manager giving a directory for GPAW's text output."""
    if workdir is not None:
        Path(workdir).mkdir(parents=True, exist_ok=True)

        class _Keep:
            def __enter__(self) -> Path:
                return Path(workdir)

            def __exit__(self, *exc: object) -> None:
                return None

        return _Keep()
    return _TempDir()


def _one_thread() -> Any:
    """Limit BLAS to one thread: one calculation per core beats threaded BLAS."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1)


class _TempDir:
    def __enter__(self) -> Path:
        self._tmp = tempfile.TemporaryDirectory(prefix="prescreen-gpaw-")
        return Path(self._tmp.name)

    def __exit__(self, *exc: object) -> None:
        self._tmp.cleanup()


def label_structure(structure: "Structure | Atoms",
                    settings: LabelSettings = LabelSettings(), *,
                    workdir: Path | None = None, id: str | None = None) -> LabelRecord:
    """Compute the spin-orbit spillage of one monolayer with GPAW.

    Parameters
    ----------
    structure
        The monolayer (pymatgen ``Structure`` or ``ase.Atoms``); the third lattice
        vector must be out of plane.
    settings
        Level of theory; see :class:`LabelSettings`.
    workdir
        Folder for GPAW's text log (``gpaw.txt``); a temporary folder when None.
    id
        Identifier stored in the record.

    Returns
    -------
    LabelRecord
        With ``status == "ok"``.

    Raises
    ------
    InputError
        If the structure is not a monolayer or the mesh would miss K.
    LabellingError
        If GPAW is not installed or the calculation fails; the cause is chained.
    """
    from prescreen.physics.spillage import (
        occupations_at_fermi_level,
        spillage_from_overlap,
    )

    t0, c0 = time.perf_counter(), time.process_time()
    atoms = prepare_monolayer(structure, settings.vacuum_A, name=id)
    formula = _formula(atoms)
    kmesh = choose_kpts(atoms, settings)
    try:
        from gpaw.spinorbit import soc_eigenstates
    except ImportError as exc:
        raise LabellingError(
            f"{id or formula}: GPAW is not importable; install it with "
            "`bash scripts/install_gpaw.sh .venv` (or `make dft-env`)") from exc
    if settings.spinpol:
        atoms.set_initial_magnetic_moments([settings.initial_magmom_muB] * len(atoms))
    with _run_in(workdir) as folder, _one_thread():
        try:
            calc = _gpaw_calculator(settings, kmesh, folder / "gpaw.txt", settings.spinpol,
                                    symbols=atoms.get_chemical_symbols())
            atoms.calc = calc
            atoms.get_potential_energy()
            nspins = calc.get_number_of_spins()
            soc = soc_eigenstates(calc, scale=settings.soc_scale)
            v_kmn = soc.eigenvectors()  # [k, SOC state m, basis 2j + s]
            e_soc = soc.eigenvalues()  # (nk, 2 nbands), eV
            ef_soc = float(soc.fermi_level)
            ef_nosoc = float(calc.get_fermi_level())
            bz2ibz = np.asarray(calc.wfs.kd.bz2ibz_k)
            kpts = np.asarray(calc.wfs.kd.bzk_kc, dtype=float)  # order of v_kmn
            nbands = calc.get_number_of_bands()
            eig_ibz = np.array([[calc.get_eigenvalues(kpt=k, spin=min(s, nspins - 1))
                                 for s in (0, 1)]
                                for k in range(len(calc.get_ibz_k_points()))])
            n_electrons = float(calc.get_number_of_electrons())
            magmom = float(calc.get_magnetic_moment()) if settings.spinpol else 0.0
        except Exception as exc:  # GPAW raises many types; keep the cause
            raise LabellingError(
                f"{id or formula}: GPAW calculation failed: {type(exc).__name__}: {exc}"
            ) from exc
    # Non-SOC eigenvalues in the interleaved spinor basis of v_kmn: index 2 j + s.
    e_nosoc = np.empty((len(kpts), 2 * nbands))
    e_nosoc[:, 0::2] = eig_ibz[bz2ibz, 0]
    e_nosoc[:, 1::2] = eig_ibz[bz2ibz, 1]
    w_nosoc = occupations_at_fermi_level(e_nosoc, ef_nosoc, settings.smearing_eV)
    w_soc = occupations_at_fermi_level(e_soc, ef_soc, settings.smearing_eV)
    overlap = np.transpose(v_kmn, (0, 2, 1))  # [k, basis state, SOC state]
    gamma = spillage_from_overlap(overlap, w_nosoc, w_soc)
    gap_nosoc, _ = band_gap(e_nosoc, n_electrons)
    gap_soc, metal = band_gap(e_soc, n_electrons)
    direct_soc = direct_band_gap(e_soc, n_electrons)
    wall = time.perf_counter() - t0
    sdict = settings.as_dict()
    if settings.mode == "pw":
        sdict.update(ecut_eV=label_cutoff_eV(settings, atoms.get_chemical_symbols()),
                     nbands=f"{PW_LABEL_NBANDS} of the occupied, all but the top "
                            f"{PW_LABEL_UNCONVERGED} converged")
    else:
        sdict.update(nbands="nao")
    sdict.update(kmesh=list(kmesh),
                 occupations=f"Fermi-Dirac {settings.smearing_eV} eV; spillage weights "
                             "from each Fermi level")
    k_arg = int(np.argmax(gamma))
    return LabelRecord(id=id, formula=formula, spillage=float(gamma[k_arg]),
                       k_max=kpts[k_arg], gap_nosoc_eV=gap_nosoc, gap_soc_eV=gap_soc,
                       is_metal=metal, magmom=magmom, settings=sdict,
                       versions=code_versions(), wall_s=wall, core_hours=wall / 3600.0,
                       gamma=gamma, kpts=kpts, cpu_s=time.process_time() - c0,
                       direct_gap_soc_eV=direct_soc)


#: Relative strain of the central differences that refine the lattice after the coarse
#: scan (dimensionless; 1.5 % keeps them within the harmonic region while the energy
#: differences stay well above the SCF tolerance; common practice, chosen here).
REFINE_STEP: float = 0.015


def _parabola_minimum(scales: tuple[float, ...], energies: np.ndarray) -> float:
    """Scale at the vertex of a parabola through the lowest point and its neighbours.

    Clipped to the scanned range; the lowest scanned scale when the three points are not
    convex.
    """
    j = int(np.argmin(energies))
    lo = min(max(j - 1, 0), len(scales) - 3)
    coef = np.polyfit(scales[lo:lo + 3], energies[lo:lo + 3], 2)
    best = -coef[1] / (2 * coef[0]) if coef[0] > 0 else scales[j]
    return float(np.clip(best, min(scales), max(scales)))


def _bracketed_scan(scales: tuple[float, ...], energy: Any,
                    max_extensions: int) -> tuple[tuple[float, ...], np.ndarray]:
    """Energies over ``scales``, extended past an edge until the minimum is inside.

    ``energy(factors)`` returns the energies of a tuple of scale factors. While the
    lowest energy lies at the first or last scale, one more scale is added beyond it
    (at the scan's smallest spacing), at most ``max_extensions`` times: a starting
    lattice more than the scan's half-width off then costs one energy per step instead
    of a whole second relaxation. An extension point whose energy raises ends the
    extension (the minimum stays at the edge); an error in the first scan propagates.

    Returns
    -------
    (scales, energies)
        Every scale evaluated, ascending, with its energy.
    """
    points = dict(zip(scales, energy(tuple(scales))))
    step = float(np.min(np.diff(sorted(scales))))
    for _ in range(max(0, int(max_extensions))):
        xs = sorted(points)
        j = int(np.argmin([points[x] for x in xs]))
        if 0 < j < len(xs) - 1:
            break
        new = xs[0] - step if j == 0 else xs[-1] + step
        if new <= 0:
            break
        try:
            points[new] = float(energy((new,))[0])
        except Exception:  # noqa: BLE001 - e.g. no SCF convergence in a squeezed cell
            break  # keep what was scanned: the caller sees the edge and may retry
    xs = tuple(sorted(points))
    return xs, np.array([points[x] for x in xs])


#: Largest estimated distance (relative, log-strain) of a refined in-plane lattice from
#: the zero-stress lattice at which :func:`refine_lattice` stops: 0.3 %, about 0.01 A on
#: a 3-4 A lattice (common practice for converged DFT lattice constants, chosen here).
LATTICE_TOL: float = 0.003

#: Most quasi-Newton cycles of :func:`refine_lattice` (each: two energies per strain mode
#: and a position relaxation); chosen here.
LATTICE_CYCLES: int = 6

#: Largest strain step (relative) of one cycle of :func:`refine_lattice`; chosen here.
LATTICE_MAX_STEP: float = 0.05

#: A step predicted below ``tol`` ends :func:`refine_lattice`; it is still taken (with
#: the positions relaxed after it, but no further check) when larger than this fraction
#: of ``tol``, which takes the lattice well inside the tolerance for the price of one
#: position relaxation (chosen here: without it, the rectangular EMT layer of
#: tests/test_lattice.py stopped 1.2 tolerances away).
FINAL_STEP_FRACTION: float = 0.25

#: Until a cycle has measured the relaxed-ion curvature, :func:`refine_lattice` takes the
#: clamped-ion step times this factor as its distance from the zero-stress lattice: the
#: relaxed-ion curvature is assumed to be at least half the clamped-ion one (chosen here;
#: on the buckled EMT layers of tests/test_lattice.py the ratio is 0.63-0.93).
CLAMPED_STIFFNESS_FACTOR: float = 2.0


def strain_modes(cell: np.ndarray) -> list[tuple[float, float]]:
    """In-plane strain modes of a prepared monolayer's cell, as factors on (a1, a2).

    Equal in-plane lengths (hexagonal, square or rhombic cells, whose symmetry keeps the
    lengths equal) get one isotropic mode, ``[(1, 1)]``; unequal lengths get ``a1`` and
    ``a2`` separately, ``[(1, 0), (0, 1)]``, so a rectangular or oblique cell relaxes its
    aspect ratio too. The angle between ``a1`` and ``a2`` is kept.
    """
    l1, l2 = np.linalg.norm(np.asarray(cell, dtype=float)[:2], axis=1)
    if abs(l1 - l2) <= HEX_LENGTH_RTOL * max(l1, l2):
        return [(1.0, 1.0)]
    return [(1.0, 0.0), (0.0, 1.0)]


def _strained(atoms: "Atoms", mode_strain: np.ndarray,
              modes: list[tuple[float, float]]) -> "Atoms":
    """A copy of ``atoms`` with a1, a2 scaled by exp(sum of mode strains), positions
    held fractional."""
    log_scale = np.zeros(2)
    for u, m in zip(mode_strain, modes):
        log_scale += u * np.asarray(m)
    trial = atoms.copy()
    cell = np.array(trial.cell)
    cell[0] *= math.exp(log_scale[0])
    cell[1] *= math.exp(log_scale[1])
    trial.set_cell(cell, scale_atoms=True)
    return trial


@dataclass
class LatticeRefinement:
    """What :func:`refine_lattice` did: ``strain`` is the total log-strain per mode from
    the input lattice, ``residual`` the last estimated distance (relative) from the
    zero-stress lattice, ``energies`` the number of clamped-ion energies it computed."""

    modes: list[tuple[float, float]]
    strain: np.ndarray
    residual: float
    cycles: int
    energies: int
    converged: bool
    relaxed: bool


def refine_lattice(atoms: "Atoms", attach: Any, relax: Any, *,
                   step: float = REFINE_STEP, tol: float = LATTICE_TOL,
                   max_cycles: int = LATTICE_CYCLES,
                   max_step: float = LATTICE_MAX_STEP) -> LatticeRefinement:
    """Move the in-plane lattice of ``atoms`` to zero in-plane stress, using energies only.

    GPAW's LCAO mode has no stress tensor. At a geometry whose positions are relaxed,
    the derivative of the relaxed-ion energy with respect to a strain equals that of the
    clamped-ion energy (the forces vanish), so a central difference of two energies with
    positions held fractional (strain +-``step``) gives the stress there, to second order
    in ``step`` and to within what the residual forces leave. Each cycle takes a
    quasi-Newton step on the relaxed-ion energy surface. The Hessian starts from the
    clamped-ion one of the same energies (for two modes with a forward-difference cross
    term, one more energy), which is stiffer than the relaxed-ion Hessian in every
    direction (the relaxed-ion energy is the clamped-ion one minimised over the
    positions), so the first step contracts the error without overshooting. BFGS updates
    from the change in stress between cycles bring it toward the relaxed-ion Hessian; the
    positions are relaxed after each step.

    It stops when the predicted step, times :data:`CLAMPED_STIFFNESS_FACTOR` until there
    has been one BFGS update per mode, is below ``tol`` (taking that last step when it is
    above :data:`FINAL_STEP_FRACTION` of ``tol``), and never where the Hessian is not
    positive definite (far from the minimum, or at a maximum: there it steps downhill). A lattice scan with positions held fixed, by contrast, returns a minimum
    biased toward the lattice at which those positions were relaxed.

    Parameters
    ----------
    atoms
        A prepared monolayer (:func:`prepare_monolayer`) whose positions are relaxed at
        its lattice; changed in place (cell and positions).
    attach
        ``attach(trial, tag, reference)`` gives the strained ``trial`` a calculator
        (``tag`` names its log; ``reference`` is the unstrained cell of the cycle, e.g.
        to keep the number of real-space grid points fixed across the difference).
    relax
        ``relax(atoms, tag) -> bool`` attaches a calculator, relaxes the positions and
        says whether the force tolerance was reached.
    step, tol, max_cycles, max_step
        Relative strain of the finite difference, convergence threshold, cycle cap,
        and cap on one cycle's strain step.

    Returns
    -------
    LatticeRefinement
        ``relaxed`` says whether the last position relaxation converged (True when no
        step was taken). When not ``converged``, ``residual`` is the estimate made
        before the last step, which was not checked.
    """
    if not (0 < step < 0.2 and tol > 0 and max_cycles >= 1 and max_step > 0):
        raise InputError("bad lattice refinement parameters",
                         value=(step, tol, max_cycles, max_step),
                         expected="0 < step < 0.2, tol > 0, max_cycles >= 1, max_step > 0")
    modes = strain_modes(atoms.cell)
    m = len(modes)
    total = np.zeros(m)
    hessian: np.ndarray | None = None
    previous: tuple[np.ndarray, np.ndarray] | None = None
    updates = 0  # BFGS updates made: the Hessian has relaxed-ion curvature once m are in
    e0 = float(atoms.get_potential_energy())
    n_energies, relaxed, residual = 0, True, math.inf
    for cycle in range(1, max_cycles + 1):
        reference = atoms.copy()  # the unstrained cell of this cycle

        def energy(u: np.ndarray, name: str) -> float:
            nonlocal n_energies
            trial = _strained(atoms, u, modes)
            attach(trial, f"lattice{cycle}-{name}", reference)
            n_energies += 1
            return float(trial.get_potential_energy())

        grad, clamped = np.zeros(m), np.zeros((m, m))
        plus = np.zeros(m)
        for i in range(m):
            u = np.zeros(m)
            u[i] = step
            plus[i], minus = energy(u, f"{i}p"), energy(-u, f"{i}m")
            grad[i] = (plus[i] - minus) / (2 * step)
            clamped[i, i] = (plus[i] + minus - 2 * e0) / step ** 2
        if m == 2:  # the cross term, by a forward difference (one more energy)
            both = energy(np.full(2, step), "pp")
            clamped[0, 1] = clamped[1, 0] = (both - plus[0] - plus[1] + e0) / step ** 2
        if hessian is None:
            hessian = clamped  # stiffer than the relaxed-ion Hessian in every direction
        elif previous is not None:
            s_vec, y_vec = total - previous[0], grad - previous[1]
            sy = float(s_vec @ y_vec)
            hs = hessian @ s_vec
            if sy > 1e-12 and float(s_vec @ hs) > 1e-12:  # toward the relaxed-ion curvature
                hessian = (hessian + np.outer(y_vec, y_vec) / sy
                           - np.outer(hs, hs) / float(s_vec @ hs))
                updates += 1
        eigval, eigvec = np.linalg.eigh(hessian)
        # a relaxed-ion curvature is at most the clamped-ion one: where this is not
        # positive definite, neither is the relaxed-ion surface, so this is no minimum
        here, along = np.linalg.eigh(clamped)
        convex = bool(eigval.min() > 0 and here.min() > 0)
        if not convex:  # far from the minimum (or at a maximum): a downhill step, no stop
            hessian = (eigvec * np.maximum(np.abs(eigval), 1e-3)) @ eigvec.T
            updates = 0
        move = -np.linalg.solve(hessian, grad)
        if not convex and np.max(np.abs(move)) < tol:  # at a saddle or maximum: leave it
            move = max_step * along[:, int(np.argmin(here))]
        # until every direction has a measured curvature, the step comes from a stiffer one
        factor = 1.0 if updates >= m else CLAMPED_STIFFNESS_FACTOR
        residual = float(np.max(np.abs(move))) * factor
        done = convex and residual < tol
        if done and np.max(np.abs(move)) < FINAL_STEP_FRACTION * tol:
            return LatticeRefinement(modes, total, residual, cycle, n_energies, True, relaxed)
        move = np.clip(move, -max_step, max_step)
        strained = _strained(atoms, move, modes)
        atoms.set_cell(strained.cell, scale_atoms=True)
        relaxed = bool(relax(atoms, f"lattice{cycle}"))
        e0 = float(atoms.get_potential_energy())
        previous = (total.copy(), grad)
        total = total + move
        if done:  # the last, small step taken (and the positions relaxed) but not checked
            return LatticeRefinement(modes, total, residual, cycle, n_energies, True, relaxed)
    return LatticeRefinement(modes, total, residual, max_cycles, n_energies, False, relaxed)


#: Most scale points added past an edge of the coarse lattice scan (see
#: :func:`_bracketed_scan`), each one step of the scan's smallest spacing: with the
#: default scales (spacing 0.02) 3 reach 0.90-1.10 (chosen here).
MAX_SCAN_EXTENSIONS: int = 3

#: Force tolerance (eV/Angstrom) and step cap of the pre-relaxation at the input cell,
#: before the lattice scan (loose on purpose; common practice for a first pass).
PRE_RELAX_FMAX_EV_PER_A: float = 0.2
PRE_RELAX_STEPS: int = 20


class LayerBroke(LabellingError):
    """A relaxation stopped early because the layer stopped being one (see ``check_layer``).

    Attributes
    ----------
    reason : str
        What the check found.
    structure : pymatgen Structure or ase.Atoms
        The geometry at that point, of the relaxation input's type.
    """

    def __init__(self, message: str, reason: str, structure: Any) -> None:
        super().__init__(message)
        self.reason = reason
        self.structure = structure


def relax_monolayer(structure: "Structure | Atoms",
                    settings: LabelSettings = LabelSettings(), *,
                    fmax: float = DEFAULT_FMAX_EV_PER_A, steps: int = 100,
                    scales: tuple[float, ...] = (0.96, 0.98, 1.0, 1.02, 1.04),
                    workdir: Path | None = None,
                    grid_spacing_A: float | None = None,
                    scf_density_tol: float | None = None,
                    refine_step: float = REFINE_STEP,
                    max_extensions: int = MAX_SCAN_EXTENSIONS,
                    pre_relax_kpt_density: float | None = None,
                    pre_relax_basis: str | None = None,
                    check_layer: Any = None,
                    details: dict[str, Any] | None = None,
                    refine_only: bool = False,
                    ) -> tuple["Structure | Atoms", float, bool]:
    """Relax a monolayer at the labeller's level of theory (LCAO, PBE).

    GPAW 26.7 has no stress tensor in LCAO mode, so the in-plane cell is optimised by
    energy, in three stages:

    1. positions are roughly relaxed at the input cell (to
       :data:`PRE_RELAX_FMAX_EV_PER_A`);
    2. a coarse scan scales the in-plane lattice isotropically through ``scales``, with
       the positions held fractional, and a parabola through its lowest energies gives a
       first lattice, where the positions are relaxed (BFGS, ``fmax``);
    3. :func:`refine_lattice` moves the lattice to zero in-plane stress from central
       differences of step ``refine_step`` at relaxed positions, relaxing the positions
       after each step: a scan with positions held fixed is biased toward the lattice at
       which they were relaxed. Cells with unequal in-plane lengths relax ``a1`` and
       ``a2`` separately here (:func:`strain_modes`).

    The out-of-plane cell is not changed apart from re-centring with ``settings.vacuum_A``
    of vacuum; the angle between ``a1`` and ``a2`` is kept.

    Parameters
    ----------
    structure
        The monolayer.
    settings
        Level of theory (basis, functional, mesh, smearing, vacuum, spin).
    fmax
        Force tolerance (eV/Angstrom) of the position relaxations.
    steps
        Largest number of BFGS steps per position relaxation.
    scales
        In-plane scale factors (dimensionless) tried for the lattice.
    workdir
        Folder for GPAW's log; a temporary folder when None.
    grid_spacing_A
        Real-space grid spacing (Angstrom) of the relaxation only; GPAW's default (0.2)
        when None. A coarser grid is cheaper; compare lattice constants before using it.
    scf_density_tol
        Self-consistency tolerance on the density (GPAW's ``convergence["density"]``)
        for the relaxation only; GPAW's default when None.
    refine_step
        Relative strain of the finite differences of :func:`refine_lattice`; 0 skips the
        refinement (the lattice of the coarse scan is kept).
    max_extensions
        Scale points added past an edge of ``scales`` when the lowest energy lies there
        (:func:`_bracketed_scan`); 0 keeps the scan as given.
    pre_relax_kpt_density
        k-point density of the loose pre-relaxation only (``settings.kpt_density`` when
        None). A coarser mesh makes the pre-relaxation cheaper; the scan and the final
        relaxation keep ``settings``. Compare lattice constants before using it.
    pre_relax_basis
        LCAO basis of the loose pre-relaxation only (``settings.basis`` when None), e.g.
        ``"szp(dzp)"``: the single-zeta-polarised part of the dzp set, fewer orbitals.
        Compare lattice constants before using it.
    check_layer
        Optional ``check_layer(atoms) -> str``, called on the geometry after the rough
        pre-relaxation: a non-empty answer (why the layer is no longer a layer, e.g. it
        fell apart) stops the relaxation there with :class:`LayerBroke`, sparing the
        lattice scan and the final relaxation of a structure that will be discarded.
    details
        Optional dict, filled with what the lattice search did: ``coarse_scales`` and
        ``coarse_energies_eV``, ``coarse_edge`` (its minimum still at an edge),
        ``lattice_strain`` (log-strain per mode from the coarse lattice),
        ``lattice_residual`` (estimated relative distance from zero stress),
        ``lattice_cycles``, ``lattice_energies`` and ``lattice_converged``.
    refine_only
        Skip stages 1 and 2: for a structure relaxed before (e.g. by a scan alone), relax
        the positions at its lattice and refine from there.

    Returns
    -------
    (relaxed, residual_fmax_eV_per_A, converged)
        ``relaxed`` has the input's type (pymatgen ``Structure`` or ``ase.Atoms``).
        ``converged`` is False if BFGS did not reach ``fmax``, or the refinement did
        not reach :data:`LATTICE_TOL` in :data:`LATTICE_CYCLES` cycles (without a
        refinement: the coarse minimum still lies at an edge of the scanned scales).
    """
    from ase.optimize import BFGS

    if fmax <= 0 or steps < 1 or len(scales) < 3:
        raise InputError("bad relaxation parameters", value=(fmax, steps, scales),
                         expected="fmax > 0, steps >= 1, at least 3 scales")
    atoms = prepare_monolayer(structure, settings.vacuum_A)
    kmesh = choose_kpts(atoms, settings)
    extra: dict[str, Any] = {}
    if grid_spacing_A is not None:
        extra["h"] = float(grid_spacing_A)
    if scf_density_tol is not None:
        extra["convergence"] = {"density": float(scf_density_tol)}

    pre_kmesh = kmesh if pre_relax_kpt_density is None else choose_kpts(
        atoms, replace(settings, kpt_density=float(pre_relax_kpt_density)))

    def attach(a: "Atoms", folder: Path, tag: str, mesh: tuple[int, int, int] = kmesh,
               level: LabelSettings = settings, grid_of: "Atoms | None" = None) -> None:
        """A calculator for ``a``; with ``grid_of``, on that cell's number of real-space
        grid points (GPAW's default choice for it), so that energies of slightly strained
        cells differ by the strain, not by a change of grid."""
        if level.spinpol:
            a.set_initial_magnetic_moments([level.initial_magmom_muB] * len(a))
        kwargs = dict(extra)
        if grid_of is not None:
            from gpaw.utilities import h2gpts

            spacing = kwargs.pop("h", DEFAULT_GRID_SPACING_A)
            kwargs["gpts"] = tuple(int(n) for n in h2gpts(spacing, grid_of.cell, idiv=4))
        a.calc = _gpaw_calculator(level, mesh, folder / f"relax-{tag}.txt",
                                  level.spinpol, **kwargs)

    def relax_positions(a: "Atoms", folder: Path, tag: str, f_tol: float, n_steps: int,
                        mesh: tuple[int, int, int] = kmesh,
                        level: LabelSettings = settings) -> bool:
        attach(a, folder, tag, mesh, level)
        return bool(BFGS(a, logfile=str(folder / f"bfgs-{tag}.log")).run(fmax=f_tol,
                                                                          steps=n_steps))

    def scan(a: "Atoms", folder: Path, factors: tuple[float, ...], tag: str) -> np.ndarray:
        """Energies (eV) with the in-plane cell scaled by each factor, positions fractional."""
        energies = []
        for i, f in enumerate(factors):
            trial = a.copy()
            cell = np.array(trial.cell)
            cell[:2] *= f
            trial.set_cell(cell, scale_atoms=True)
            attach(trial, folder, f"{tag}{i}")
            energies.append(trial.get_potential_energy())
        return np.array(energies)

    def coarse(folder: Path) -> dict[str, Any]:
        """Stages 1 and 2 up to the coarse lattice: pre-relaxation, coarse scan."""
        # A rough pre-relaxation at the input cell: the lattice is still off there, so
        # converging tightly would waste steps that the final relaxation repeats.
        pre_level = settings if pre_relax_basis is None else replace(
            settings, basis=str(pre_relax_basis))
        relax_positions(atoms, folder, "start", max(fmax, PRE_RELAX_FMAX_EV_PER_A),
                        min(steps, PRE_RELAX_STEPS), pre_kmesh, pre_level)
        broken = check_layer(atoms.copy()) if check_layer is not None else ""
        if broken:
            there = atoms.copy()
            there.calc = None
            raise LayerBroke(f"{_formula(atoms)}: the layer broke during the "
                             f"pre-relaxation: {broken}", broken,
                             _same_type(structure, there))
        counter = iter(range(10**6))
        scanned, energies = _bracketed_scan(
            scales, lambda f: scan(atoms, folder, f, f"scale{next(counter)}-"),
            max_extensions)
        j = int(np.argmin(energies))
        edge = j in (0, len(scanned) - 1)
        best = _parabola_minimum(scanned, energies)
        cell = np.array(atoms.cell)
        cell[:2] *= best
        atoms.set_cell(cell, scale_atoms=True)
        return {"coarse_scales": [float(x) for x in scanned],
                    "coarse_energies_eV": [float(e) for e in energies],
                    "coarse_edge": bool(edge)}

    with _run_in(workdir) as folder, _one_thread():
        try:
            # a structure relaxed before (refine_only) keeps its lattice here
            found: dict[str, Any] = {} if refine_only else coarse(folder)
            lattice_ok = not found.get("coarse_edge", False)
            ok = relax_positions(atoms, folder, "final", fmax, steps)  # at this lattice
            if refine_step > 0:
                ref = refine_lattice(
                    atoms, lambda a, tag, ref: attach(a, folder, tag, grid_of=ref),
                    lambda a, tag: relax_positions(a, folder, tag, fmax, steps),
                    step=refine_step)
                ok = ref.relaxed if np.any(ref.strain) else ok  # the last relaxation's
                lattice_ok = ref.converged
                found.update(lattice_strain=[float(u) for u in ref.strain],
                             lattice_residual=float(ref.residual),
                             lattice_cycles=ref.cycles, lattice_energies=ref.energies,
                             lattice_converged=ref.converged)
            if details is not None:
                details.update(found)
            residual = float(np.linalg.norm(atoms.get_forces(), axis=1).max())
        except LayerBroke:
            raise
        except Exception as exc:
            raise LabellingError(f"{_formula(atoms)}: relaxation failed: "
                                 f"{type(exc).__name__}: {exc}") from exc
    atoms.calc = None
    relaxed = _same_type(structure, prepare_monolayer(atoms, settings.vacuum_A))
    return relaxed, residual, bool(ok and lattice_ok)


#: Plane-wave cutoffs (eV) of :func:`relax_monolayer_pw`: the default, and the one for
#: layers with any of :data:`HARD_ELEMENTS`, whose 2p states need more plane waves.
#: Measured on 2026-12-03 (``benchmarks/relax_pw.py --ecut 500 700``, table in
#: docs/labeller.md), the Pulay term added: from 500 to 700 eV the relaxed lattice moved
#: by 0.001 % for silicene and 0.09 % for 1T-CrSe2 (both without the term, which is
#: negligible for them), but by 0.85 % for Ta2NO2; at 700 eV Ta2NO2 moved by 0.1 % with
#: and without the term.
DEFAULT_PW_ECUT_EV: float = 500.0
HARD_PW_ECUT_EV: float = 700.0
#: Elements whose Pulay term at 500 eV exceeds 0.5 eV per atom (:func:`pulay_virial_eV`:
#: N -1.9, O -1.4, F -0.7; each of the other 55 elements of the open dataset's pool
#: below 0.4 in size, the largest Co at -0.39).
HARD_ELEMENTS: frozenset[str] = frozenset({"N", "O", "F"})


def plane_wave_cutoff_eV(symbols: Any) -> float:
    """The relaxation cutoff (eV) for a layer of these chemical symbols."""
    return HARD_PW_ECUT_EV if HARD_ELEMENTS & set(symbols) else DEFAULT_PW_ECUT_EV


#: Largest in-plane virial (eV per cell, the derivative of the energy with respect to an
#: in-plane strain) at which :func:`relax_monolayer_pw` stops. 0.05 eV leaves a strain
#: error of 0.05 eV over the layer's in-plane stiffness d2E/de2 (tens to hundreds of eV
#: per cell): below 0.3 % for all but the softest layers. Chosen here.
DEFAULT_VIRIAL_TOL_EV: float = 0.05

#: BFGS steps between two calls of ``check_layer`` in :func:`relax_monolayer_pw`.
LAYER_CHECK_EVERY: int = 4


def _in_plane_virial(atoms: "Atoms") -> np.ndarray:
    """V sigma (eV per cell) for the in-plane strains xx, yy, xy."""
    return atoms.get_volume() * atoms.get_stress(voigt=True)[[0, 1, 5]]


def stress_relax(atoms: "Atoms", fmax: float, virial_tol_eV: float, steps: int,
                 check_layer: Any = None, logfile: str | None = None,
                 original: Any = None) -> tuple[bool, int]:
    """BFGS over the positions and the in-plane strain of ``atoms`` (calculator attached,
    with a stress tensor), in place; the stage of :func:`relax_monolayer_pw` that needs no
    DFT, so that it can be tested with any ASE calculator.

    The in-plane strain is free (``FrechetCellFilter``, mask xx, yy, xy, its default
    scaling of the cell coordinates); the out-of-plane cell vector is kept. Convergence is
    tested here, on physical quantities: every force below ``fmax`` and each in-plane
    component of V sigma (eV per cell: the derivative of the energy with respect to that
    in-plane strain; we call it the virial, a name that usually carries the opposite
    sign), in absolute value below ``virial_tol_eV``. Both come from the calculation the
    optimiser has just made, so the test costs nothing. ``check_layer`` is called every
    :data:`LAYER_CHECK_EVERY` steps; a non-empty answer raises :class:`LayerBroke` (its
    structure of ``original``'s type).

    Returns
    -------
    (converged, steps_taken)
    """
    from ase.filters import FrechetCellFilter
    from ase.optimize import BFGS

    cell = np.array(atoms.cell)
    if np.abs(cell[2, :2]).max() > 1e-8 or np.abs(cell[:2, 2]).max() > 1e-8:
        # the mask keeps c only when it is normal to the layer (prepare_monolayer's cell)
        raise InputError("the layer must lie in the xy plane with c along z",
                         line=_formula(atoms), value=cell.round(6).tolist(),
                         expected="a cell from prepare_monolayer")
    opt = BFGS(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1]), logfile=logfile)
    for _ in opt.irun(fmax=0.0, steps=steps):  # ASE's own test never stops it: ours does
        n = int(opt.nsteps)
        force = float(np.linalg.norm(atoms.get_forces(), axis=1).max())
        virial = _in_plane_virial(atoms)
        if force < fmax and float(np.abs(virial).max()) < virial_tol_eV:
            return True, n
        if check_layer is not None and n and n % LAYER_CHECK_EVERY == 0:
            broken = check_layer(atoms.copy())
            if broken:
                there = atoms.copy()
                there.calc = None
                raise LayerBroke(f"{_formula(atoms)}: the layer broke after {n} steps of "
                                 f"the relaxation: {broken}", broken,
                                 there if original is None else _same_type(original, there))
    return False, int(opt.nsteps)


def pulay_virial_eV(symbols: list[str], ecut_eV: float, xc: str = "PBE") -> float:
    """GPAW's estimate of the Pulay term of V sigma (eV per cell) at cutoff ``ecut_eV``:
    (2/3) ecut dE/d(ecut), with dE/d(ecut) summed over the atoms from the kinetic-energy
    tail of each free-atom setup. It is what GPAW's older plane-wave mode adds to the
    diagonal of V sigma with ``PW(ecut, dedecut="estimate")`` (``gpaw/old/stress.py``); GPAW
    26.7's default code does not, so :func:`relax_monolayer_pw` adds it itself. Negative:
    an incomplete basis pulls the lattice in. At 500 eV it is about -1.9 eV per N atom,
    -1.4 per O, -0.7 per F and below 0.1 in size for most heavier elements."""
    from ase.units import Ha
    from gpaw.setup import create_setup
    from gpaw.utilities.ekin import dekindecut, ekin
    from gpaw.xc import XC

    functional = XC(xc)
    per_atom: dict[str, float] = {}
    for symbol in symbols:
        if symbol not in per_atom:
            G, de, _ = ekin(create_setup(symbol, functional))
            per_atom[symbol] = -float(dekindecut(G, de, ecut_eV / Ha))
    return 2.0 / 3.0 * float(ecut_eV) * sum(per_atom[x] for x in symbols)


def _pulay_corrected(calc: Any, dedepsilon_eV: float) -> Any:
    """An ASE calculator around the GPAW plane-wave one ``calc`` that adds
    ``dedepsilon_eV`` (the Pulay term of V sigma, :func:`pulay_virial_eV`) to the diagonal
    of V sigma; energy and forces are ``calc``'s."""
    from ase.calculators.calculator import Calculator, all_changes

    class PulayCorrected(Calculator):
        implemented_properties = ["energy", "free_energy", "forces", "stress"]

        def calculate(self, atoms: Any = None, properties: Any = ("energy",),
                      system_changes: Any = all_changes) -> None:
            super().calculate(atoms, properties, system_changes)
            a = self.atoms
            stress = np.array(calc.get_stress(a), dtype=float)
            stress[:3] += dedepsilon_eV / a.get_volume()
            self.results = {"energy": calc.get_potential_energy(a),
                            "free_energy": calc.get_property("free_energy", a),
                            "forces": calc.get_forces(a), "stress": stress}

    return PulayCorrected()


def relax_monolayer_pw(structure: "Structure | Atoms",
                       settings: LabelSettings = LabelSettings(), *,
                       ecut_eV: float | None = None,
                       fmax: float = DEFAULT_FMAX_EV_PER_A,
                       virial_tol_eV: float = DEFAULT_VIRIAL_TOL_EV,
                       steps: int = 150,
                       workdir: Path | None = None,
                       check_layer: Any = None,
                       details: dict[str, Any] | None = None,
                       ) -> tuple["Structure | Atoms", float, bool]:
    """Relax a monolayer's positions and in-plane cell together, with the stress tensor.

    The same functional and PAW setups as the labeller (``settings.xc``), but GPAW's
    plane-wave mode, which has the stress tensor that its LCAO mode lacks: one BFGS run
    over the atomic positions and the in-plane strain (ASE's ``FrechetCellFilter``, mask
    xx, yy, xy; the out-of-plane cell vector is kept, so the vacuum cannot change and
    the angle between ``a1`` and ``a2`` can). It stops when every force is below
    ``fmax`` and the in-plane virial, the derivative of the energy with respect to an
    in-plane strain, is below ``virial_tol_eV`` per cell. With a complete basis the
    geometry is free of the LCAO basis' error (its buckling, for one: see
    ``docs/labeller.md``), and one run replaces :func:`relax_monolayer`'s scans and
    finite differences.

    Parameters
    ----------
    structure
        The monolayer.
    settings
        Level of theory: ``xc``, the k mesh (``kpts`` or ``kpt_density``), the
        Fermi-Dirac width, the vacuum and the spin; ``basis`` is not used.
    ecut_eV
        Plane-wave cutoff (eV); None chooses it by the elements
        (:func:`plane_wave_cutoff_eV`).
    fmax
        Force tolerance (eV/Angstrom).
    virial_tol_eV
        Tolerance on each in-plane component of V sigma, in absolute value (eV per cell).
    steps
        Largest number of BFGS steps.
    workdir
        Folder for GPAW's log; a temporary folder when None.
    check_layer
        Optional ``check_layer(atoms) -> str``, called every :data:`LAYER_CHECK_EVERY`
        steps: a non-empty answer stops the relaxation with :class:`LayerBroke`.
    details
        Optional dict, filled with ``steps``, ``virial_eV`` (the largest in-plane
        component at the end, Pulay term included), ``pulay_virial_eV`` (that term,
        :func:`pulay_virial_eV`), ``lattice_strain`` (log of the change of each in-plane
        length), ``ecut_eV``, ``lattice_converged``, ``energy_eV`` (GPAW's energy of the
        relaxed cell, comparable only between runs with the same settings and k mesh) and
        ``kmesh`` (chosen from the starting cell, kept throughout).

    Returns
    -------
    (relaxed, residual_fmax_eV_per_A, converged)
        As :func:`relax_monolayer`; ``converged`` is False if BFGS ran out of steps.
    """
    from gpaw import GPAW, PW, FermiDirac

    atoms = prepare_monolayer(structure, settings.vacuum_A)
    if ecut_eV is None:
        ecut_eV = plane_wave_cutoff_eV(atoms.get_chemical_symbols())
    if fmax <= 0 or virial_tol_eV <= 0 or ecut_eV <= 0 or steps < 1:
        raise InputError("bad relaxation parameters", value=(ecut_eV, fmax, virial_tol_eV, steps),
                         expected="ecut_eV, fmax and virial_tol_eV > 0, steps >= 1")
    start = atoms.cell.lengths()[:2].copy()
    kmesh = choose_kpts(atoms, settings)
    if settings.spinpol:
        atoms.set_initial_magnetic_moments([settings.initial_magmom_muB] * len(atoms))
    with _run_in(workdir) as folder, _one_thread():
        try:
            dft = GPAW(mode=PW(float(ecut_eV)), xc=settings.xc,
                       kpts={"size": kmesh, "gamma": True},
                       occupations=FermiDirac(settings.smearing_eV),
                       spinpol=settings.spinpol, txt=str(folder / "relax-pw.txt"))
            pulay = pulay_virial_eV(atoms.get_chemical_symbols(), ecut_eV, settings.xc)
            atoms.calc = _pulay_corrected(dft, pulay)
            ok, n = stress_relax(atoms, fmax, virial_tol_eV, steps, check_layer,
                                 str(folder / "bfgs-pw.log"), structure)
            residual = float(np.linalg.norm(atoms.get_forces(), axis=1).max())
            virial = _in_plane_virial(atoms)
            energy = float(atoms.get_potential_energy())
        except LayerBroke:
            raise
        except Exception as exc:
            raise LabellingError(f"{_formula(atoms)}: relaxation failed: "
                                 f"{type(exc).__name__}: {exc}") from exc
    if details is not None:
        details.update(steps=int(n), virial_eV=float(np.abs(virial).max()),
                       pulay_virial_eV=float(pulay),
                       lattice_strain=[float(x) for x in
                                       np.log(atoms.cell.lengths()[:2] / start)],
                       ecut_eV=float(ecut_eV), lattice_converged=bool(ok),
                       energy_eV=energy, kmesh=[int(k) for k in kmesh])
    atoms.calc = None
    relaxed = _same_type(structure, prepare_monolayer(atoms, settings.vacuum_A))
    return relaxed, residual, bool(ok)


def _same_type(original: Any, atoms: "Atoms") -> Any:
    """``atoms`` as a pymatgen Structure unless ``original`` is an ase.Atoms."""
    from ase import Atoms

    if isinstance(original, Atoms):
        return atoms
    from pymatgen.io.ase import AseAtomsAdaptor

    return AseAtomsAdaptor.get_structure(atoms)


def honeycomb_monolayer(symbols: str, a: float, buckling: float = 0.0,
                        vacuum: float = DEFAULT_VACUUM_A) -> "Atoms":
    """A two-atom (buckled) honeycomb monolayer, e.g. hBN, silicene, stanene.

    Parameters
    ----------
    symbols
        Two atoms, e.g. ``"BN"`` or ``"Sn2"`` (ASE formula).
    a
        In-plane lattice constant (Angstrom).
    buckling
        Height difference (Angstrom) between the two sublattices.
    vacuum
        Total vacuum (Angstrom) along z.

    Returns
    -------
    ase.Atoms
        Hexagonal cell (120 degrees between a1 and a2), atoms at (1/3, 2/3) and
        (2/3, 1/3), ``pbc = (True, True, False)``.
    """
    from ase import Atoms
    from ase.symbols import string2symbols

    if len(string2symbols(symbols)) != 2:
        raise InputError("a honeycomb has two atoms per cell", value=symbols,
                         expected="a formula with two atoms, e.g. 'BN' or 'Sn2'")
    c = buckling + vacuum
    cell = [[a, 0.0, 0.0], [-a / 2, a * math.sqrt(3) / 2, 0.0], [0.0, 0.0, c]]
    return Atoms(symbols, cell=cell, pbc=(True, True, False),
                 scaled_positions=[[1 / 3, 2 / 3, 0.5 - buckling / (2 * c)],
                                   [2 / 3, 1 / 3, 0.5 + buckling / (2 * c)]])
