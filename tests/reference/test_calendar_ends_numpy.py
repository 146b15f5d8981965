#!/usr/bin/python3
"""The regular calendar of kalends fill --every at the two ends of a stack, against numpy.

Data (../shared/data, see its README): alaska-ndvi/observed, MODIS NDVI 16-day composites
(Didan 2015, MOD13A1 V006), 8 a year, day of year 145 to 257, 2004-2009, dated at their first
day (--date-marks start).

A composite stands for 16 days from its date, cut where the next begins and at 31 December
(methods.md, Seasonal layers): `seasons` and `extract` give 24 May - 8 June 2004 to the first
composite and 14-29 September 2009 to the last. The calendar covers the same days: May 2004
(8 days) as May 2005-2009 (7-8), September 2009 (29 days) as the other Septembers, and the
16-day periods of 24 May 2004 and 14 September 2009 their 16 days. Values: the Whittaker curve
(order 2, lambda 1, plain differences on the grid, W + lambda D'D solved by numpy), read at
d - 8 by linear interpolation between slots and held at the end slots (numpy.interp), averaged
over the period's days in season.
"""
import datetime as dt
import glob
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

X0, Y0, SIZE = 30, 40, 12  # a small window: the test stays fast


def period_of(day, every):
    d = dt.date.fromordinal(day)
    if every == "1M":
        nxt = dt.date(d.year + (d.month == 12), d.month % 12 + 1, 1)
        return dt.date(d.year, d.month, 1).toordinal(), nxt.toordinal()
    n = int(every[:-1])
    jan1, next_jan1 = dt.date(d.year, 1, 1).toordinal(), dt.date(d.year + 1, 1, 1).toordinal()
    per_year = -(-365 // n)  # the last period of a year is the shorter remainder (day 366 joins it)
    index = min((day - jan1) // n, per_year - 1)
    first = jan1 + index * n
    return first, next_jan1 if index == per_year - 1 else first + n


class CalendarEnds(kt.TempDirTestCase):
    def test_first_and_last_composites_cover_their_days(self):
        kt.require_binary(kt.KALENDS_BIN)
        g = kt.gdal()
        pattern = os.path.join(kt.shared_path("alaska-ndvi", "observed"), "*.tif")
        files = sorted(glob.glob(pattern))
        dates = [dt.date.fromisoformat(os.path.basename(f)[5:15]) for f in files]
        y = np.stack([g.Open(f).ReadAsArray(X0, Y0, SIZE, SIZE).astype(np.float64) for f in files])
        y = y.reshape(len(files), -1).T
        at = np.array([d.toordinal() for d in dates])
        off = at - at[0]
        step = 16
        slots, previous = [], -1
        for o in off:
            previous = max(int(np.floor(o / step + 0.5)), previous + 1)
            slots.append(previous)
        slots = np.array(slots)
        n = slots[-1] + 1
        grid = np.arange(n) * float(step)
        grid[slots] = off
        penalty = np.diff(np.eye(n), 2, axis=0)
        penalty = penalty.T @ penalty
        curve = np.full((y.shape[0], n), np.nan)
        for p in range(y.shape[0]):
            ok = np.isfinite(y[p])
            if ok.sum() < 3:
                continue
            w, v = np.zeros(n), np.zeros(n)
            w[slots[ok]], v[slots[ok]] = 1, y[p][ok]
            z = np.linalg.solve(np.diag(w) + 1.0 * penalty, w * v)
            z[(grid < off[ok][0] - 32) | (grid > off[ok][-1] + 32)] = np.nan  # --max-extrapolation 32
            curve[p] = z
        season = {(d + dt.timedelta(k)).timetuple().tm_yday for d in dates for k in range(step)}
        first, last = at[0], at[-1] + step - 1  # 24 May 2004 .. 29 September 2009
        for every, ends in (("1M", {"2004-05-01": 8, "2009-09-01": 29}),
                            ("16d", {"2004-05-24": 16, "2009-09-14": 16})):
            out = os.path.join(self.tmp, every)
            kt.run_fill_ok(self, [pattern, "--out", out, "--method",
                                  "whittaker", "--lambda", "1", "--every", every, "--subset",
                                  "%d,%d,%d,%d" % (X0, Y0, SIZE, SIZE), "--threads", "2"])
            expected, day = {}, first
            while day <= last:
                a, b = period_of(day, every)
                days = [x for x in range(a, b) if first <= x <= last and dt.date.fromordinal(x).timetuple().tm_yday in season]
                if days:
                    # Each day at its middle (noon), each composite at the middle of its days.
                    t = np.array(days, float) + 0.5 - (at[0] + step / 2)
                    expected[dt.date.fromordinal(a).isoformat()] = (
                        len(days), np.array([np.interp(t, grid, c).mean() for c in curve]))
                day = b
            for label, covered in ends.items():
                self.assertEqual(expected[label][0], covered, label)
            written = {}
            for path in glob.glob(os.path.join(out, "calendar-" + every, "*.tif")):
                ds = g.Open(path)
                covered = int(ds.GetMetadataItem("KALENDS_PERIOD_DAYS_COVERED"))
                if covered:
                    written[os.path.basename(path)[5:15]] = (covered, ds.GetRasterBand(1).ReadAsArray().ravel())
            self.assertEqual(sorted(written), sorted(expected), every)
            for label, (covered, value) in written.items():
                self.assertEqual(covered, expected[label][0], label)
                np.testing.assert_allclose(value, expected[label][1], atol=1e-6, err_msg=label)


class CalendarBeforeTheGrid(kt.TempDirTestCase):
    def test_a_period_before_the_first_year_is_written_with_a_reach(self):
        # Invented: a 4 x 4 px plot on the fictional Valdoria plateau, 16-day composites from
        # 1 January 2021, two years, dated at their ends. The first stands for 17 December 2020
        # to 1 January 2021: December 2020 is a calendar period, from the curve's first slot.
        # With --reach it had been written empty, its flag band NaN (no year's curve wrote it).
        kt.require_binary(kt.KALENDS_BIN)
        stack = os.path.join(self.tmp, "stack")
        os.makedirs(stack)
        for k in range(46):
            day = dt.date(2021 + k // 23, 1, 1) + dt.timedelta(days=16 * (k % 23))
            value = 0.3 + 0.2 * np.sin(2 * np.pi * day.timetuple().tm_yday / 365)
            kt.write_raster(os.path.join(stack, "ndvi_%s.tif" % day.isoformat()), np.full((4, 4), value, np.float32),
                            geotransform=(400000, 250, 0, 7200000, 0, -250), epsg=32606)
        g = kt.gdal()
        got = {}
        for reach in ("0", "100"):
            out = os.path.join(self.tmp, "reach" + reach)
            kt.run_fill_ok(self, [os.path.join(stack, "*.tif"), "--out", out, "--lambda", "1", "--every", "1M",
                                  "--date-marks", "end", "--reach", reach, "--threads", "2"])
            ds = g.Open(os.path.join(out, "calendar-1M", "ndvi_2020-12-01.tif"))
            self.assertEqual(ds.GetMetadataItem("KALENDS_PERIOD_DAYS_COVERED"), "15")
            got[reach] = ds.ReadAsArray()
        for reach, bands in got.items():
            self.assertTrue(np.isfinite(bands[0]).all(), reach)
            self.assertTrue(np.isin(bands[2], (0, 2)).all(), reach)
        np.testing.assert_allclose(got["100"][0], got["0"][0], atol=1e-6)


if __name__ == "__main__":
    unittest.main()
