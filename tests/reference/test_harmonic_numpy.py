"""The harmonic-regression kernel (through build/tests/kalends_probe) against numpy.

Model, as documented for kalends: columns [1, (t - mean(t))/365.25 if trend,
cos(2 pi j t / 365.25), sin(2 pi j t / 365.25), j = 1..K], mean(t) over all given days; weighted
least squares; sd = sigma sqrt(x' (X'WX)^-1 x) where the observation was used, sigma sqrt(1 +
x' (X'WX)^-1 x) where not, sigma^2 = RSS / (m - p) (the textbook
standard errors of a fitted value and of a prediction, weighted least squares, e.g. Draper & Smith, Applied
Regression Analysis, 3rd ed. 1998, ch. 3 -- cited from memory). Rejection: observations whose
residual is below -REJECT_BELOW * sigma are dropped and the fit repeated until none is (the
fit-reject-refit loop for cloud-lowered values of Roerink, Menenti & Verhoef 2000, Int. J.
Remote Sens. 21:1911-1917).

The reference is numpy.linalg.lstsq on the sqrt(w)-weighted design, built here from the
formula above. Inputs are float32 (the probe reads float32 days, values and weights).

Run: /usr/bin/python3 -m unittest -v tests/reference/test_harmonic_numpy.py
"""

import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

REL_TOL = 1e-6  # the requirement
YEAR = 365.25
NO_REJECTION = 1e9


def design(days, k, trend):
    cols = [np.ones_like(days)]
    if trend:
        cols.append((days - days.mean()) / YEAR)
    for j in range(1, k + 1):
        cols.append(np.cos(2 * np.pi * j * days / YEAR))
        cols.append(np.sin(2 * np.pi * j * days / YEAR))
    return np.column_stack(cols)


def weighted_lstsq(days, y, w, k, trend, use=None):
    """Coefficients, curve at every day, sd and sigma from numpy.linalg.lstsq."""
    x = design(days, k, trend)
    ok = (w > 0) & np.isfinite(y)
    if use is not None:
        ok &= use
    sw = np.sqrt(w[ok])
    beta, *_ = np.linalg.lstsq(x[ok] * sw[:, None], y[ok] * sw, rcond=None)
    m, p = int(ok.sum()), x.shape[1]
    rss = float(np.sum(w[ok] * (y[ok] - x[ok] @ beta) ** 2))
    sigma = np.sqrt(rss / (m - p))
    cov = np.linalg.inv((x[ok] * w[ok][:, None]).T @ x[ok])
    # Where no observation was used, the prediction standard error (Draper & Smith, as above).
    sd = sigma * np.sqrt(np.einsum("ij,jk,ik->i", x, cov, x) + np.where(ok, 0.0, 1.0))
    return {"coefficients": beta, "z": x @ beta, "sd": sd, "sigma": sigma, "use": ok}


def probe_harmonic(days, y, w, k, trend, reject_below=NO_REJECTION):
    header = "harmonic %d %d %r %d" % (k, int(trend), float(reject_below), len(days))
    return kt.probe(header, days, y, w)


def irregular_days(rng, n, span=1000.0):
    """Sorted, distinct, irregular days in quarter-day steps (exact in float32)."""
    quarters = np.sort(rng.choice(int(span * 4), size=n, replace=False))
    return quarters / 4.0


class HarmonicAgainstNumpy(unittest.TestCase):

    def setUp(self):
        kt.require_binary(kt.KALENDS_PROBE)

    def test_weighted_fit_equals_lstsq(self):
        rng = np.random.default_rng(11)
        for n in (30, 61, 120):
            for k in (1, 2, 3):
                for trend in (False, True):
                    for pattern in ("ones", "missing", "nonbinary"):
                        label = "n=%d K=%d trend=%s %s" % (n, k, trend, pattern)
                        days = irregular_days(rng, n)
                        y = kt.f32(0.4 + 0.25 * np.cos(2 * np.pi * (days - 200) / YEAR) +
                                   0.05 * np.sin(4 * np.pi * days / YEAR) + 1e-4 * days +
                                   0.03 * rng.standard_normal(n))
                        if pattern == "ones":
                            w = np.ones(n)
                        elif pattern == "missing":
                            # Unbalanced: the last fifth missing, so mean(t) over all days
                            # differs from the mean over observed days.
                            w = (rng.random(n) > 0.25).astype(float)
                            w[int(0.8 * n):] = 0.0
                            y = np.where(rng.random(n) < 0.1, np.nan, y)
                        else:
                            w = kt.f32(rng.uniform(0.2, 1.0, n))
                        with self.subTest(label):
                            got = probe_harmonic(days, y, w, k, trend)
                            ref = weighted_lstsq(days, y, w, k, trend)
                            self.assertEqual(len(got["coefficients"]), 1 + trend + 2 * k)
                            self.assertLess(kt.rel_diff(got["coefficients"], ref["coefficients"]),
                                            REL_TOL, label)
                            self.assertLess(kt.rel_diff(got["z"], ref["z"]), REL_TOL, label)
                            self.assertLess(kt.rel_diff(got["sd"], ref["sd"]), REL_TOL, label)
                            self.assertLess(abs(got["sigma"] - ref["sigma"]) / ref["sigma"],
                                            REL_TOL, label)
                            self.assertTrue(np.all(got["rejected"] == 0), label)

    def test_low_values_are_rejected_and_refit(self):
        rng = np.random.default_rng(5)
        for k in (1, 2, 3):
            for trend in (False, True):
                label = "K=%d trend=%s" % (k, trend)
                n = 60
                days = irregular_days(rng, n, span=730.0)
                clean = 0.5 + 0.25 * np.cos(2 * np.pi * (days - 180) / YEAR)
                # Uniform noise: never beyond sqrt(3) noise sd, so only the pushed values can
                # fall three residual sd under the curve.
                y = kt.f32(clean + rng.uniform(-0.02, 0.02, n))
                low = np.sort(rng.choice(n, size=4, replace=False))
                y[low] = kt.f32(y[low] - 0.6)
                w = np.ones(n)
                with self.subTest(label):
                    got = probe_harmonic(days, y, w, k, trend, reject_below=3.0)
                    self.assertEqual(list(np.flatnonzero(got["rejected"])), list(low), label)
                    keep = np.ones(n, dtype=bool)
                    keep[low] = False
                    ref = weighted_lstsq(days, y, w, k, trend, use=keep)
                    self.assertLess(kt.rel_diff(got["coefficients"], ref["coefficients"]),
                                    REL_TOL, label)
                    self.assertLess(kt.rel_diff(got["z"], ref["z"]), REL_TOL, label)
                    self.assertLess(kt.rel_diff(got["sd"], ref["sd"]), REL_TOL, label)
                    # With no rejection the same series gives the plain fit with all values.
                    plain = probe_harmonic(days, y, w, k, trend)
                    ref_all = weighted_lstsq(days, y, w, k, trend)
                    self.assertTrue(np.all(plain["rejected"] == 0))
                    self.assertLess(kt.rel_diff(plain["z"], ref_all["z"]), REL_TOL, label)

    def test_rejection_iterates_against_numpy_loop(self):
        # The documented loop, run in numpy: reject residual < -R sigma, refit, until none.
        rng = np.random.default_rng(8)
        for seed_round in range(6):
            n = 80
            days = irregular_days(rng, n, span=1000.0)
            y = kt.f32(0.45 + 0.2 * np.sin(2 * np.pi * days / YEAR) +
                       0.03 * rng.standard_normal(n))
            cloudy = rng.random(n) < 0.15
            y = np.where(cloudy, kt.f32(y - rng.uniform(0.05, 0.4, n)), y)
            w = np.ones(n)
            k, trend, r = 2, bool(seed_round % 2), 2.0
            use = np.ones(n, dtype=bool)
            for _ in range(100):  # until none is dropped (these series settle in a few rounds)
                fit = weighted_lstsq(days, y, w, k, trend, use=use)
                resid = y - fit["z"]
                drop = use & (resid < -r * fit["sigma"])
                if not drop.any() or use.sum() - drop.sum() < max(2 * fit["coefficients"].size,
                                                                  fit["coefficients"].size + 1):
                    break
                use &= ~drop
            with self.subTest(round=seed_round):
                got = probe_harmonic(days, y, w, k, trend, reject_below=r)
                self.assertEqual(list(np.flatnonzero(got["rejected"])), list(np.flatnonzero(~use)))
                self.assertLess(kt.rel_diff(got["z"], fit["z"]), REL_TOL)

    def test_too_few_observations_give_nan(self):
        # p coefficients need m >= max(p + 1, 2p) observations.
        rng = np.random.default_rng(2)
        for k, trend in ((1, False), (2, False), (2, True), (3, True)):
            p = 1 + trend + 2 * k
            need = max(p + 1, 2 * p)
            n = need + 6
            days = irregular_days(rng, n, span=700.0)
            y = kt.f32(0.5 + 0.2 * np.cos(2 * np.pi * days / YEAR) + 0.01 * rng.standard_normal(n))
            w = np.zeros(n)
            w[rng.choice(n, size=need - 1, replace=False)] = 1.0
            got = probe_harmonic(days, y, w, k, trend)
            self.assertTrue(np.all(np.isnan(got["z"])), "K=%d trend=%s m=%d" % (k, trend, need - 1))
            w[np.flatnonzero(w == 0)[0]] = 1.0
            got = probe_harmonic(days, y, w, k, trend)
            self.assertTrue(np.all(np.isfinite(got["z"])), "K=%d trend=%s m=%d" % (k, trend, need))

    def test_singular_design_gives_nan(self):
        # Every observation on the same day of the year: the sine columns are all ~0 and the
        # cosine columns all ~1, so X'WX is singular; no fit can be made.
        days = np.array([10.0 + YEAR * i for i in range(12)])
        y = kt.f32(0.3 + 0.01 * np.arange(12))
        got = probe_harmonic(kt.f32(days), y, np.ones(12), 1, False)
        self.assertTrue(np.all(np.isnan(got["z"])))


if __name__ == "__main__":
    unittest.main(verbosity=2)
