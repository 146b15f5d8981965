#!/usr/bin/python3
"""`--method spacetime --robust`: bisquare reweighting rejects values that stand out (flag 1),
not clean values the smooth model happens to miss.
A value is rejected only where its residual stands out from its pixel's nearest residuals too
(a running median of three on either side), so that a season's curvature is not taken for noise.

Invented fields of a fictional district (mechanics only): 6 x 6 px fields, each with its own
level, steady through a year of 16-day composites, so that the field edges are sharp in space,
with noise of sd 0.005 and, on 1 % of the observed cells, a drop of 0.4 (an undetected cloud).
The smooth model misses the field edges; its residual scale is set by the many cells it fits
well, so clean edge cells had been rejected and rewritten. Now a value is rejected only where its
own series singles it out as well (its residual against the median of its pixel's three nearest
residuals on either side, scaled by 1.4826 MAD over the block). With Gaussian noise a bisquare
with c = 4.685 on 1.4826 MAD leaves a clean value out with probability 2 P(Z > 4.685) = 2.8e-6
(scipy.stats.norm), so almost none should go.

Run: /usr/bin/python3 -m unittest -v tests/integration/test_spacetime_robust.py
"""
import datetime as dt
import glob
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def fill_spacetime(test, folder, dates, planes, *options):
    """Writes `planes` (NaN: no observation) as composites of `dates` in `folder`, fills them
    with spacetime and `options`; returns the (date, band, row, column) array of the outputs."""
    os.makedirs(folder)
    for date, values in zip(dates, planes):
        kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date.isoformat()), np.asarray(values, np.float32),
                        geotransform=(500000, 250, 0, 4000000, 0, -250), epsg=32736)
    out = folder + "-out"
    done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--out", out, "--method", "spacetime"]
                          + list(options))
    test.assertEqual(done.returncode, 0, done.stderr)
    return np.array([kt.gdal().Open(path).ReadAsArray() for path in sorted(glob.glob(os.path.join(out, "ndvi_*.tif")))])


class RobustSpacetime(kt.TempDirTestCase):
    def test_drops_are_rejected_and_clean_edges_are_not(self):
        from scipy.stats import norm
        rng = np.random.default_rng(12)
        height, width = 36, 42
        fields = rng.uniform(0.15, 0.75, (height // 6 + 1, width // 6 + 1))
        level = np.kron(fields, np.ones((6, 6)))[:height, :width]
        dates = [dt.date(2031, 1, 1) + dt.timedelta(days=16 * k) for k in range(23)]
        observed = rng.random((len(dates), height, width)) > 0.25
        cloud = observed & (rng.random(observed.shape) < 0.01)
        planes = [np.where(observed[k], level + rng.normal(0, 0.005, (height, width)) - 0.4 * cloud[k], np.nan)
                  for k in range(len(dates))]
        rejected = fill_spacetime(self, os.path.join(self.tmp, "fields"), dates, planes, "--robust",
                                  "--threads", "2")[:, 2] == 1
        clean = observed & ~cloud
        caught = rejected[cloud].mean()
        wrongly = rejected[clean].mean()
        self.assertGreater(caught, 0.95, (caught, cloud.sum()))
        # 2.8e-6 expected of Gaussian noise; a cell beside a drop may go with it: at most 0.1 %.
        self.assertLess(2 * norm.sf(4.685), 3e-6)
        self.assertLess(wrongly, 0.001, (wrongly, rejected[clean].sum(), clean.sum()))

    def test_outliers_on_a_strong_season_are_still_rejected(self):
        # The same fields with a season of half-amplitude 0.25, monthly for three years, and
        # outliers of five kinds: single drops of 0.4, two and three cloudy composites in a row,
        # drops on a series' first or last date, spikes of +0.3. A first version of the rule above
        # compared the values, not the residuals, with their neighbours: the season's curvature
        # then passed for noise, and it kept 43 % of two-in-a-row drops and half the spikes (a
        # verifier); a second took the median of two neighbours on either side, which a run of
        # three moves, and kept half of such runs.
        rng = np.random.default_rng(21)
        height, width = 36, 36
        level = np.kron(rng.uniform(0.2, 0.5, (6, 6)), np.ones((6, 6)))
        amplitude = np.kron(rng.uniform(0.15, 0.25, (6, 6)), np.ones((6, 6)))
        dates = [dt.date(2031 + k // 12, k % 12 + 1, 1) for k in range(36)]
        truth = np.array([level + amplitude * np.cos(2 * np.pi * (d.timetuple().tm_yday - 200) / 365)
                          for d in dates]) + rng.normal(0, 0.03, (len(dates), height, width))
        observed = rng.random(truth.shape) > 0.2
        kinds = {name: np.zeros(truth.shape, bool) for name in ("drop", "pair", "triple", "end", "spike")}
        values = truth.copy()
        for r in range(height):
            for c in range(width):
                roll = rng.random()
                if roll > 0.2:
                    continue
                if roll > 0.16:  # three cloudy composites in a row (a wet season)
                    k = rng.integers(4, len(dates) - 6)
                    observed[k:k + 3, r, c] = True
                    kinds["triple"][k:k + 3, r, c] = True
                    values[k:k + 3, r, c] -= 0.4
                    continue
                seen = np.nonzero(observed[:, r, c])[0]
                if roll < 0.04:
                    k = rng.choice(seen[2:-2])
                    kinds["drop"][k, r, c] = True
                    values[k, r, c] -= 0.4
                elif roll < 0.08:
                    k = rng.integers(4, len(dates) - 5)
                    observed[k:k + 2, r, c] = True
                    kinds["pair"][k:k + 2, r, c] = True
                    values[k:k + 2, r, c] -= 0.4
                elif roll < 0.12:
                    k = seen[0] if rng.random() < 0.5 else seen[-1]
                    kinds["end"][k, r, c] = True
                    values[k, r, c] -= 0.4
                else:
                    k = rng.choice(seen[2:-2])
                    kinds["spike"][k, r, c] = True
                    values[k, r, c] += 0.3
        rejected = fill_spacetime(self, os.path.join(self.tmp, "season"), dates, np.where(observed, values, np.nan),
                                  "--robust", "--threads", "2")[:, 2] == 1
        for name, cells in kinds.items():
            self.assertGreater(cells.sum(), 20, name)
            self.assertGreater(rejected[cells].mean(), 0.9, (name, int(rejected[cells].sum()), int(cells.sum())))
        clean = observed & ~np.any(list(kinds.values()), axis=0)
        self.assertLess(rejected[clean].mean(), 0.001, (int(rejected[clean].sum()), int(clean.sum())))


class NothingToEstimateASpreadFrom(kt.TempDirTestCase):
    def test_one_observed_cell_gives_values_without_an_sd(self):
        # One observed cell in the whole stack: every other cell is filled with its value, and
        # no spread can be estimated. The sd had been 0 everywhere, a certainty no fill has; it
        # is NaN (unknown), with flag 2, as whittaker gives a series too short. Invented data.
        months = [dt.date(2031, k + 1, 1) for k in range(8)]
        planes = [np.full((8, 9), np.nan) for _ in range(6)]
        planes[2][4, 5] = 0.42
        for value, sd, flag in fill_spacetime(self, os.path.join(self.tmp, "one-cell"), months, planes):
            filled = flag == 2
            self.assertTrue(filled.any())
            np.testing.assert_allclose(value[filled], 0.42, atol=1e-6)
            self.assertTrue(np.isnan(sd[filled]).all())
        # With more to go on, every filled value keeps an sd, also where the field is constant
        # (a first version of the rule had left 241 of 1457 filled cells of such a stack NaN).
        rng = np.random.default_rng(9)
        planes = [np.where(rng.random((12, 12)) < 0.3, np.nan, 0.5) for _ in range(8)]
        for value, sd, flag in fill_spacetime(self, os.path.join(self.tmp, "constant"), months, planes):
            self.assertTrue(np.isfinite(sd[flag == 2]).all())


if __name__ == "__main__":
    unittest.main(verbosity=2)
