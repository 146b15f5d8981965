#!/usr/bin/python3
"""The demo scenario end to end at a small size: fill, seasons, compare.

Invented data (tools/synth_stack.py, a fictional district): checks of the mechanics the issue
asks for, not accuracy claims. The district's north has one rainy season and its south two; in
the invented drought year the south's rains fail.
"""
import json
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "tools"))
import kalends_testlib as kt  # noqa: E402
import synth_stack  # noqa: E402


class DemoSeasons(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        size = 192
        cls.ndvi = os.path.join(cls.tmp, "ndvi")
        qa = os.path.join(cls.tmp, "qa")
        synth_stack.make_stack(cls.ndvi, width=size, height=size, years=3, qa_dir=qa,
                               drought_year=2022)
        cls.scene = synth_stack.Scene(size, size, 1, "demo", 2021, 3, 2022)
        filled = os.path.join(cls.tmp, "filled")
        cls.seasons = os.path.join(cls.tmp, "seasons")
        cls.compare = os.path.join(cls.tmp, "compare")
        steps = [["fill", os.path.join(cls.ndvi, "ndvi_*.tif"), "--qa", os.path.join(qa, "qa_*.tif"),
                  "--keep", "bits0-1 in 0,1", "--out", filled, "--lambda", "auto", "--envelope", "upper"],
                 ["seasons", filled, "--out", cls.seasons],
                 ["compare", cls.seasons, "--out", cls.compare]]
        for step in steps:
            done = kt.run_kalends(["-q"] + step)
            assert done.returncode == 0, "%s: %s" % (step[0], done.stderr)

    def band(self, name, description):
        g = kt.gdal()
        ds = g.Open(os.path.join(self.seasons, name))
        names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
        return ds.GetRasterBand(names.index(description) + 1).ReadAsArray()

    def test_north_has_one_season_and_south_two(self):
        seasons = self.band("ndvi_cycle_synoptic.tif", "seasons")
        vegetated = self.scene.cls <= 2
        north = (self.scene.w_bi < 0.05) & vegetated
        south = (self.scene.w_bi > 0.95) & vegetated
        self.assertGreater(north.sum(), 1000)
        self.assertGreater(south.sum(), 1000)
        share_north = np.mean(seasons[north] == 1)
        share_south = np.mean(seasons[south] == 2)
        print("\nnorth: %.1f %% one season, south: %.1f %% two seasons" % (100 * share_north, 100 * share_south))
        self.assertGreaterEqual(share_north, 0.95)   # the target
        self.assertGreaterEqual(share_south, 0.95)

    def test_the_drought_year_shows_in_anomalies_and_compare(self):
        g = kt.gdal()
        south = (self.scene.w_bi > 0.95) & (self.scene.cls <= 2)
        means = {}
        for year in (2021, 2022, 2023):
            anomaly = g.Open(os.path.join(self.seasons, "ndvi_anomaly_%d.tif" % year)).ReadAsArray()
            means[year] = float(np.nanmean(anomaly[:, south]))
        print("\nsouth mean anomaly by year: %s" % means)
        self.assertLess(means[2022], -0.01)
        self.assertLess(means[2022], min(means[2021], means[2023]))
        with open(os.path.join(self.compare, "compare.json")) as f:
            report = json.load(f)
        self.assertEqual(report["year_most_below"], 2022)
        self.assertTrue(os.path.exists(os.path.join(self.compare, "compare.md")))
        classes = g.Open(os.path.join(self.compare, report["class_raster"])).ReadAsArray()
        self.assertTrue(set(np.unique(classes[np.isfinite(classes)])) <= {0.0, 1.0, 2.0, 3.0})


if __name__ == "__main__":
    unittest.main(verbosity=2)
