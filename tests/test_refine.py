"""Checks of the line-model linear algebra in zsieve.engine.refine against reference libraries.

The fast paths (NNLS on the normal equations, normal equations summed from the sparse line
windows, the pruned z scan) must give what the plain dense computations give with
scipy.optimize.nnls (Lawson & Hanson's algorithm, the reference implementation) and
numpy matrix products.
"""

import numpy as np
import pytest
from scipy.optimize import nnls

from zsieve.engine.identify import LineSet
from zsieve.engine.refine import LineModel, nnls_gain_normal, nnls_normal, nnls_weighted


def _problems(n, seed=0):
    rng = np.random.default_rng(seed)
    for _ in range(n):
        k = int(rng.integers(1, 16))
        m = int(rng.integers(k + 5, 120))
        G = np.abs(rng.normal(size=(m, k))) * (rng.random((m, k)) < 0.4)
        G[rng.integers(0, m, k), np.arange(k)] += 1.0  # no empty column
        w = rng.random(m) + 0.2
        r = G @ rng.normal(size=k) + rng.normal(size=m)
        yield G, w, r, rng


def test_nnls_normal_matches_scipy_nnls():
    for G, w, r, rng in _problems(300):
        sw = np.sqrt(w)
        a_ref, rn = nnls(G * sw[:, None], r * sw)  # scipy reference on the full weighted system
        gain_ref = float(r @ (w * r) - rn * rn)
        F, b = G.T @ (G * w[:, None]), G.T @ (w * r)
        if np.linalg.cond(F) > 1e10:
            continue
        for start in (None, rng.random(b.size) < 0.5, np.ones(b.size, bool), a_ref > 0):
            a, gain = nnls_normal(F, b, start=start)
            assert np.allclose(a, a_ref, rtol=1e-7, atol=1e-9 * max(1.0, np.abs(a_ref).max()))
            assert np.array_equal(a > 0, a_ref > 0)
            assert gain == pytest.approx(gain_ref, rel=1e-8, abs=1e-8)
        assert nnls_gain_normal(F[None], b[None])[0] == pytest.approx(gain_ref, rel=1e-8, abs=1e-8)
        assert nnls_weighted(G, w, r)[1] == pytest.approx(gain_ref, rel=1e-8, abs=1e-8)


def _lineset():
    # a quasar-like set: broad and narrow lines on top of each other (overlapping windows),
    # a fixed-ratio doublet (one column, two lines) and an absorption line
    names = ["H-beta broad", "H-beta", "[O III] 4960", "[O III] 5008", "Mg I 5175"]
    wave = np.array([4862.68, 4862.68, 4960.30, 5008.24, 5175.0])
    return LineSet("quasar", names, wave, np.array([1, 1, 1, 1, -1]), np.array([0, 1, 2, 2, 3]),
                   np.array([1.0, 1.0, 0.335, 1.0, 1.0]), np.ones(5), np.array([4000.0, 0, 0, 0, 0]),
                   np.array([-300.0, 0, 0, 0, 0]))


def test_sparse_normal_equations_equal_dense_products():
    ls = _lineset()
    wave = np.linspace(5000.0, 6000.0, 2500)
    ivar = np.random.default_rng(1).random(wave.size) + 0.5
    ivar[1200:1210] = 0.0
    resid = np.random.default_rng(2).normal(size=wave.size)
    m = LineModel(ls, wave, ivar, 70.0, 0.12, 100.0, broad_scale=2.0, z_slack=0.005)
    assert m.n_cols == 4
    rr = resid[m.pix]
    zs = 0.12 + np.linspace(-0.004, 0.004, 7)
    F, b = m.normal_equations(m._entry_profiles(zs, 80.0, 1.3), rr)
    for i, z in enumerate(zs):
        G = m.design(z, 80.0, 1.3)
        assert np.allclose(F[i], G.T @ (G * m.w[:, None]), rtol=1e-12, atol=1e-14 * np.abs(F[i]).max())
        assert np.allclose(b[i], G.T @ (m.w * rr), rtol=1e-12, atol=1e-14 * np.abs(b[i]).max())
        F1, b1 = m.normal_equations(m._entry_profiles(z, 80.0, 1.3), rr)
        assert np.allclose(F1, F[i], rtol=1e-12) and np.allclose(b1, b[i], rtol=1e-12)
    # the pruned scan finds the same best z as fitting every point with scipy's NNLS
    gains = [nnls_weighted(m.design(z, 80.0, 1.3), m.w, rr)[1] for z in zs]
    i_best, g_best = m.scan_best(rr, zs, 80.0, 1.3)
    assert i_best == int(np.argmax(gains))
    assert g_best == pytest.approx(max(gains), rel=1e-9)
    # the one-off fit and the iterative fit agree with the dense reference
    a_ref, g_ref = nnls_weighted(m.design(0.121, 80.0, 1.3), m.w, rr)
    a1, g1 = m.fit_linear(resid, 0.121, 80.0, 1.3)
    a2, g2, mod = m.fit_at(rr, 0.121, 80.0, 1.3, start=np.ones(m.n_cols, bool))
    assert np.allclose(a1, a_ref, atol=1e-10) and np.allclose(a2, a_ref, atol=1e-10)
    assert g1 == pytest.approx(g_ref, rel=1e-9) and g2 == pytest.approx(g_ref, rel=1e-9)
    assert np.allclose(mod, m.design(0.121, 80.0, 1.3) @ a2, rtol=1e-12, atol=1e-14)


def test_step_equations_with_amplitudes_resolved_equal_the_projected_jacobian():
    # Variable projection (Golub & Pereyra 1973, SIAM J. Numer. Anal. 10, 413; Kaufman 1975,
    # BIT 15, 49; from memory): with the amplitudes solved, the Gauss-Newton matrix of the
    # non-linear parameters is J_K^T W J_K with J_K = (I - G_A (G_A^T W G_A)^-1 G_A^T W) J,
    # the weighted projection computed here densely with numpy's least squares.
    ls = _lineset()
    wave = np.linspace(5000.0, 6000.0, 2500)
    ivar = np.random.default_rng(1).random(wave.size) + 0.5
    resid = np.random.default_rng(2).normal(size=wave.size)
    m = LineModel(ls, wave, ivar, 70.0, 0.12, 100.0, broad_scale=2.0, z_slack=0.005)
    rr = resid[m.pix] + m.design(0.1205, 80.0, 1.3) @ np.arange(1.0, m.n_cols + 1)
    a, _, _ = m.fit_at(rr, 0.1205, 80.0, 1.3)
    act = a > 0
    assert act.sum() >= 2
    cols = list(m.model_derivs(0.1205, 80.0, 1.3, a))
    A, C, X = m.amp_coupling(cols, act, (0.1205, 80.0, 1.3))
    J = np.column_stack(cols)
    G = m.design(0.1205, 80.0, 1.3)[:, act]
    sw = np.sqrt(m.w)
    coef = np.linalg.lstsq(G * sw[:, None], J * sw[:, None], rcond=None)[0]
    JK = J - G @ coef
    S = (J * m.w[:, None]).T @ J - C.T @ X
    ref = (JK * m.w[:, None]).T @ JK
    assert np.allclose(S, ref, rtol=1e-7, atol=1e-9 * np.abs(ref).max())
    assert np.allclose(m.project_out(cols, act, (0.1205, 80.0, 1.3)), JK, rtol=1e-7,
                       atol=1e-9 * np.abs(JK).max())
    # at another point than the last fit the coupling is not offered
    assert m.amp_coupling(cols, act, (0.1206, 80.0, 1.3)) is None
