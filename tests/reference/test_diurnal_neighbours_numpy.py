#!/usr/bin/python3
"""`kalends diurnal` from daily extremes where a UTC day's hours fall on a neighbouring local
day that is not in the input (the first and last dates, a gap in the dates), checked against a
numpy implementation of Parton & Logan (1981) with the rule of docs/methods.md ("Diurnal
temperature"): a day uses its neighbours' extremes where the neighbouring date is the adjacent
day, otherwise its own, so the night before the first day falls from the first day's own sunset
value to its own minimum.

Invented extremes on a 2 x 2 grid in EPSG:4326 (longitudes -80.75 and +80.75, latitudes 35 and
-20), 10, 11, 12, 14 and 15 June 2019: mechanics only, no accuracy claim. West of Greenwich the
first UTC hours of a date are the evening of the previous local day; east, the last UTC hours
are the morning of the next.

Also: tmin above tmax on most pixel-days (--tmin and --tmax swapped) is refused; on fewer it is
counted.
"""
import datetime as dt
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402
import thermal_numpy as tn  # noqa: E402

DATES = [dt.date(2019, 6, d) for d in (10, 11, 12, 14, 15)]  # 13 June missing: a gap
# Per date: Tmin, Tmax (deg C), for the first pixel; the others are shifted (below).
EXTREMES = [(10.0, 20.0), (14.0, 26.0), (8.0, 30.0), (12.0, 24.0), (11.0, 27.0)]
SHIFT = np.array([[0.0, 1.5], [-2.0, 3.0]])
GT = (-161.5, 161.5, 0.0, 62.5, 0.0, -55.0)  # pixel centres at lon -80.75, 80.75; lat 35, -20


class DiurnalNeighbours(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.lon = np.array([[-80.75, 80.75], [-80.75, 80.75]])
        cls.lat = np.array([[35.0, 35.0], [-20.0, -20.0]])
        cls.tmin = np.array([lo + SHIFT for lo, _ in EXTREMES])
        cls.tmax = np.array([hi + SHIFT for _, hi in EXTREMES])
        folder = os.path.join(cls.tmp, "extremes")
        os.makedirs(folder)
        for d, lo, hi in zip(DATES, cls.tmin, cls.tmax):
            for name, values in (("tmin", lo), ("tmax", hi)):
                kt.write_raster(os.path.join(folder, "%s_%s.tif" % (name, d.isoformat())),
                                values.astype(np.float32), geotransform=GT, epsg=4326)
        cls.out = os.path.join(cls.tmp, "hours")
        cls.done = kt.run_kalends(["-q", "diurnal", "--tmin", os.path.join(folder, "tmin_*.tif"), "--tmax",
                                   os.path.join(folder, "tmax_*.tif"), "--units", "celsius", "--out", cls.out])
        cls.hours = []
        if cls.done.returncode == 0:
            for d in DATES:
                ds = kt.gdal().Open(os.path.join(cls.out, "diurnal_%s.tif" % d.isoformat()))
                cls.hours.append(ds.ReadAsArray().astype(np.float64))  # (24, rows, cols), UTC hours
                ds = None

    def expected(self, k, utc_hour):
        """The documented rule, written from docs/methods.md: hour `utc_hour` of date k."""
        n = len(DATES)
        sun = [tn.sun(self.lat, d.timetuple().tm_yday) for d in DATES]

        def adjacent(i, j):
            return 0 <= j < n and abs((DATES[j] - DATES[i]).days) == 1

        def curve(i, t, prev, nxt):
            # Parton & Logan (1981) day i at local solar hour t in [0, 24], with the previous
            # night from day `prev` and the coming night toward day `nxt`'s minimum.
            return tn.parton_logan(t, self.tmin[i], self.tmax[i], sun[i][0], sun[i][2], self.tmin[prev],
                                   self.tmax[prev], sun[prev][0], sun[prev][2], self.tmin[nxt], sun[nxt][0])

        def day(i, t):
            return curve(i, t, i - 1 if adjacent(i, i - 1) else i, i + 1 if adjacent(i, i + 1) else i)

        t = utc_hour + self.lon / 15.0  # local mean solar time
        # A neighbouring local day missing from the input is taken as the day itself.
        before = day(k - 1, t + 24) if adjacent(k, k - 1) else curve(k, t + 24, k, k)
        after = day(k + 1, t - 24) if adjacent(k, k + 1) else curve(k, t - 24, k, k)
        return np.where(t < 0, before, np.where(t >= 24, after, day(k, np.clip(t, 0, 24))))

    def test_runs(self):
        self.assertEqual(self.done.returncode, 0, self.done.stderr)

    def test_every_hour_equals_numpy(self):
        self.assertEqual(self.done.returncode, 0, self.done.stderr)
        for k, d in enumerate(DATES):
            for h in range(24):
                np.testing.assert_allclose(self.hours[k][h], self.expected(k, h), atol=1e-4, rtol=0,
                                           err_msg="%s hour %02d UTC" % (d, h))

    def test_night_before_first_day_falls_to_its_own_minimum(self):
        # West of Greenwich (lon -80.75, 35 N) UTC 00-05 of 10 June are the evening of 9 June,
        # not in the input: taken as 10 June's own day, it cools monotonically (late afternoon
        # sine, then the exponential night decay of Parton & Logan 1981) toward 10 June's own
        # minimum (10 C) and joins the morning without a jump.
        self.assertEqual(self.done.returncode, 0, self.done.stderr)
        first = self.hours[0][:, 0, 0]
        t = np.arange(24) - 80.75 / 15.0
        night = first[t < 0]
        self.assertEqual(len(night), 6)
        self.assertTrue(np.all(np.diff(night) < 0), night)
        self.assertTrue(np.all(night > EXTREMES[0][0]), night)
        # Not the evening of 10 June itself, decaying toward 11 June's minimum (14 C).
        self.assertFalse(np.allclose(night, self.hours[1][:6, 0, 0]), night)
        # Continuous into the morning: from the evening to the hour after the minimum (sunrise
        # + c) no hourly step exceeds 2 C. The steepest on this curve is the morning rise, at
        # most (Tmax - Tmin) pi / (Y + 2a) = 1.7 C an hour; the wrong night jumped 3.4 C at dawn.
        sun = tn.sun(35.0, DATES[0].timetuple().tm_yday)
        dawn = np.flatnonzero(t < sun[0] + tn.PARTON_LOGAN[2])[-1] + 2
        self.assertLess(np.abs(np.diff(first[:dawn])).max(), 2.0, first)

    def test_morning_after_last_day_continues_its_night(self):
        # East (lon +80.75) the last UTC hours of 15 June are the morning of 16 June, not in the
        # input: the night after 15 June's sunset goes on falling toward its own minimum (11 C)
        # instead of repeating the night before 15 June.
        self.assertEqual(self.done.returncode, 0, self.done.stderr)
        last = self.hours[-1][:, 0, 1]
        t = np.arange(24) + 80.75 / 15.0
        sun = tn.sun(35.0, DATES[-1].timetuple().tm_yday)
        evening = last[(t > sun[1])]
        self.assertTrue(np.all(np.diff(evening) < 0), evening)
        self.assertTrue(np.all(evening > EXTREMES[-1][0]), evening)
        # UTC 19-23 of 14 June are the same local hours of 15 June's morning.
        self.assertFalse(np.allclose(last[t >= 24], self.hours[-2][t >= 24, 0, 1]), last)


class InvertedExtremes(kt.TempDirTestCase):
    """tmin above tmax on most pixel-days (swapped inputs) stops the run; on fewer they are
    counted and left empty. The line is drawn at half the pixel-days (docs/methods.md)."""

    def run_with_inverted_dates(self, inverted_dates, command):
        folder = os.path.join(self.tmp, "inverted-%d-%s" % (inverted_dates, command[0]))
        os.makedirs(folder)
        for k, d in enumerate(DATES):
            lo, hi = EXTREMES[k][0] + SHIFT, EXTREMES[k][1] + SHIFT
            if k < inverted_dates:
                lo, hi = hi, lo
            for name, values in (("tmin", lo), ("tmax", hi)):
                kt.write_raster(os.path.join(folder, "%s_%s.tif" % (name, d.isoformat())),
                                values.astype(np.float32), geotransform=GT, epsg=4326)
        out = os.path.join(folder, "out")
        done = kt.run_kalends(command + ["--tmin", os.path.join(folder, "tmin_*.tif"), "--tmax",
                                         os.path.join(folder, "tmax_*.tif"), "--units", "celsius", "--out", out])
        return done, out

    def test_majority_is_refused_minority_counted(self):
        for command in (["diurnal"], ["suitability"]):
            # 3 of 5 dates on all 4 pixels: 60 % of the pixel-days.
            done, out = self.run_with_inverted_dates(3, command)
            self.assertEqual(done.returncode, 2, done.stderr)
            lines = done.stderr.strip().splitlines()
            self.assertEqual(len(lines), 1, done.stderr)
            self.assertIn("tmin is above tmax on 60 % of pixel-days (12 of 20)", lines[0])
            self.assertIn("tmin_*.tif", lines[0])
            self.assertEqual(os.listdir(out) if os.path.isdir(out) else [], [])
            # 2 of 5: 40 %, below the line.
            done, out = self.run_with_inverted_dates(2, command)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertIn("8 pixel-day(s) with tmin above tmax were taken as missing", done.stderr)


if __name__ == "__main__":
    unittest.main()
