"""Shared fixtures: small real structures built with ASE and converted for pymatgen."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


def _to_pmg(atoms):
    from pymatgen.io.ase import AseAtomsAdaptor

    return AseAtomsAdaptor.get_structure(atoms)


@pytest.fixture
def mos2():
    """2H-MoS2 monolayer; a = 3.18 A, S-S thickness 3.13 A (from memory, close to the
    experimental bulk values in Wilson & Yoffe, Adv. Phys. 18, 193 (1969))."""
    from ase.build import mx2

    return _to_pmg(mx2("MoS2", "2H", a=3.18, thickness=3.13, vacuum=9.0))


@pytest.fixture
def hbn():
    """Flat hexagonal BN monolayer, a = 2.50 A (from memory)."""
    from ase.build import graphene

    return _to_pmg(graphene("BN", a=2.50, vacuum=9.0))


@pytest.fixture
def graphene_layer():
    """Graphene, a = 2.46 A (from memory)."""
    from ase.build import graphene

    return _to_pmg(graphene("C2", a=2.46, vacuum=9.0))


@pytest.fixture
def rocksalt():
    """Bulk NaCl, a = 5.64 A (from memory): three-dimensional, never a monolayer."""
    from ase.build import bulk

    return _to_pmg(bulk("NaCl", "rocksalt", a=5.64))


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)


def pytest_collection_modifyitems(config, items):
    """Skip the tests marked ``dft``, with the reason, where GPAW is not importable."""
    import importlib.util

    if importlib.util.find_spec("gpaw") is not None:
        return
    skip = pytest.mark.skip(reason="gpaw is not importable; run "
                            "`bash scripts/install_gpaw.sh .venv` (make dft-env)")
    for item in items:
        if "dft" in item.keywords:
            item.add_marker(skip)
