#!/usr/bin/python3
"""Folders whose names hold a pattern's characters are read as the folders they are.

Where kalends adds a pattern to a folder (a folder given to `seasons`, `suitability` or
`diurnal`, a job step reading an earlier step's folder, a job's relative `stack`, validate's
work folder), the folder part had been a pattern itself: 'run[1]' matched the sibling 'run1'
(POSIX glob: [...] is a set of one character), and the other folder's files were read, exit 0.
Each case below puts such a sibling beside the folder, holding other values, and checks with
numpy which values were read. Invented data: mechanics only.
"""
import datetime
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def write_months(folder, value, prefix="ndvi", years=(2021, 2022), shape=(6, 5)):
    """Monthly rasters (the 1st of each month) holding `value` everywhere."""
    os.makedirs(folder, exist_ok=True)
    for year in years:
        for month in range(1, 13):
            kt.write_raster(os.path.join(folder, "%s_%04d-%02d-01.tif" % (prefix, year, month)),
                            np.full(shape, value, np.float32), geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01),
                            epsg=4326)


def mean_of(path):
    ds = kt.gdal().Open(path)
    a = ds.GetRasterBand(1).ReadAsArray().astype(float)
    return float(np.nanmean(a)), (ds.RasterXSize, ds.RasterYSize)


class LiteralFolderNames(kt.TempDirTestCase):
    def test_seasons_of_a_folder_with_brackets_reads_that_folder(self):
        root = os.path.join(self.tmp, "seasons")
        write_months(os.path.join(root, "run[1]"), 0.2)
        write_months(os.path.join(root, "run1"), 0.9)   # what 'run[1]/*.tif' matches as a pattern
        out = os.path.join(root, "out")
        done = kt.run_kalends(["-q", "seasons", os.path.join(root, "run[1]"), "--out", out, "--period", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        value, _ = mean_of(os.path.join(out, "ndvi_synoptic_mean.tif"))
        self.assertAlmostEqual(value, 0.2, places=5)

    def test_suitability_of_folders_with_brackets_reads_those_folders(self):
        root = os.path.join(self.tmp, "suit")
        # Monthly mean temperatures in degrees C: 24 (near the r0-2013 optimum) against 10 (none).
        write_months(os.path.join(root, "t[1]"), 24.0, prefix="tas")
        write_months(os.path.join(root, "t1"), 10.0, prefix="tas")
        out = os.path.join(root, "out")
        done = kt.run_kalends(["-q", "suitability", "--temperature", os.path.join(root, "t[1]"), "--out", out,
                               "--units", "celsius"])
        self.assertEqual(done.returncode, 0, done.stderr)
        synoptic = [p for p in os.listdir(out) if p.endswith("synoptic.tif")]
        self.assertTrue(synoptic, os.listdir(out))
        value, _ = mean_of(os.path.join(out, synoptic[0]))
        self.assertGreater(value, 0.5)  # at 10 C it is 0 (Mordecai et al. 2013: none below 16 C)

    def test_validate_into_a_folder_with_brackets_scores_its_own_work(self):
        root = os.path.join(self.tmp, "validate")
        stack = os.path.join(root, "stack")
        rng = np.random.default_rng(5)
        os.makedirs(stack)
        for k in range(24):
            date = datetime.date(2021, 1, 1) + datetime.timedelta(days=16 * k)
            values = (0.4 + 0.2 * np.sin(2 * np.pi * k / 23) + rng.normal(0, 0.01, (12, 10))).astype(np.float32)
            values[rng.random((12, 10)) < 0.2] = np.nan
            kt.write_raster(os.path.join(stack, "ndvi_%s.tif" % date.isoformat()), values,
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        pattern = os.path.join(stack, "*.tif")
        # A sibling's work folder kept by --keep-work, holding other values.
        sibling = os.path.join(root, "v1", "work", "input")
        os.makedirs(sibling)
        for k in range(24):
            date = datetime.date(2021, 1, 1) + datetime.timedelta(days=16 * k)
            kt.write_raster(os.path.join(sibling, "ndvi_%s.tif" % date.isoformat()), np.full((12, 10), 0.95, np.float32),
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        scores = {}
        for name in ("v[1]", "v2"):
            done = kt.run_kalends(["-q", "validate", pattern, "--out", os.path.join(root, name), "--methods",
                                   "whittaker", "--seed", "3"])
            self.assertEqual(done.returncode, 0, done.stderr)
            import json
            with open(os.path.join(root, name, "report.json")) as f:
                scores[name] = [s for s in json.load(f)["scores"] if s["name"] == "whittaker"][0]["rmse"]
        self.assertLess(scores["v2"], 0.05)
        self.assertAlmostEqual(scores["v[1]"], scores["v2"], places=6)

    def test_a_job_in_a_folder_with_brackets_reads_its_own_files(self):
        root = os.path.join(self.tmp, "jobs")
        folder = os.path.join(root, "proj [2023]")
        write_months(os.path.join(folder, "layers"), 0.3, shape=(8, 7))
        write_months(os.path.join(root, "proj 2", "layers"), 0.8, shape=(8, 7))
        # An earlier step's folder in the sibling, as another job would have left it.
        write_months(os.path.join(root, "proj 2", "out", "fill"), 0.8, shape=(4, 4))
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.ndvi]\nstack = "layers/*.tif"\n'
                    '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n'
                    '[[step]]\nid = "seasons"\ndo = "seasons"\ninput = "fill"\nperiod = "1M"\n')
        done = kt.run_kalends(["-q", "run", job])
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        fill, shape = mean_of(os.path.join(folder, "out", "fill", "ndvi_2021-06-01.tif"))
        self.assertAlmostEqual(fill, 0.3, places=4)
        synoptic, shape = mean_of(os.path.join(folder, "out", "seasons", "ndvi_synoptic_mean.tif"))
        self.assertAlmostEqual(synoptic, 0.3, places=4)
        self.assertEqual(shape, (7, 8))

    def test_a_job_stack_in_a_folder_with_quotes_is_a_folder_not_a_connection(self):
        # '"' in an absolute path had been taken for a GDAL connection string's quoted file.
        folder = os.path.join(self.tmp, 'say "hi"')
        write_months(os.path.join(folder, "layers"), 0.4, years=(2021,))
        job = os.path.join(folder, "job.toml")
        stack = os.path.join(folder, "layers", "*.tif").replace('"', '\\"')
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.ndvi]\nstack = "%s"\n'
                    '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n' % stack)
        done = kt.run_kalends(["-q", "run", job])
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        value, _ = mean_of(os.path.join(folder, "out", "fill", "ndvi_2021-06-01.tif"))
        self.assertAlmostEqual(value, 0.4, places=4)


    def test_a_job_reads_a_netcdf_variable_in_a_folder_with_brackets(self):
        # 'NETCDF:"nc [1]/f.nc":tas' names one file: it had been globbed whole ("cannot list the
        # files of this pattern"). The Maurer et al. (2002) monthly file of the shared data
        # (README), copied to the test's own folder; the values are checked against GDAL's.
        import shutil
        folder = os.path.join(self.tmp, "nc [1]")
        os.makedirs(folder)
        shutil.copy(kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc"), folder)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.tas]\nstack = "NETCDF:\\"bcsd_obs_1999.nc\\":tas"\n'
                    '[[step]]\nid = "fill"\ndo = "fill"\ninput = "tas"\nlambda = 10\n')
        done = kt.run_kalends(["-q", "run", job])
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        source = kt.gdal().Open('NETCDF:"%s":tas' % os.path.join(folder, "bcsd_obs_1999.nc"))
        truth = source.GetRasterBand(7).ReadAsArray().astype(float)
        truth[truth > 1e19] = np.nan
        source = None
        ds = kt.gdal().Open(os.path.join(folder, "out", "fill", "tas_1999-07-31.tif"))
        value, flag = ds.GetRasterBand(1).ReadAsArray(), ds.GetRasterBand(3).ReadAsArray()
        ds = None
        kept = (flag == 0) & np.isfinite(truth)
        self.assertGreater(kept.sum(), 1000)
        np.testing.assert_allclose(value[kept], truth[kept], atol=1e-4)

if __name__ == "__main__":
    unittest.main()
