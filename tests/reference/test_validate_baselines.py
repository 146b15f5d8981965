#!/usr/bin/python3
"""`kalends validate`'s baselines, recomputed with numpy and Python GDAL on the cells it withheld.

On the real MODIS NDVI of ../shared/data/alaska-ndvi/observed (see its README), validate keeps its
withheld stack (--keep-work); every baseline of its report is computed again here from that stack
and scored against the observed values it withheld:
- linear interpolation in time on the true time axis, the first and last observed values held
  beyond the ends: numpy.interp, as the issue's baseline figures were computed (linear
  interpolation: common practice; numpy.interp's end rule from its documentation);
- the pixel's mean for the same day of year (within half a time step) in the other years;
- that mean plus the date's anomaly (observed minus that mean) interpolated by
  gdal.FillNodata (inverse distance from the edges of each hole, no smoothing, search distance
  the raster's diagonal);
- gdal.FillNodata of the values, date by date;
- the combined baseline: mean plus anomaly where it has a value, else gdal.FillNodata.

Invented data (a fictional fen) checks two mechanics: a date whose only data sit in one corner
is still filled everywhere by the GDAL baseline (its search distance had been max(width,
height), short of the far corner), and masks that withheld nothing are not counted.

Run: /usr/bin/python3 -m unittest -v tests/reference/test_validate_baselines.py
"""
import datetime
import glob
import json
import math
import os
import subprocess
import sys
import unittest
import warnings

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def read_stack(pattern):
    g = kt.gdal()
    paths = sorted(glob.glob(pattern))
    cube = np.stack([g.Open(p).ReadAsArray().astype(np.float32) for p in paths])
    dates = [datetime.date.fromisoformat(os.path.basename(p)[-14:-4]) for p in paths]
    return cube, dates


def fill_nodata(plane):
    """gdal.FillNodata of one plane (NaN = missing), search distance the whole raster."""
    g = kt.gdal()
    height, width = plane.shape
    if not np.isfinite(plane).any():
        return plane.copy()
    ds = g.GetDriverByName("MEM").Create("", width, height, 1, g.GDT_Float32)
    band = ds.GetRasterBand(1)
    band.SetNoDataValue(float("nan"))
    band.WriteArray(plane)
    g.FillNodata(band, None, math.ceil(math.hypot(width, height)) + 1, 0)
    return band.ReadAsArray().astype(np.float32)


def scores(estimate, truth, withheld):
    e, t = estimate[withheld].astype(np.float64), truth[withheld].astype(np.float64)
    covered = np.isfinite(e)
    err = e[covered] - t[covered]
    return float(np.sqrt(np.mean(err ** 2))), float(covered.mean()), float(np.mean(err))


def baselines(held, dates):
    days = np.array([(d - dates[0]).days for d in dates], np.float64)
    step = float(np.median(np.diff(days)))
    n, h, w = held.shape
    linear = np.full_like(held, np.nan)
    for r in range(h):
        for c in range(w):
            series = held[:, r, c]
            seen = np.isfinite(series)
            if seen.any():
                linear[:, r, c] = np.where(seen, np.nan, np.interp(days, days[seen], series[seen]))
    doy = np.array([d.timetuple().tm_yday for d in dates])
    climate = np.full_like(held, np.nan)
    with_anomaly = np.full_like(held, np.nan)
    spatial = np.full_like(held, np.nan)
    for t in range(n):
        diff = np.abs(doy - doy[t])
        diff = np.minimum(diff, 365 - diff)
        same = [j for j in range(n) if dates[j].year != dates[t].year and diff[j] <= step / 2]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # a pixel unobserved on all those dates: NaN
            mean = np.nanmean(held[same], axis=0) if same else np.full((h, w), np.nan, np.float32)
        mean = mean.astype(np.float32)
        anomaly = held[t] - mean
        climate[t] = mean
        with_anomaly[t] = mean + fill_nodata(anomaly)
        spatial[t] = fill_nodata(held[t])
    combined = np.where(np.isfinite(with_anomaly), with_anomaly, spatial)
    return {"linear interpolation in time": linear,
            "same day-of-year mean, other years": climate,
            "that mean + spatially interpolated anomaly": with_anomaly,
            "GDAL FillNodata, date by date": spatial,
            "combined baseline": combined}


class BaselinesOnRealData(kt.TempDirTestCase):
    def test_every_baseline_equals_numpy_and_gdal(self):
        source = kt.shared_path("alaska-ndvi", "observed")
        out = os.path.join(self.tmp, "v")
        done = kt.run_kalends(["-q", "validate", os.path.join(source, "*.tif"), "--methods", "whittaker", "--out", out,
                               "--seed", "11", "--withhold", "0.3", "--keep-work", "--threads", "2"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "report.json")) as f:
            report = json.load(f)
        truth, dates = read_stack(os.path.join(source, "*.tif"))
        held, held_dates = read_stack(os.path.join(out, "work", "input", "*.tif"))
        self.assertEqual(dates, held_dates)
        withheld = np.isfinite(truth) & ~np.isfinite(held)
        # Only observed values were withheld; nothing else changed.
        self.assertTrue(np.array_equal(held[np.isfinite(held)], truth[np.isfinite(held)]))
        self.assertEqual(int(withheld.sum()), report["withheld"])
        reported = {s["name"]: s for s in report["scores"]}
        for name, estimate in baselines(held, dates).items():
            rmse, coverage, bias = scores(estimate, truth, withheld)
            print("\n  %-45s numpy/GDAL %.5f (%.1f %%), kalends %.5f (%.1f %%)" % (
                name, rmse, 100 * coverage, reported[name]["rmse"], 100 * reported[name]["coverage"]), end="")
            self.assertAlmostEqual(reported[name]["coverage"], coverage, places=9, msg=name)
            self.assertAlmostEqual(reported[name]["rmse"], rmse, delta=1e-6, msg=name)
            self.assertAlmostEqual(reported[name]["bias"], bias, delta=1e-6, msg=name)


class BaselineMechanics(kt.TempDirTestCase):
    def make(self, folder, cloud):
        """Six invented dates of a fictional fen, 100 x 100 px; `cloud(t)` gives date t's mask."""
        os.makedirs(folder)
        rows, cols = np.mgrid[0:100, 0:100]
        for t in range(6):
            date = datetime.date(2021, 5, 1) + datetime.timedelta(days=16 * t)
            value = (0.3 + 0.002 * rows + 0.001 * cols + 0.02 * t).astype(np.float32)
            value[cloud(t, rows, cols)] = np.nan
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date.isoformat()), value,
                            geotransform=(10.0, 0.001, 0, 50.0, 0, -0.001), epsg=4326)

    def test_the_gdal_baseline_reaches_the_far_corner(self):
        # Date 3 is clouded but for its top-left 5 x 5 px; the far corner lies 134 px away, more
        # than max(width, height) = 100: it had been left unfilled (coverage 90 %).
        stack = os.path.join(self.tmp, "corner")
        self.make(stack, lambda t, r, c: ((r >= 5) | (c >= 5)) if t == 3 else ((r - 50) ** 2 + (c - 50) ** 2 < 100))
        out = os.path.join(self.tmp, "corner-v")
        done = kt.run_kalends(["-q", "validate", os.path.join(stack, "*.tif"), "--methods", "whittaker", "--out", out,
                               "--seed", "5", "--withhold", "0.5"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "report.json")) as f:
            reported = {s["name"]: s for s in json.load(f)["scores"]}
        self.assertEqual(reported["GDAL FillNodata, date by date"]["coverage"], 1.0)
        self.assertEqual(reported["combined baseline"]["coverage"], 1.0)
        # GDAL's work rasters are kept in memory: where GDAL could not write them as files (its
        # temporary folder, by default the current one, not writable) the baseline had come out
        # empty, coverage 0, exit 0; and a killed run had left them in the current folder.
        out = os.path.join(self.tmp, "corner-no-temporary-folder")
        env = dict(os.environ, CPL_TMPDIR=os.path.join(self.tmp, "no-such-folder"))
        done = subprocess.run([kt.KALENDS_BIN, "-q", "validate", os.path.join(stack, "*.tif"), "--methods", "whittaker",
                               "--out", out, "--seed", "5", "--withhold", "0.5"], capture_output=True, text=True, env=env,
                              cwd=self.tmp, timeout=300)
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "report.json")) as f:
            again = {s["name"]: s for s in json.load(f)["scores"]}
        for name in ("GDAL FillNodata, date by date", "combined baseline"):
            self.assertEqual(again[name]["coverage"], 1.0, name)
            self.assertEqual(again[name]["rmse"], reported[name]["rmse"], name)

    def test_masks_that_withheld_nothing_are_not_counted(self):
        # One date has a 16 px cloud; laid over the five others it withholds something at most
        # five times, however many rounds the search takes to give up.
        stack = os.path.join(self.tmp, "one-cloud")
        self.make(stack, lambda t, r, c: ((r < 4) & (c < 4)) if t == 0 else np.zeros_like(r, bool))
        out = os.path.join(self.tmp, "one-cloud-v")
        done = kt.run_kalends(["-q", "validate", os.path.join(stack, "*.tif"), "--methods", "whittaker", "--out", out,
                               "--seed", "11", "--withhold", "0.3"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "report.json")) as f:
            report = json.load(f)
        self.assertEqual(report["withheld"], 80)
        self.assertGreaterEqual(report["transplanted_masks"], 1)
        self.assertLessEqual(report["transplanted_masks"], 5)


if __name__ == "__main__":
    unittest.main()
