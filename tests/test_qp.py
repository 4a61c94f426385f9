"""The upper level's QP solver (negotiate.core.qp) against independent checks.

* KKT conditions of a convex QP (Nocedal & Wright, *Numerical Optimization*, 2nd ed., Thm 16.4 and eq.
  16.37): a point that is feasible, stationary with multipliers of the right sign and complementary is the
  global minimiser. Checked here with our own arithmetic on the returned point and multipliers.
* QPs with a known optimum by construction (common practice for generating QP test problems): pick the
  minimiser, its active rows and bounds and positive multipliers, then set the linear term so that the KKT
  conditions hold there. With a positive definite Hessian the minimiser is unique (Nocedal & Wright,
  Thm 16.4), and with linearly independent active gradients so are the multipliers, so the solver must
  return exactly these, whatever solver produced them. (An iterative reference such as SLSQP can itself
  fail on such instances; a closed form cannot.)
* Projection onto a box, in closed form (clipping).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from negotiate.core.qp import solve_qp


def random_qp(seed: int, n: int = 6, m: int = 8):
    rng = np.random.default_rng(seed)
    L = rng.normal(size=(n, n))
    H = L @ L.T + 0.1 * np.eye(n)
    g = rng.normal(size=n) * 3
    A = rng.normal(size=(m, n))
    z_feas = rng.uniform(-0.5, 0.5, size=n)
    uba = A @ z_feas + rng.uniform(0.0, 0.5, size=m)  # z_feas is strictly feasible
    lba = np.full(m, -np.inf)
    lbz, ubz = np.full(n, -1.0), np.full(n, 1.0)
    return H, g, A, lba, uba, lbz, ubz


def kkt_residual(H, g, A, uba, lbz, ubz, r) -> dict[str, float]:
    z, la, lz = r.z, r.lam_a, r.lam_z
    return {
        "stationarity": float(np.max(np.abs(H @ z + g + A.T @ la + lz))),  # CasADi's sign convention
        "primal": float(max(np.max(A @ z - uba), np.max(lbz - z), np.max(z - ubz), 0.0)),
        "dual_rows": float(max(-np.min(la), 0.0)),  # only upper row bounds here: lam_a >= 0
        "complementarity": float(np.max(np.abs(la * (A @ z - uba)))),
    }


def qp_with_known_optimum(seed: int, n: int = 6, m: int = 8):
    """A strictly convex QP ``min 0.5 z'Hz + g'z, A z <= uba, -1 <= z <= 1`` and its optimum (z, lam_a, lam_z).

    Up to three rows and two bounds are active with multipliers in [0.5, 2] (at most 5 < n active
    gradients of random directions: linearly independent with probability one); inactive rows keep a slack
    of at least 0.1, inactive variables stay at least 0.1 inside the box."""
    rng = np.random.default_rng(seed)
    L = rng.normal(size=(n, n))
    H = L @ L.T + 0.1 * np.eye(n)
    A = rng.normal(size=(m, n))
    z = rng.uniform(-0.9, 0.9, size=n)
    lam_z = np.zeros(n)
    for i in rng.choice(n, size=rng.integers(0, 3), replace=False):
        side = rng.choice([-1.0, 1.0])
        z[i] = side  # on its bound; CasADi's sign: positive at an upper bound, negative at a lower one
        lam_z[i] = side * rng.uniform(0.5, 2.0)
    lam_a = np.zeros(m)
    active = rng.choice(m, size=rng.integers(1, 4), replace=False)
    lam_a[active] = rng.uniform(0.5, 2.0, size=active.size)
    uba = A @ z + np.where(lam_a > 0, 0.0, rng.uniform(0.1, 0.5, size=m))
    g = -(H @ z + A.T @ lam_a + lam_z)  # stationarity: H z + g + A' lam_a + lam_z = 0
    return (H, g, A, np.full(m, -np.inf), uba, -np.ones(n), np.ones(n)), (z, lam_a, lam_z)


@pytest.mark.parametrize("seed", range(12))
def test_random_qps_satisfy_kkt_and_match_known_optimum(seed):
    (H, g, A, lba, uba, lbz, ubz), (z_opt, lam_a_opt, lam_z_opt) = qp_with_known_optimum(seed)
    r = solve_qp(H, g, A, lba, uba, lbz, ubz)
    assert r.success, r.message
    res = kkt_residual(H, g, A, uba, lbz, ubz, r)
    assert res["stationarity"] < 1e-8 and res["primal"] < 1e-10
    assert res["dual_rows"] < 1e-9 and res["complementarity"] < 1e-9
    # The data are O(1) and H is well conditioned (smallest eigenvalue >= 0.1), so a KKT residual of 1e-8
    # bounds the distance to the unique optimum by about 1e-7; 1e-6 leaves room for the multipliers.
    np.testing.assert_allclose(r.z, z_opt, atol=1e-6)
    np.testing.assert_allclose(r.lam_a, lam_a_opt, atol=1e-6)
    np.testing.assert_allclose(r.lam_z, lam_z_opt, atol=1e-6)
    np.testing.assert_allclose(r.value, 0.5 * z_opt @ H @ z_opt + g @ z_opt, rtol=1e-9, atol=1e-9)


def test_active_constraints_hold_exactly_after_polishing():
    """Active rows and bounds hold to rounding (1e-13), as at an active-set solver's vertex."""
    H, g, A, lba, uba, lbz, ubz = random_qp(3)
    r = solve_qp(H, g, A, lba, uba, lbz, ubz)
    active_rows = r.lam_a > 1e-8
    active_bounds = np.abs(r.lam_z) > 1e-8
    assert active_rows.any() or active_bounds.any()
    np.testing.assert_allclose((A @ r.z)[active_rows], uba[active_rows], atol=1e-13)
    on_bound = np.where(r.lam_z[active_bounds] > 0, ubz[active_bounds], lbz[active_bounds])
    np.testing.assert_allclose(r.z[active_bounds], on_bound, atol=1e-13)


def test_box_projection_is_clipping():
    """Nearest point of a box: clip (closed form). Sparse input, rows that never bind."""
    rng = np.random.default_rng(0)
    y = rng.normal(size=50) * 2
    A = sp.random_array((30, 50), density=0.1, random_state=1)
    r = solve_qp(sp.eye_array(50), -y, A, np.full(30, -np.inf), np.full(30, 1e3), -np.ones(50), np.ones(50))
    assert r.success
    np.testing.assert_array_equal(r.z, np.clip(y, -1, 1))  # bit for bit: polished onto the bounds


def test_dense_and_sparse_inputs_agree():
    H, g, A, lba, uba, lbz, ubz = random_qp(5)
    d = solve_qp(H, g, A, lba, uba, lbz, ubz)
    s = solve_qp(sp.csr_array(H), g, sp.csc_array(A), lba, uba, lbz, ubz)
    np.testing.assert_allclose(d.z, s.z, atol=1e-12)


def test_infeasible_qp_is_a_status_not_an_exception():
    """z <= -1 and z >= 0: no point; every solver in the chain fails and says so."""
    r = solve_qp(np.eye(1), np.zeros(1), np.array([[1.0]]), np.array([-np.inf]), np.array([-1.0]), [0.0], [1.0])
    assert not r.success and r.message
