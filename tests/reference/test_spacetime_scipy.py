"""The spacetime method's solver against scipy: DCT and penalised least squares.

References:
- scipy.fft.dctn / idctn with norm='ortho' (type II / III): the transforms used by the
  DCT-PLS of Garcia, D. (2010), Comput. Stat. Data Anal. 54:1167-1178.
- The penalised least squares problem of src/fill/dct_pls.hpp,
    minimise sum w (y - z)^2 + s_space ||(L_0 + L_1) z||^2 + s_time ||L_2 z||^2,
  L_k the second-difference matrix with reflecting ends along axis k, solved here directly as
  the sparse system (W + P) z = W y with scipy.sparse.linalg.spsolve: an implementation
  independent of the DCT (it never diagonalises anything).

Run: /usr/bin/python3 -m unittest -v tests/reference/test_spacetime_scipy.py
"""

import os
import sys
import unittest

import numpy as np
import scipy.fft
import scipy.sparse as sp
import scipy.sparse.linalg as spla

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def second_difference(n):
    """n x n second differences with reflecting ends: rows [-1 1], [1 -2 1], ..., [1 -1]."""
    if n == 1:
        return sp.csr_matrix((1, 1))
    main = -2.0 * np.ones(n)
    main[0] = main[-1] = -1.0
    off = np.ones(n - 1)
    return sp.diags([off, main, off], [-1, 0, 1], format="csr")


def direct_pls(y, w, s_space, s_time):
    n0, n1, n2 = y.shape
    eye = [sp.identity(n, format="csr") for n in (n0, n1, n2)]
    l0 = sp.kron(sp.kron(second_difference(n0), eye[1]), eye[2])
    l1 = sp.kron(sp.kron(eye[0], second_difference(n1)), eye[2])
    l2 = sp.kron(sp.kron(eye[0], eye[1]), second_difference(n2))
    ls = l0 + l1
    p = s_space * (ls.T @ ls) + s_time * (l2.T @ l2)
    wv = w.ravel()
    a = sp.diags(wv) + p
    z = spla.spsolve(a.tocsc(), wv * np.where(wv > 0, y.ravel(), 0.0))
    return z.reshape(y.shape)


def probe_dct(x, inverse):
    shape = (1,) * (3 - x.ndim) + x.shape
    out = kt.probe("dct %d %d %d %d" % ((1 if inverse else 0,) + shape), x.ravel())
    return out["y"].reshape(x.shape)


def probe_pls(y, w, s_space, s_time, single_tolerance=None):
    """The double solve to 1e-12, or with single_tolerance the single-precision one the
    spacetime fill uses (dct_pls.hpp, PlsSettings::single_precision) to that tolerance."""
    header = "pls %r %r %d %d %d" % ((s_space, s_time) + y.shape)
    if single_tolerance is not None:
        header = "pls_single %r %r %d %d %d %r" % ((s_space, s_time) + y.shape + (single_tolerance,))
    return kt.probe(header, y.ravel(), w.ravel())


class DctMatchesScipy(unittest.TestCase):

    def test_random_arrays(self):
        rng = np.random.default_rng(3)
        for shape in [(1,), (7,), (16,), (5, 9), (8, 8), (3, 4, 6), (6, 5, 7)]:
            x = kt.f32(rng.normal(size=shape))
            for inverse in (False, True):
                expected = (scipy.fft.idctn if inverse else scipy.fft.dctn)(x, type=2, norm="ortho")
                actual = probe_dct(x, inverse)
                np.testing.assert_allclose(actual, expected, atol=1e-12, rtol=1e-10,
                                           err_msg="shape %s inverse %s" % (shape, inverse))


class PlsMatchesDirectSolve(unittest.TestCase):

    def check(self, shape, s_space, s_time, missing, seed, empty_slots=(), hole=None):
        rng = np.random.default_rng(seed)
        y = kt.f32(rng.normal(size=shape) + np.linspace(0, 2, shape[-1]))
        w = (rng.random(shape) >= missing).astype(np.float64)
        w[..., list(empty_slots)] = 0.0
        if hole is not None:
            w[hole] = 0.0
        w[w > 0] = kt.f32(rng.uniform(0.3, 1.0, size=int(w.sum())))
        y_in = np.where(w > 0, y, np.nan)
        expected = direct_pls(y, w, s_space, s_time)
        label = "shape %s s %g/%g" % (shape, s_space, s_time)
        out = probe_pls(y_in, w, s_space, s_time)
        self.assertTrue(out["converged"], "did not converge: %s" % out)
        # The tolerance: 1e-5 (absolute, data of order 1).
        np.testing.assert_allclose(out["z"].reshape(shape), expected, atol=1e-5, rtol=0,
                                   err_msg=label)
        # The single-precision solve (the spacetime fill's), solved to 1e-6, is held to the same
        # 1e-5 (its largest difference on these cubes: 1.3e-6; to 1e-5 it reaches 1.1e-5).
        single = probe_pls(y_in, w, s_space, s_time, single_tolerance=1e-6)
        self.assertTrue(single["converged"], "single precision did not converge: %s" % single)
        np.testing.assert_allclose(single["z"].reshape(shape), expected, atol=1e-5, rtol=0,
                                   err_msg="single precision, " + label)

    def test_full_and_gappy_cubes(self):
        self.check((6, 5, 9), 1.0, 1.0, 0.0, 1)
        self.check((6, 5, 9), 3.0, 0.3, 0.4, 2)
        self.check((4, 7, 12), 0.1, 10.0, 0.7, 3)
        self.check((1, 1, 30), 1.0, 5.0, 0.5, 4)   # a single series: Whittaker-like
        self.check((9, 8, 1), 2.0, 1.0, 0.5, 5)    # a single date: spatial only

    def test_whole_dates_without_data(self):
        # Slots no pixel observed (winters, wholly cloudy dates) stay in the space-DCT domain
        # inside the solver; runs of them at the start, in the middle and at the end, on even
        # and odd shapes (odd run offsets need FFTW's unaligned plans).
        self.check((6, 5, 20), 3.0, 0.3, 0.3, 6, empty_slots=[0, 1, 2, 8, 9, 10, 11, 18, 19])
        self.check((7, 9, 13), 1.0, 2.0, 0.5, 7, empty_slots=[3, 5, 6, 12])
        self.check((1, 1, 15), 1.0, 5.0, 0.2, 8, empty_slots=[0, 7, 8, 14])

    def test_large_holes_solved_from_coarse_grids(self):
        # 32 px and more on both space axes: the solve starts from its coarse grids (a 20 x 19
        # grid here, dct_pls.cpp), which must leave the solution the same. A hole of 20 x 18 px
        # over five slots, scattered gaps and two slots without data.
        hole = (slice(10, 30), slice(12, 30), slice(3, 8))
        self.check((40, 37, 10), 3.0, 0.3, 0.3, 9, empty_slots=[0, 9], hole=hole)

    def test_fully_observed_small_smoothing_returns_input(self):
        # With w = 1 everywhere and s -> 0 the minimiser is y itself.
        rng = np.random.default_rng(7)
        y = kt.f32(rng.normal(size=(5, 6, 8)))
        out = probe_pls(y, np.ones_like(y), 1e-9, 1e-9)
        np.testing.assert_allclose(out["z"].reshape(y.shape), y, atol=1e-6)


if __name__ == "__main__":
    unittest.main(verbosity=2)
