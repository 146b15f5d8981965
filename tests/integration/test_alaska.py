"""Gap-filling accuracy on real data: MODIS NDVI over Alaska with artificial cloud masks.

Data: ../shared/data/alaska-ndvi (see its README): MODIS/Terra MOD13A1 V006 NDVI, 16-day
composites, 100 x 100 px, 48 dates 2004-2009 [Didan, K. (2015), doi:10.5067/MODIS/MOD13A1.006];
`masked20/` removes values along cloud patterns observed on other dates, to 20 % missing, as
prepared for the validation study of Gerber, F. et al. (2018), IEEE Trans. Geosci. Remote Sens.
56(5):2841-2853. The values removed by the mask are known in `observed/`: the error of a fill
is measured there (RMSE, MAE, bias, and coverage = share of those cells that got a value).

The assertions are loose sanity bounds, not accuracy claims: on the day these tests were
written, Whittaker with lambda auto gave RMSE 0.090 and coverage 0.92 (measured with this
file); the bounds are RMSE < 0.15 and coverage > 0.8. The printed figures are the record.
For context only, the error of linear interpolation in time between the nearest observations
(numpy.interp; a common-practice baseline) is printed beside them.

Run: /usr/bin/python3 -m unittest -v tests/integration/test_alaska.py
"""

import datetime
import glob
import json
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def read_stack(folder):
    gdal = kt.gdal()
    paths = sorted(glob.glob(os.path.join(folder, "ndvi_*.tif")))
    names = [os.path.basename(p) for p in paths]
    arrays = []
    for p in paths:
        ds = gdal.Open(p)
        arrays.append(ds.GetRasterBand(1).ReadAsArray().astype(np.float32))
        ds = None
    return names, np.stack(arrays)


def metrics(estimate, truth):
    """RMSE, MAE, bias and coverage of `estimate` on the cells where `truth` is given."""
    have = np.isfinite(estimate)
    err = estimate[have].astype(np.float64) - truth[have].astype(np.float64)
    return {"rmse": float(np.sqrt(np.mean(err ** 2))), "mae": float(np.mean(np.abs(err))),
            "bias": float(np.mean(err)), "coverage": float(have.mean()), "cells": int(truth.size)}


def linear_interpolation(stack, days):
    """Per pixel, numpy.interp in time between observations; NaN outside the observed span."""
    out = np.full(stack.shape, np.nan, dtype=np.float64)
    t, h, w = stack.shape
    for r in range(h):
        for c in range(w):
            y = stack[:, r, c]
            ok = np.isfinite(y)
            if ok.sum() >= 2:
                out[:, r, c] = np.interp(days, days[ok], y[ok], left=np.nan, right=np.nan)
    return out


class AlaskaNdvi(kt.TempDirTestCase):

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.masked_dir = kt.shared_path("alaska-ndvi", "masked20")
        cls.observed_dir = kt.shared_path("alaska-ndvi", "observed")
        kt.require_binary(kt.KALENDS_BIN)
        cls.names, cls.masked = read_stack(cls.masked_dir)
        names_obs, cls.observed = read_stack(cls.observed_dir)
        assert names_obs == cls.names, "observed/ and masked20/ hold different dates"
        cls.holdout = np.isfinite(cls.observed) & ~np.isfinite(cls.masked)

    def fill(self, label, extra):
        out = os.path.join(self.tmp, label)
        kt.run_fill_ok(self, [os.path.join(self.masked_dir, "*.tif"), "--out", out,
                              "--threads", "2"] + extra)
        self.assertEqual(kt.final_outputs(out), self.names)
        outs = [kt.read_output(os.path.join(out, n)) for n in self.names]
        value = np.stack([o["value"] for o in outs])
        flag = np.stack([o["flag"] for o in outs])
        sd = np.stack([o["sd"] for o in outs])
        return value, sd, flag

    def check_and_report(self, label, value, sd, flag):
        # The figures first, so they are on record even when a check below fails.
        m = metrics(value[self.holdout], self.observed[self.holdout])
        print("\n%s on masked20 vs observed (%d held-out cells): RMSE %.4f, MAE %.4f, "
              "bias %+.4f, coverage %.3f" % (label, m["cells"], m["rmse"], m["mae"], m["bias"],
                                            m["coverage"]))
        observed_in = np.isfinite(self.masked)
        # Observed cells: flag 0 with the input value exactly, flag 1 (rejected), or flag 3 for
        # a rejected value beyond the method's reach (docs/outputs.md); never flag 2.
        self.assertTrue(np.all(np.isin(flag[observed_in], (0.0, 1.0, 3.0))), label)
        self.assertGreater(int((flag[observed_in] == 0).sum()), int(0.9 * observed_in.sum()), label)
        keep = observed_in & (flag == 0)
        np.testing.assert_array_equal(value[keep], self.masked[keep])
        # Missing cells: filled or not; NaN exactly where flag 3.
        self.assertTrue(np.all(np.isin(flag[~observed_in], (2.0, 3.0))), label)
        # Value: NaN only with flag 3, and flag 3 always NaN.
        wrong = np.isnan(value) != (flag == 3)
        where = [(int(t), int(r), int(c), self.names[t], int(flag[t, r, c]))
                 for t, r, c in np.argwhere(wrong)[:3]]
        self.assertEqual(int(wrong.sum()), 0,
                         "%s: %d cells where value NaN does not match flag 3, e.g. (date index, "
                         "row, col, file, flag) %s" % (label, wrong.sum(), where))
        # sd: NaN at flag 3; a value taken from the fit (flags 1 and 2) has an sd where the pixel
        # has at least 5 observations (Whittaker gives none below, docs/methods.md). At flag 0
        # the observation is kept even where the pixel has too few observations to fit, so sd
        # may be NaN there; counted for the record.
        self.assertTrue(np.all(np.isnan(sd[flag == 3])), label)
        enough = np.broadcast_to(observed_in.sum(axis=0) >= 5, flag.shape)
        from_fit = (flag == 1) | (flag == 2)
        self.assertTrue(np.all(np.isfinite(sd[from_fit & enough])), label)
        print("%s: %d flag-0 cells have no sd (pixels too sparse to fit)" % (
            label, int(np.sum(np.isnan(sd) & (flag == 0)))))
        return m

    def print_baseline(self):
        # Context for the printed figures, not a check of kalends: days from the file names.
        days = np.array([(datetime.date.fromisoformat(n[5:15]) - datetime.date(2004, 1, 1)).days
                         for n in self.names], dtype=float)
        estimate = linear_interpolation(self.masked, days)
        m = metrics(estimate[self.holdout], self.observed[self.holdout])
        print("linear interpolation in time (numpy.interp, context only) on the same cells: "
              "RMSE %.4f, MAE %.4f, bias %+.4f, coverage %.3f" % (m["rmse"], m["mae"], m["bias"],
                                                                 m["coverage"]))

    def test_whittaker_auto(self):
        value, sd, flag = self.fill("whittaker", ["--method", "whittaker", "--lambda", "auto"])
        m = self.check_and_report("whittaker --lambda auto", value, sd, flag)
        self.print_baseline()
        # Loose sanity bounds (measured when written: RMSE 0.090, coverage 0.92).
        self.assertLess(m["rmse"], 0.15)
        self.assertGreater(m["coverage"], 0.8)

    def test_whittaker_sd_of_a_filled_value_holds_its_error_at_a_fixed_lambda(self):
        # The withheld values are real observations: a filled value stands in for one, so its sd
        # must count an observation's noise as well as the curve's uncertainty (least squares'
        # prediction interval; Draper & Smith, Applied Regression Analysis, from memory). With
        # the curve's sd alone the RMS of error / sd was far above 1 at a stiff lambda (measured
        # here with version 0.3.21: 2.48, 57 % of errors beyond 1.96 sd; with the noise 1.32 and
        # 9.6 %: a curve this stiff misses the summer peaks that most withheld cells lie in, a
        # bias the residual noise does not wholly carry).
        value, sd, flag = self.fill("whittaker-lambda100", ["--method", "whittaker", "--lambda", "100"])
        cells = self.holdout & np.isfinite(value) & np.isfinite(sd)
        ratio = (value[cells] - self.observed[cells]) / sd[cells]
        rms = float(np.sqrt(np.mean(ratio ** 2)))
        within = float(np.mean(np.abs(ratio) <= 1.96))
        print("\nwhittaker --lambda 100 on masked20: RMS of error / sd %.3f, %.1f %% within 1.96 sd "
              "(%d cells)" % (rms, 100 * within, cells.sum()))
        self.assertGreater(cells.sum(), 0.8 * self.holdout.sum())
        self.assertLess(rms, 1.5)
        self.assertGreater(rms, 0.7)
        self.assertGreater(within, 0.85)

    def test_harmonic_two(self):
        value, sd, flag = self.fill("harmonic", ["--method", "harmonic", "--harmonics", "2"])
        m = self.check_and_report("harmonic --harmonics 2", value, sd, flag)
        # The same loose sanity bounds; the figures are printed for the record.
        self.assertLess(m["rmse"], 0.15)
        self.assertGreater(m["coverage"], 0.8)

    def test_harmonics_the_summers_cannot_determine_are_explained(self):
        # Observations only from late May to mid September (day of year 145-257): three
        # harmonics of a year are not determined there (docs/methods.md). The fill says why it
        # left the pixels unfitted, on the terminal and in fill-summary.json.
        out = os.path.join(self.tmp, "harmonic3")
        done = kt.run_kalends(["fill", os.path.join(self.masked_dir, "*.tif"), "--out", out,
                               "--method", "harmonic", "--threads", "2"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "fill-summary.json")) as f:
            summary = json.load(f)
        reasons = summary["series_not_fitted"]
        cover = [n for reason, n in reasons.items() if "too little of the year" in reason]
        self.assertEqual(len(cover), 1, reasons)
        observed_pixels = int(np.isfinite(self.masked).any(axis=0).sum())
        self.assertGreater(cover[0], 0.9 * observed_pixels)
        # Every pixel with an observation is either fitted or counted under a reason.
        self.assertLessEqual(sum(reasons.values()), observed_pixels)
        self.assertIn("too little of the year to determine 3 harmonics", done.stdout)
        # A job's fill step says the same in its run summary, with the same count.
        job = os.path.join(self.tmp, "harmonic3.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "%s"\nthreads = 2\n[inputs.ndvi]\nstack = "%s"\n[[step]]\nid = "fill"\n'
                    'do = "fill"\ninput = "ndvi"\nmethod = "harmonic"\n'
                    % (os.path.join(self.tmp, "harmonic3-job"), os.path.join(self.masked_dir, "*.tif")))
        done = kt.run_kalends(["run", job])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: %d pixels not fitted: observations cover too little of the year" % cover[0], done.stdout)
        # With two harmonics (test_harmonic_two) most pixels are fitted: far fewer reasons.
        two = os.path.join(self.tmp, "harmonic2-reasons")
        kt.run_fill_ok(self, [os.path.join(self.masked_dir, "*.tif"), "--out", two,
                              "--method", "harmonic", "--harmonics", "2", "--threads", "2"])
        with open(os.path.join(two, "fill-summary.json")) as f:
            self.assertLess(sum(json.load(f)["series_not_fitted"].values()), 0.2 * observed_pixels)

    def test_seasons_of_summers_have_no_cycle_descriptors_and_say_why(self):
        # The composites cover late May to September (day of year 145-257 plus 16 days): the
        # months October to April have no value anywhere, so no pixel has the complete year the
        # cycle descriptors need (docs/outputs.md). Those layers are empty and the run says why;
        # the synoptic means hold May to September.
        filled = os.path.join(self.tmp, "seasons-fill")
        kt.run_fill_ok(self, [os.path.join(self.masked_dir, "*.tif"), "--out", filled, "--lambda", "10",
                              "--subset", "0,0,30,30", "--threads", "2"])
        out = os.path.join(self.tmp, "seasons")
        done = kt.run_kalends(["seasons", filled, "--out", out, "--period", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: the cycle layers are empty", done.stderr)
        self.assertIn("7 of the 12 periods have none anywhere (Jan, Feb, Mar, Apr, Oct, Nov, Dec)", done.stderr)
        g = kt.gdal()
        cycle = g.Open(glob.glob(os.path.join(out, "*_cycle_synoptic.tif"))[0]).ReadAsArray()
        self.assertFalse(np.isfinite(cycle).any())
        mean = g.Open(glob.glob(os.path.join(out, "*_synoptic_mean.tif"))[0]).ReadAsArray()
        with_values = [m + 1 for m in range(12) if np.isfinite(mean[m]).any()]
        self.assertEqual(with_values, [5, 6, 7, 8, 9])

    def test_calendar_leaves_the_winters_empty(self):
        # The stack holds summers only: its composites (16 days from each date, day of year
        # 145-257, so up to 28/29 September) cover May to September. The monthly calendar has
        # values there and none, with flag 3, from October to April.
        out = os.path.join(self.tmp, "calendar")
        kt.run_fill_ok(self, [os.path.join(self.masked_dir, "*.tif"), "--out", out, "--lambda", "10",
                              "--every", "1M", "--threads", "2"])
        files = sorted(glob.glob(os.path.join(out, "calendar-1M", "*.tif")))
        winter = 0
        g = kt.gdal()
        for path in files:
            month = int(os.path.basename(path)[-9:-7])
            ds = g.Open(path)
            value, flag = ds.GetRasterBand(1).ReadAsArray(), ds.GetRasterBand(3).ReadAsArray()
            ds = None
            if month >= 10 or month <= 4:
                winter += 1
                self.assertTrue(np.isnan(value).all() and (flag == 3).all(), path)
            else:
                self.assertGreater(np.isfinite(value).mean(), 0.5, path)
        self.assertGreater(winter, 30)
        self.assertEqual(kt.read_summary(out)["calendar_outside_season"], winter)


if __name__ == "__main__":
    unittest.main(verbosity=2)
