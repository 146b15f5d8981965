#!/usr/bin/python3
"""`--never-observed leave` (job key `never_observed`): pixels with no observation on any date
stay empty instead of taking their neighbours' values.

Real data: the gridded monthly air temperature of Maurer et al. (2002), J. Climate 15:3237
(../shared/data/monthly-temperature), whose cells over the sea are missing on all 12 months.
Which cells those are is read independently with GDAL. The default `spacetime` fill gives the
sea values from the land; with `leave` the sea is empty (NaN value and sd, flag 3) and every land
cell is exactly what the default gave, since no stage uses a never-observed pixel's value.
The same holds year by year (`--reach`) on the Alaska MODIS NDVI, where the pixels never
observed are persistent cloud, and through a job file and `kalends validate`.

Run: /usr/bin/python3 -m unittest -v tests/integration/test_never_observed.py
"""
import glob
import json
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

FLAG_UNFILLED = 3  # docs/outputs.md


def outputs(folder):
    return sorted(glob.glob(os.path.join(folder, "*.tif")))


def read(path):
    return kt.gdal().Open(path).ReadAsArray().astype(np.float64)  # value, sd, flag


class NeverObserved(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        path = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        cls.tas = 'NETCDF:"%s":tas' % path
        ds = kt.gdal().Open(cls.tas)
        bands = [ds.GetRasterBand(b + 1) for b in range(ds.RasterCount)]
        missing = []
        for band in bands:
            a = band.ReadAsArray().astype(np.float64)
            nodata = band.GetNoDataValue()
            missing.append(~np.isfinite(a) | ((a == nodata) if nodata is not None else False))
        cls.sea = np.all(missing, axis=0)   # missing on every month: never observed
        ds = None

    def fill(self, stack, out, *extra):
        kt.run_fill_ok(self, [stack, "--out", out, "--method", "spacetime"] + list(extra))
        return outputs(out)

    def test_sea_left_empty_land_unchanged(self):
        self.assertGreater(self.sea.sum(), 100)   # 593 cells over the sea when written
        default = self.fill(self.tas, os.path.join(self.tmp, "fill"))
        leave = self.fill(self.tas, os.path.join(self.tmp, "leave"), "--never-observed", "leave")
        self.assertEqual([os.path.basename(p) for p in default], [os.path.basename(p) for p in leave])
        self.assertEqual(len(leave), 12)
        land = ~self.sea
        for a_path, b_path in zip(default, leave):
            a, b = read(a_path), read(b_path)
            self.assertTrue(np.isfinite(a[0][self.sea]).all(), a_path)   # the default fills the sea
            self.assertTrue(np.isnan(b[0][self.sea]).all(), b_path)
            self.assertTrue(np.isnan(b[1][self.sea]).all(), b_path)
            self.assertTrue((b[2][self.sea] == FLAG_UNFILLED).all(), b_path)
            for band in range(3):
                np.testing.assert_array_equal(a[band][land], b[band][land], err_msg=b_path)
        summary = kt.read_summary(os.path.join(self.tmp, "leave"))
        self.assertEqual(summary["pixels_never_observed"], int(self.sea.sum()))
        self.assertEqual(summary["pixels_without_value"], int(self.sea.sum()))
        # Parameters are an object, numbers as numbers (they had been one "key=value ..." text).
        self.assertEqual(summary["parameters"]["never_observed"], "leave")
        self.assertEqual(summary["parameters"]["halo"], 32)
        self.assertEqual(kt.read_summary(os.path.join(self.tmp, "fill"))["pixels_without_value"], 0)

    def test_year_by_year_on_alaska(self):
        stack = os.path.join(kt.shared_path("alaska-ndvi", "masked50"), "*.tif")
        default = self.fill(stack, os.path.join(self.tmp, "a_fill"), "--reach", "365")
        leave = self.fill(stack, os.path.join(self.tmp, "a_leave"), "--reach", "365",
                          "--never-observed", "leave")
        inputs = [kt.gdal().Open(p).ReadAsArray() for p in sorted(glob.glob(stack))]
        never = np.all([~np.isfinite(a) for a in inputs], axis=0)
        self.assertGreater(never.sum(), 1000)   # 16 % of the 100 x 100 px (shared data README)
        for a_path, b_path in zip(default, leave):
            a, b = read(a_path), read(b_path)
            self.assertTrue(np.isfinite(a[0][never]).any(), a_path)
            self.assertTrue(np.isnan(b[0][never]).all() and (b[2][never] == FLAG_UNFILLED).all(), b_path)
            for band in range(3):
                np.testing.assert_array_equal(a[band][~never], b[band][~never], err_msg=b_path)

    def test_job_key_and_validate(self):
        folder = os.path.join(self.tmp, "job")
        os.makedirs(folder)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nname = "sea"\nout = "out"\n\n[inputs.tas]\nstack = \'%s\'\n\n'
                    '[[step]]\nid = "fill"\ndo = "fill"\ninput = "tas"\nmethod = "spacetime"\n'
                    'never_observed = "leave"\n' % self.tas)
        done = kt.run_kalends(["-q", "run", job])
        self.assertEqual(done.returncode, 0, done.stderr)
        files = outputs(os.path.join(folder, "out", "fill"))
        self.assertEqual(len(files), 12)
        self.assertTrue(np.isnan(read(files[0])[0][self.sea]).all())
        # A value other than fill or leave: refused, naming the key.
        with open(job, "a") as f:
            f.write('\n[[step]]\nid = "fill2"\ndo = "fill"\ninput = "tas"\nnever_observed = "keep"\n')
        done = kt.run_kalends(["run", job])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("never_observed", done.stderr)
        # validate names the setting among the method's parameters.
        out = os.path.join(self.tmp, "validate")
        done = kt.run_kalends(["-q", "validate", os.path.join(kt.shared_path("alaska-ndvi", "masked50"), "*.tif"),
                               "--methods", "spacetime", "--never-observed", "leave", "--out", out,
                               "--seed", "5"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "report.json")) as f:
            report = json.load(f)
        spacetime = report["scores"][0]
        self.assertEqual(spacetime["parameters"]["never_observed"], "leave")
        # Withheld cells of pixels the validation's input never observes get no value.
        never = [c for c in spacetime["by_gap_length"] if c["name"] == "pixel never observed"][0]
        self.assertGreater(never["cells"], 0)
        self.assertEqual(never["covered"], 0)
        self.assertLessEqual(spacetime["covered"], spacetime["cells"] - never["cells"])
        # On the command line a value other than fill or leave is refused by name.
        done = kt.run_kalends(["fill", self.tas, "--out", os.path.join(self.tmp, "bad"),
                               "--never-observed", "keep"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--never-observed", done.stderr)


if __name__ == "__main__":
    unittest.main()
