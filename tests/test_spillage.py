"""Tests of the spillage engine: invariances, bounds, metals, errors and records.

The reference facts here are properties of the Liu–Vanderbilt definition
(Liu and Vanderbilt, Phys. Rev. B 90, 125133 (2014)) checked with numpy linear algebra:
identical occupied spaces give zero, orthogonal ones give n_occ, unitary rotations within
the occupied space change nothing, and 0 <= gamma <= n_occ. Physical reference values
(published models) are in tests/test_tightbinding_models.py.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.stats import unitary_group

import prescreen
from prescreen.errors import InputError
from prescreen.physics.spillage import (
    SPILLAGE_THRESHOLD,
    SpillageResult,
    occupations_at_fermi_level,
    spillage_from_eigenvectors,
    spillage_from_overlap,
)

NK, NBASIS = 5, 8


def _random_unitaries(rng: np.random.Generator, nk: int = NK, n: int = NBASIS) -> np.ndarray:
    return np.stack([unitary_group.rvs(n, random_state=rng) for _ in range(nk)])


def _kpts(nk: int = NK) -> np.ndarray:
    return np.column_stack([np.linspace(0, 0.4, nk), np.zeros(nk), np.zeros(nk)])


def test_threshold_is_the_package_constant() -> None:
    # common practice: 0.5 (the package-wide constant is re-exported, not redefined)
    assert SPILLAGE_THRESHOLD is prescreen.SPILLAGE_THRESHOLD


@pytest.mark.parametrize("n_occ", [1, 3, 4])
def test_identical_states_give_zero(n_occ: int) -> None:
    u = _random_unitaries(np.random.default_rng(1))[:, :, :n_occ]
    occ = np.ones((NK, n_occ))
    result = spillage_from_eigenvectors(u, u, occ, occ, _kpts())
    np.testing.assert_allclose(result.gamma, 0.0, atol=1e-12)
    np.testing.assert_allclose(result.n_occ, n_occ)


@pytest.mark.parametrize("n_occ", [1, 2, 4])
def test_rotations_within_occupied_space_leave_gamma_unchanged(n_occ: int) -> None:
    rng = np.random.default_rng(2)
    u = _random_unitaries(rng)
    psi, psit = u[:, :, :n_occ], _random_unitaries(rng)[:, :, :n_occ]
    occ = np.ones((NK, n_occ))
    base = spillage_from_eigenvectors(psi, psit, occ, occ, _kpts()).gamma
    r1, r2 = _random_unitaries(rng, n=n_occ), _random_unitaries(rng, n=n_occ)
    rotated = spillage_from_eigenvectors(psi @ r1, psit @ r2, occ, occ, _kpts()).gamma
    np.testing.assert_allclose(rotated, base, atol=1e-12)
    # ...but mixing in an empty state does change it
    mixed = psi.copy()
    mixed[:, :, 0] = (psi[:, :, 0] + u[:, :, n_occ]) / np.sqrt(2)
    changed = spillage_from_eigenvectors(mixed, psit, occ, occ, _kpts()).gamma
    assert np.max(np.abs(changed - base)) > 1e-3


@pytest.mark.parametrize("seed", [3, 4, 5])
def test_gamma_lies_between_zero_and_n_occ(seed: int) -> None:
    rng = np.random.default_rng(seed)
    psi, psit = _random_unitaries(rng), _random_unitaries(rng)
    w, wt = rng.uniform(size=(NK, NBASIS)), rng.uniform(size=(NK, NBASIS))
    result = spillage_from_eigenvectors(psi, psit, w, wt, _kpts())
    assert np.all(result.gamma >= 0.0)
    assert np.all(result.gamma <= result.n_occ + 1e-12)
    np.testing.assert_allclose(result.n_occ, np.minimum(w.sum(1), wt.sum(1)))


def test_orthogonal_occupied_spaces_give_n_occ() -> None:
    u = _random_unitaries(np.random.default_rng(6))
    occ = np.ones((NK, 3))
    result = spillage_from_eigenvectors(u[:, :, :3], u[:, :, 3:6], occ, occ, _kpts())
    np.testing.assert_allclose(result.gamma, 3.0, atol=1e-12)


@pytest.mark.parametrize("theta", [0.0, 0.3, np.pi / 4, 1.2, np.pi / 2])
def test_one_state_rotated_by_theta_spills_sin_squared(theta: float) -> None:
    # derived here from the definition: |<a|cos a + sin b>|^2 = cos^2 theta
    overlap = np.full((1, 1, 1), np.cos(theta), dtype=complex)
    np.testing.assert_allclose(spillage_from_overlap(overlap), np.sin(theta) ** 2, atol=1e-15)


def test_overlap_and_eigenvector_paths_agree() -> None:
    rng = np.random.default_rng(7)
    psi, psit = _random_unitaries(rng)[:, :, :4], _random_unitaries(rng)[:, :, :4]
    w, wt = rng.uniform(size=(NK, 4)), rng.uniform(size=(NK, 4))
    overlap = np.einsum("kbm,kbn->kmn", psi.conj(), psit)
    np.testing.assert_allclose(
        spillage_from_overlap(overlap, w, wt),
        spillage_from_eigenvectors(psi, psit, w, wt, _kpts()).gamma,
        atol=1e-12,
    )


def test_state_crossing_the_fermi_level_adds_no_spillage() -> None:
    # metal rule (module notes): one extra or one missing occupied state is not spillage
    u = _random_unitaries(np.random.default_rng(8))
    more = np.ones((NK, 4))
    fewer = np.ones((NK, 3))
    gained = spillage_from_eigenvectors(u[:, :, :3], u[:, :, :4], fewer, more, _kpts())
    lost = spillage_from_eigenvectors(u[:, :, :4], u[:, :, :3], more, fewer, _kpts())
    np.testing.assert_allclose(gained.gamma, 0.0, atol=1e-12)
    np.testing.assert_allclose(lost.gamma, 0.0, atol=1e-12)
    np.testing.assert_allclose(lost.n_occ, 3.0)


def test_step_occupations() -> None:
    e = np.array([[-1.0, 0.0, 2.0], [-0.1, 0.1, 0.2]])
    np.testing.assert_array_equal(
        occupations_at_fermi_level(e, 0.0), [[1.0, 0.5, 0.0], [1.0, 0.0, 0.0]]
    )


@pytest.mark.parametrize("width", [0.01, 0.1, 1.0])
def test_fermi_dirac_occupations(width: float) -> None:
    e = np.linspace(-0.5, 0.5, 11)[None, :] + 3.0
    occ = occupations_at_fermi_level(e, 3.0, width)
    # Fermi–Dirac distribution f = 1 / (exp((e - mu) / kT) + 1) (textbook form)
    with np.errstate(over="ignore"):
        expected = 1.0 / (np.exp((e - 3.0) / width) + 1.0)
    np.testing.assert_allclose(occ, expected, rtol=1e-12, atol=1e-300)
    # far from the Fermi level: no overflow warning (warnings are errors here)
    far = occupations_at_fermi_level(np.array([[-1e4, 1e4]]), 0.0, 1e-3)
    np.testing.assert_array_equal(far, [[1.0, 0.0]])


def test_result_properties_and_json_round_trip() -> None:
    kpts = np.array([[0.0, 0.0, 0.0], [1 / 3, 1 / 3, 0.0], [0.5, 0.0, 0.0]])
    result = SpillageResult(gamma=[0.1, 1.0, 0.2], kpts=kpts, n_occ=[2, 2, 2])
    assert result.max == 1.0 and result.argmax == 1
    np.testing.assert_allclose(result.k_max, [1 / 3, 1 / 3, 0.0])
    text = json.dumps(result.as_dict())
    back = SpillageResult.from_dict(json.loads(text))
    np.testing.assert_array_equal(back.gamma, result.gamma)
    np.testing.assert_array_equal(back.kpts, result.kpts)
    with pytest.raises(ValueError, match="read-only"):
        result.gamma[0] = 5.0


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"gamma": [[0.1]], "kpts": [[0, 0, 0]], "n_occ": [1]}, "1-D"),
        ({"gamma": [0.1], "kpts": [[0, 0]], "n_occ": [1]}, "kpts does not match"),
        ({"gamma": [0.1], "kpts": [[0, 0, 0]], "n_occ": [1, 2]}, "n_occ does not match"),
    ],
)
def test_result_rejects_bad_shapes(kwargs: dict, message: str) -> None:
    with pytest.raises(InputError, match=message):
        SpillageResult(**kwargs)


def test_from_dict_names_missing_keys() -> None:
    with pytest.raises(InputError, match="lacks keys"):
        SpillageResult.from_dict({"gamma": [0.0]})


def test_errors_name_the_bad_entry() -> None:
    u = _random_unitaries(np.random.default_rng(9))[:, :, :2]
    occ = np.ones((NK, 2))
    bad = occ.copy()
    bad[3, 1] = 1.5
    with pytest.raises(InputError, match=r"k index 3, state 1.*outside \[0, 1\].*got 1.5"):
        spillage_from_eigenvectors(u, u, bad, occ, _kpts())
    with pytest.raises(InputError, match="wrong shape"):
        spillage_from_overlap(np.zeros((NK, 2, 2)), np.ones((NK, 3)))
    scaled = u.copy()
    scaled[2] *= 1.1
    with pytest.raises(InputError, match="k index 2: psi_soc: .*not orthonormal"):
        spillage_from_eigenvectors(u, scaled, occ, occ, _kpts())
    with pytest.raises(InputError, match="not orthonormal"):
        spillage_from_overlap(np.full((1, 1, 1), 1.5))
    with pytest.raises(InputError, match="non-finite"):
        spillage_from_overlap(np.full((1, 1, 1), np.nan))
    with pytest.raises(InputError, match="kpts does not match"):
        spillage_from_eigenvectors(u, u, occ, occ, _kpts()[:2])
    with pytest.raises(InputError, match="width must be non-negative"):
        occupations_at_fermi_level(np.zeros((1, 1)), 0.0, -0.1)
