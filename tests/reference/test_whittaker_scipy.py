"""The Whittaker kernel (through build/tests/kalends_probe) against scipy / numpy.

Model, as documented for kalends:
  z solves (W + lambda D'D) z = W y, D the d-th order difference matrix
    [Eilers, P.H.C. (2003), A perfect smoother, Anal. Chem. 75:3631-3636, eq. for the weighted
    smoother: (W + lambda D'D) z = W y].
  tr H with H = (W + lambda P)^-1 W; sigma^2 = sum w (y - z)^2 / (m - tr H)
    [the diagonal of the inverse: Hutchinson, M.F. & de Hoog, F.R. (1985), Numer. Math.
    47:99-106; here checked against a dense numpy inverse];
  sd_i = s sqrt((W + lambda P)^-1_ii) sqrt(nu / (nu - 2)), s = max(sigma, s_GSJ), nu = m - 2,
    where y_i was observed; at a gap the prediction's sd, sqrt(sd_i^2 + sigma^2) (the curve's
    variance plus one observation's noise about it, as least squares' prediction interval:
    Draper & Smith, Applied Regression Analysis, from memory),
  s_GSJ^2 = mean over interior observations of (a y_{i-1} + b y_{i+1} - y_i)^2 / (a^2 + b^2 + 1)
    [Gasser, T., Sroka, L. & Jennen-Steinmetz, C. (1986), Biometrika 73:625-633, from memory;
    the t factor is the sd of Student's t with nu degrees of freedom].
  GCV(lambda) = m RSS / (m - tr H)^2 [Craven, P. & Wahba, G. (1979), Numer. Math. 31:377-403],
  minimised over log10 lambda = -2, -1.5, ..., 6, then +-0.25 around the best grid point.

References here are computed independently: D from numpy.diff of the identity, the solve with
scipy.sparse.linalg.spsolve, the inverse with numpy.linalg.inv. Inputs are float32 values
(the probe reads float32), so the reference uses exactly the same numbers.

Run: /usr/bin/python3 -m unittest -v tests/reference/test_whittaker_scipy.py
"""

import os
import sys
import unittest

import numpy as np
import scipy.sparse
import scipy.sparse.linalg

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

# The requirement for agreement with the reference solve.
REL_TOL = 1e-6


def difference_matrix(n, order):
    """D: (n - order) x n, rows of binomial coefficients with alternating sign (numpy.diff)."""
    return np.diff(np.eye(n), n=order, axis=0)


def reference_fit(y, w, lam, order):
    """Weighted Whittaker solve with scipy, plus trace, sigma, sd and GCV from dense numpy."""
    n = len(y)
    w = np.where(np.isfinite(y), w, 0.0)
    yy = np.where(np.isfinite(y), y, 0.0)
    d = scipy.sparse.csc_matrix(difference_matrix(n, order))
    wm = scipy.sparse.diags(w)
    a = (wm + lam * (d.T @ d)).tocsc()
    z = scipy.sparse.linalg.spsolve(a, w * yy)
    inv = np.linalg.inv(a.toarray())
    trace = float(np.trace(inv @ np.diag(w)))
    m = int(np.sum(w > 0))
    rss = float(np.sum(w * (yy - z) ** 2))
    sigma = np.sqrt(rss / (m - trace))
    x = np.flatnonzero(w > 0).astype(float)
    obs = yy[w > 0].astype(float)
    a = (x[2:] - x[1:-1]) / (x[2:] - x[:-2])
    b = (x[1:-1] - x[:-2]) / (x[2:] - x[:-2])
    gsj = np.mean((a * obs[:-2] + b * obs[2:] - obs[1:-1]) ** 2 / (a * a + b * b + 1))
    nu = m - 2
    sd = max(sigma, np.sqrt(gsj)) * np.sqrt(nu / (nu - 2)) * np.sqrt(np.diag(inv))
    sd = np.where(w > 0, sd, np.sqrt(sd ** 2 + sigma ** 2))
    gcv = m * rss / (m - trace) ** 2
    return {"z": z, "trace": trace, "sigma": sigma, "sd": sd, "gcv": gcv}


def probe_whittaker(y, w, lam, order, robust=0, envelope=0):
    header = "whittaker %s %d %d %d %d" % (lam if isinstance(lam, str) else repr(float(lam)),
                                          order, robust, envelope, len(y))
    return kt.probe(header, y, w)


def weight_patterns(n, rng):
    """The weight patterns of the brief; y may carry NaN where a value is missing."""
    ones = np.ones(n)
    random01 = (rng.random(n) > 0.4).astype(float)
    random01[[0, n // 2, n - 1]] = 1.0  # keep a spread of observations
    long_gap = np.ones(n)
    start = n // 2 - 7
    long_gap[start:start + 15] = 0.0
    ends = np.ones(n)
    ends[:4] = 0.0
    ends[-5:] = 0.0
    nonbinary = kt.f32(rng.uniform(0.2, 1.0, n))
    return {"ones": ones, "random01": random01, "gap15": long_gap, "ends": ends,
            "nonbinary": nonbinary}


class WhittakerAgainstScipy(unittest.TestCase):

    def setUp(self):
        kt.require_binary(kt.KALENDS_PROBE)

    def check_fixed(self, y, w, lam, order, label):
        got = probe_whittaker(y, w, lam, order)
        ref = reference_fit(y, w, lam, order)
        self.assertEqual(len(got["z"]), len(y))
        self.assertTrue(np.all(np.isfinite(got["z"])), label)
        self.assertLess(kt.rel_diff(got["z"], ref["z"]), REL_TOL, label + " z")
        self.assertLess(abs(got["trace"] - ref["trace"]) / ref["trace"], REL_TOL, label + " trace")
        self.assertLess(abs(got["sigma"] - ref["sigma"]) / ref["sigma"], REL_TOL, label + " sigma")
        self.assertLess(kt.rel_diff(got["sd"], ref["sd"]), REL_TOL, label + " sd")
        self.assertAlmostEqual(got["lambda"], lam, delta=1e-12 * lam)
        # Fixed lambda, no robust and no envelope: nothing is ever rejected.
        self.assertTrue(np.all(got["rejected"] == 0), label + " rejected")

    def test_fixed_lambda_orders_weights_sizes(self):
        rng = np.random.default_rng(20240601)
        cases = 0
        for n in (23, 69, 150):
            patterns = weight_patterns(n, rng)
            for pattern, w in patterns.items():
                for order in (1, 2, 3):
                    for lam in (0.1, 10.0, 1e4):
                        t = np.arange(n)
                        y = kt.f32(0.5 + 0.3 * np.sin(2 * np.pi * t / 23.0) +
                                   0.05 * rng.standard_normal(n))
                        wi = w
                        if pattern == "random01":
                            # Missing written both ways: weight 0, or NaN value with weight 1.
                            y = np.where((w == 0) & (t % 2 == 0), np.nan, y)
                            wi = np.where(np.isnan(y), 1.0, w)
                        label = "n=%d %s order=%d lambda=%g" % (n, pattern, order, lam)
                        with self.subTest(label):
                            self.check_fixed(y, wi, lam, order, label)
                        cases += 1
        self.assertEqual(cases, 3 * 5 * 3 * 3)

    def test_the_largest_lambda_allowed_still_solves_in_double_precision(self):
        # 1e10 is the largest --lambda taken: rounding then stays below about 1e-5 of the
        # values' scale (measured: 5e-6 at order 3) against scipy's sparse LU solve.
        rng = np.random.default_rng(7)
        for n in (23, 150, 736):
            for order in (1, 2, 3):
                w = (rng.random(n) > 0.4).astype(float)
                w[[0, n - 1]] = 1.0
                t = np.arange(n)
                y = kt.f32(0.5 + 0.3 * np.sin(2 * np.pi * t / 23.0) + 0.05 * rng.standard_normal(n))
                got = probe_whittaker(y, w, 1e10, order)
                ref = reference_fit(y, w, 1e10, order)
                with self.subTest(n=n, order=order):
                    self.assertLess(np.max(np.abs(got["z"] - ref["z"])), 2e-5)
                    self.assertLess(np.max(np.abs(got["sd"] - ref["sd"]) / ref["sd"]), 2e-5)

    def test_outlier_not_rejected_without_robust(self):
        # A huge spike: with ROBUST=0 ENVELOPE=0 it must stay in the plain weighted solution.
        n = 40
        t = np.arange(n)
        y = kt.f32(0.4 + 0.2 * np.cos(2 * np.pi * t / 20.0))
        y[17] = np.float32(-5.0)
        w = np.ones(n)
        got = probe_whittaker(y, w, 10.0, 2)
        ref = reference_fit(y, w, 10.0, 2)
        self.assertTrue(np.all(got["rejected"] == 0))
        self.assertLess(kt.rel_diff(got["z"], ref["z"]), REL_TOL)

    def test_too_few_observations_give_nan(self):
        # m < order + 1: nothing to estimate; m = order + 1 is the smallest fittable case.
        n = 12
        for order in (1, 2, 3):
            y = kt.f32(np.linspace(0.1, 0.9, n))
            w = np.zeros(n)
            w[[2, 5, 9][:order]] = 1.0
            got = probe_whittaker(y, w, 10.0, order)
            self.assertTrue(np.all(np.isnan(got["z"])), "order %d, m=%d" % (order, order))
            w[[1, 4, 8, 11][:order + 1]] = 1.0
            got = probe_whittaker(y, w, 10.0, order)
            self.assertTrue(np.all(np.isfinite(got["z"])), "order %d, m=%d" % (order, order + 1))

    def test_auto_lambda_minimises_gcv(self):
        rng = np.random.default_rng(7)
        grid = [k / 2.0 for k in range(-4, 13)]  # log10 lambda = -2 .. 6 in steps of 0.5
        series = []
        for n in (23, 69, 150):
            t = np.arange(n)
            for noise in (0.02, 0.1):
                y = 0.5 + 0.3 * np.sin(2 * np.pi * t / 23.0) + noise * rng.standard_normal(n)
                series.append(("sine n=%d noise=%g" % (n, noise), y))
            series.append(("pure noise n=%d" % n, 0.1 * rng.standard_normal(n)))
            series.append(("trend n=%d" % n, 0.01 * t + 0.05 * rng.standard_normal(n)))
        for label, y in series:
            n = len(y)
            y = kt.f32(y)
            w = (rng.random(n) > 0.3).astype(float)
            w[[0, n - 1]] = 1.0
            for order in (1, 2, 3):
                with self.subTest(label + " order=%d" % order):
                    got = probe_whittaker(y, w, "auto", order)
                    gcv = {e: reference_fit(y, w, 10.0 ** e, order)["gcv"] for e in grid}
                    best = min(gcv, key=gcv.get)
                    for e in (best - 0.25, best + 0.25):
                        if -2 - 1e-9 <= e <= 6 + 1e-9:
                            gcv[e] = reference_fit(y, w, 10.0 ** e, order)["gcv"]
                    chosen = np.log10(got["lambda"])
                    # The chosen lambda is one of the evaluated candidates ...
                    match = [e for e in gcv if abs(e - chosen) < 1e-9]
                    self.assertEqual(len(match), 1, "lambda %g not a candidate" % got["lambda"])
                    # ... and its GCV is the smallest (ties may differ in the last digit).
                    low = min(gcv.values())
                    self.assertLessEqual(gcv[match[0]], low * (1 + 1e-9),
                                         "GCV %g at chosen lambda, %g at %g" %
                                         (gcv[match[0]], low, 10 ** min(gcv, key=gcv.get)))
                    ref = reference_fit(y, w, got["lambda"], order)
                    self.assertLess(abs(got["gcv"] - ref["gcv"]) / ref["gcv"], REL_TOL)
                    self.assertLess(kt.rel_diff(got["z"], ref["z"]), REL_TOL)
                    self.assertLess(abs(got["trace"] - ref["trace"]) / ref["trace"], REL_TOL)

    def test_sd_with_few_observations_is_not_collapsed(self):
        # Invented series (mechanics of the sd, no accuracy claim): a seasonal curve seen on 6-10
        # of 46 slots with noise sd 0.03, lambda by GCV. With sigma = RSS / (m - tr H) alone, 3.6 %
        # of the gap cells had an error beyond 4 sd (GCV often picks a nearly interpolating curve
        # and sigma collapses; Chebyshev allows at most 6 %, a Gaussian 0.006 %); with the
        # difference-based floor 0.3 %. The floor errs the other way here: curvature between such
        # sparse observations inflates it (median |error| / sd 0.05, against 0.67 if calibrated).
        rng = np.random.default_rng(11)
        n = 46
        t = np.arange(n)
        ratios, missing_sd = [], 0
        for _ in range(300):
            clean = 0.5 + 0.25 * np.sin(2 * np.pi * (t + rng.uniform(0, 23)) / 23.0)
            m = int(rng.integers(6, 11))
            seen = np.sort(rng.choice(n, size=m, replace=False))
            w = np.zeros(n)
            w[seen] = 1.0
            y = kt.f32(np.where(w > 0, clean + 0.03 * rng.standard_normal(n), np.nan))
            got = probe_whittaker(y, np.ones(n), "auto", 2)
            gap = (w == 0) & (t > seen[0]) & (t < seen[-1])  # interpolation, not extrapolation
            sd = got["sd"][gap]
            missing_sd += int(np.sum(~np.isfinite(sd)))
            ratios.extend((got["z"][gap] - clean[gap]) / sd)
        ratios = np.abs(np.asarray(ratios))
        self.assertEqual(missing_sd, 0)
        self.assertLess(float(np.mean(ratios > 4)), 0.01)

    def test_no_sd_below_five_observations(self):
        # The noise estimate then rests on at most 2 differences: Student's t with nu <= 2 has
        # no finite sd, so the curve is given without one.
        n = 30
        t = np.arange(n)
        for m in (3, 4, 5):
            w = np.zeros(n)
            w[np.linspace(2, 27, m).astype(int)] = 1.0
            y = kt.f32(0.4 + 0.1 * np.sin(t / 4.0))
            got = probe_whittaker(y, w, 10.0, 2)
            self.assertTrue(np.all(np.isfinite(got["z"])), "m=%d" % m)
            if m < 5:
                self.assertTrue(np.all(np.isnan(got["sd"])), "m=%d" % m)
            else:
                self.assertTrue(np.all(np.isfinite(got["sd"])), "m=%d" % m)

    def test_robust_rejects_a_spike(self):
        # Mechanics with invented data: a spike of about 100 noise sd is an outlier by any
        # robust criterion; with ROBUST=1 it is rejected and the curve ignores it.
        rng = np.random.default_rng(3)
        n = 46
        t = np.arange(n)
        clean = 0.5 + 0.3 * np.sin(2 * np.pi * t / 23.0)
        y = kt.f32(clean + 0.01 * rng.standard_normal(n))
        y[20] = np.float32(y[20] + 1.0)
        y[33] = np.float32(y[33] - 1.0)
        w = np.ones(n)
        got = probe_whittaker(y, w, 10.0, 2, robust=1)
        self.assertEqual(got["rejected"][20], 1)
        self.assertEqual(got["rejected"][33], 1)
        self.assertLessEqual(int(got["rejected"].sum()), 4)
        self.assertLess(abs(got["z"][20] - clean[20]), 0.1)
        self.assertLess(abs(got["z"][33] - clean[33]), 0.1)

    def test_upper_envelope_rejects_only_low_values(self):
        # Mechanics with invented data: ENVELOPE=1 down-weights values below the curve (cloud
        # lowers NDVI), never those above it.
        rng = np.random.default_rng(4)
        n = 46
        t = np.arange(n)
        clean = 0.5 + 0.3 * np.sin(2 * np.pi * t / 23.0)
        y = kt.f32(clean + 0.01 * rng.standard_normal(n))
        y[12] = np.float32(y[12] - 0.5)
        y[30] = np.float32(y[30] + 0.5)
        got = probe_whittaker(y, np.ones(n), 10.0, 2, envelope=1)
        self.assertEqual(got["rejected"][12], 1)
        self.assertEqual(got["rejected"][30], 0)


if __name__ == "__main__":
    unittest.main(verbosity=2)
