#!/usr/bin/python3
"""The demo's temperature-suitability chain at a small size: invented day and night
land-surface temperature (tools/synth_lst.py, kelvin x 50, cloud gaps) -> `kalends fill`
(harmonic) -> `kalends suitability --model r0-2013`.

Invented data (a fictional district): checks of the mechanics only, no accuracy claim. The
district rises from lowlands in the south to cool highlands in the north, so the north must
have fewer suitable months than the south.
"""
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "tools"))
import kalends_testlib as kt  # noqa: E402
import synth_lst  # noqa: E402


class DemoSuitability(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        lst = os.path.join(cls.tmp, "lst")
        synth_lst.make_lst(lst, width=128, height=128, years=2, quiet=True)
        for passage in ("day", "night"):
            done = kt.run_kalends(["-q", "fill", os.path.join(lst, passage, "lst_%s_*.tif" % passage),
                                   "--out", os.path.join(cls.tmp, "filled", passage), "--method", "harmonic",
                                   "--harmonics", "2"])
            assert done.returncode == 0, done.stderr
        cls.out = os.path.join(cls.tmp, "suitability")
        cls.done = kt.run_kalends(["suitability", "--day", os.path.join(cls.tmp, "filled", "day"),
                                   "--night", os.path.join(cls.tmp, "filled", "night"), "--out", cls.out])

    def read(self, name):
        ds = kt.gdal().Open(os.path.join(self.out, name))
        out = ds.ReadAsArray().astype(np.float64), [ds.GetRasterBand(b + 1).GetDescription()
                                                   for b in range(ds.RasterCount)]
        ds = None
        return out

    def test_layers_are_written(self):
        self.assertEqual(self.done.returncode, 0, self.done.stderr)
        self.assertEqual(kt.final_outputs(self.out),
                         ["r0-2013_summary_%s.tif" % y for y in ("2021", "2022", "synoptic")] +
                         ["r0-2013_synoptic.tif", "r0-2013_year_2021.tif", "r0-2013_year_2022.tif"])
        self.assertIn("not malaria risk", self.done.stderr)
        synoptic, bands = self.read("r0-2013_synoptic.tif")
        self.assertEqual(bands, ["month %02d" % m for m in range(1, 13)])
        self.assertTrue(np.all((synoptic >= 0) & (synoptic <= 1)))  # filled: no gaps left

    def test_highlands_have_fewer_suitable_months(self):
        summary, bands = self.read("r0-2013_summary_synoptic.tif")
        months = summary[bands.index("suitable_months")]
        north, south = months[:32], months[-32:]
        self.assertLess(np.median(north), np.median(south))
        self.assertEqual(np.median(south), 12)


if __name__ == "__main__":
    unittest.main()
