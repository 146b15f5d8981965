#!/usr/bin/python3
"""What a date marks in its composite (--date-marks), on real data: which date of a dated layer
a survey day reads (kalends extract), and the monthly calendar of kalends fill --every 1M.

Data (../shared/data, see its README):
  monthly-temperature/bcsd_obs_1999.nc: monthly mean air temperature of 1999 from the gridded
    observations of Maurer, E.P. et al. (2002), J. Climate 15(22):3237-3251. Its CF time values
    (days since 1950-01-01) fall on the last day of each month: the mean of a month is stamped
    at its end.
  alaska-ndvi/observed: MODIS NDVI 16-day composites (Didan 2015, MOD13A1 V006), 8 a year,
    day of year 145 to 257, 2004-2009: summers only, with the winters between.

Expected values are read here with Python GDAL: the band of the survey's month, at the cell
holding the point (gdal.InvGeoTransform), for cells observed in the file (flag 0, value as
stored). With --date-marks end a survey on 15 June reads the June mean (stamped 30 June); with
the default, start, it reads the file dated on or before the day, the May mean, which is what
a user who forgot the option would get.
"""
import csv
import datetime
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


class ExtractMonthEndDates(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        source = 'NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        g = kt.gdal()
        ds = g.Open(source)
        md = ds.GetMetadata()
        origin = datetime.date(1950, 1, 1)
        cls.stamps = [origin + datetime.timedelta(days=int(v))
                      for v in md["NETCDF_DIM_time_VALUES"].strip("{}").split(",")]
        # Each stamp is the last day of its month (the premise of this test).
        assert all((s + datetime.timedelta(days=1)).day == 1 for s in cls.stamps), cls.stamps
        tas = ds.ReadAsArray().astype(np.float64)
        nodata = ds.GetRasterBand(1).GetNoDataValue()
        cls.tas = np.where(tas == np.float32(nodata), np.nan, tas)
        cls.gt = ds.GetGeoTransform()
        ds = None
        cls.filled = os.path.join(cls.tmp, "filled")
        done = kt.run_kalends(["-q", "fill", source, "--out", cls.filled, "--method", "harmonic", "--harmonics", "2"])
        assert done.returncode == 0, done.stderr
        # Points at land cells, surveyed on a random day of a random month of 1999.
        rng = np.random.default_rng(19990615)
        land = np.argwhere(np.all(np.isfinite(cls.tas), axis=0))
        picks = land[rng.choice(len(land), 30, replace=False)]
        cls.points = []
        for i, (r, c) in enumerate(picks):
            month = int(rng.integers(2, 13))  # from February, so that 'start' has a month before
            day = int(rng.integers(1, 29))
            lon = cls.gt[0] + (c + rng.uniform(0.1, 0.9)) * cls.gt[1]
            lat = cls.gt[3] + (r + rng.uniform(0.1, 0.9)) * cls.gt[5]
            cls.points.append(("p%d" % i, lon, lat, datetime.date(1999, month, day), r, c))
        cls.csv = os.path.join(cls.tmp, "points.csv")
        with open(cls.csv, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["id", "longitude", "latitude", "date"])
            for pid, lon, lat, day, _, _ in cls.points:
                w.writerow([pid, "%.6f" % lon, "%.6f" % lat, day.isoformat()])

    def extract(self, *options):
        out = os.path.join(self.tmp, "table-%s.csv" % "-".join(options or ("default",)))
        done = kt.run_kalends(["extract", self.filled, "--points", self.csv, "--out", out] + list(options))
        self.assertEqual(done.returncode, 0, done.stderr)
        return {row["id"]: row for row in kt.read_table(out)}

    def check(self, rows, month_of):
        for pid, _, _, day, r, c in self.points:
            row = rows[pid]
            month = month_of(day)
            stamp = self.stamps[month - 1]
            self.assertEqual(row["tas.matched"], stamp.isoformat(), pid)
            self.assertEqual(row["tas.flag"], "0", pid)
            self.assertAlmostEqual(float(row["tas"]), self.tas[month - 1, r, c], delta=1e-5, msg=pid)

    def test_end_marks_read_the_survey_month(self):
        self.check(self.extract("--date-marks", "end"), lambda day: day.month)

    def test_the_default_reads_month_ends_as_ends(self):
        # Read as starts (the default before version 0.3.19), each month's mean had been matched
        # to the month after, with a note the user could miss.
        self.check(self.extract(), lambda day: day.month)

    def test_month_ends_read_as_ends_are_said(self):
        # The automatic reading says what it did and how to read them as starts; given marks,
        # nothing to say.
        for options, said in (([], True), (["--date-marks", "end"], False), (["--date-marks", "start"], False)):
            done = kt.run_kalends(["extract", self.filled, "--points", self.csv, "--out",
                                   os.path.join(self.tmp, "said.csv")] + options)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertEqual("the input dates are the last days of their months" in done.stderr, said, done.stderr)
            if said:
                self.assertIn("read as month ends", done.stderr)
                self.assertIn("give --date-marks start", done.stderr)

    def test_start_marks_read_the_month_before(self):
        # The file dated on or before the survey day: the previous month's mean (its stamp is the
        # previous month's last day), unless the survey is on the last day of a month.
        self.check(self.extract("--date-marks", "start"), lambda day: day.month if day == self.stamps[day.month - 1] else day.month - 1)


class MonthEndsAllButOne(kt.TempDirTestCase):
    """The Maurer 1999 monthly means (real, ../shared/data/monthly-temperature) as twelve GeoTIFFs
    stamped at their months' ends, but June stamped on the 29th: still month ends by default (one
    such date had turned the whole stack to starts, every month taken for the month after, without
    a note). diurnal says so too."""

    def test_one_stamp_a_day_early_keeps_the_month_ends(self):
        self.check_one_early(5)   # 29 June

    def test_a_february_stamped_a_day_early_keeps_the_month_ends(self):
        # 27 February is 27 days after 31 January: the months-apart test had asked 28.
        self.check_one_early(1)

    def check_one_early(self, early):
        g = kt.gdal()
        ds = g.Open('NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc"))
        gt, wkt = ds.GetGeoTransform(), ds.GetProjection() or None
        tas = ds.ReadAsArray().astype(np.float32)
        ds = None
        folder = os.path.join(self.tmp, "months-%d" % early)
        os.makedirs(folder)
        for m in range(12):
            last = (datetime.date(1999 + (m == 11), (m + 1) % 12 + 1, 1) - datetime.timedelta(days=1))
            if m == early:
                last -= datetime.timedelta(days=1)
            plane = np.where(tas[m] > 1e19, np.nan, tas[m]).astype(np.float32)
            kt.write_raster(os.path.join(folder, "tas_%s.tif" % last.isoformat()), plane, geotransform=gt, epsg=4326)
        outs = {}
        for marks in ([], ["--date-marks", "end"]):
            out = os.path.join(self.tmp, "seasons-%d-" % early + ("-".join(marks) or "default"))
            done = kt.run_kalends(["seasons", os.path.join(folder, "*.tif"), "--out", out] + marks)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertEqual("the input dates are the last days of their months" in done.stderr, not marks, done.stderr)
            outs[bool(marks)] = g.Open(os.path.join(out, "tas_year_1999.tif")).ReadAsArray()
        np.testing.assert_array_equal(outs[False], outs[True])
        land = np.isfinite(outs[False][0])
        # July is July's own mean, not June's (read as starts it would be).
        np.testing.assert_allclose(outs[False][6][land], tas[6][land], rtol=1e-6)
        # diurnal reads the dates by the same rule, and says so.
        done = kt.run_kalends(["diurnal", "--tmin", os.path.join(folder, "*.tif"), "--tmax", os.path.join(folder, "*.tif"),
                               "--units", "celsius", "--out", os.path.join(self.tmp, "hours-%d" % early)])
        self.assertIn("the input dates are the last days of their months", done.stdout + done.stderr)


class JobNotesOnMonthEnds(kt.TempDirTestCase):
    """The month-end note in a job names the step's key, in the fill and the extract step alike."""

    def test_a_jobs_notes_name_date_marks(self):
        kt.require_binary(kt.KALENDS_BIN)
        source = 'NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\np1,-80.0,35.0,1999-06-15\n")
        job = os.path.join(self.tmp, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.tas]\nstack = \'%s\'\n'
                    '[[step]]\nid = "fill"\ndo = "fill"\ninput = "tas"\nmethod = "whittaker"\nlambda = 0.01\n'
                    'every = "1M"\n[[step]]\nid = "extract"\ndo = "extract"\ninput = ["fill"]\npoints = "points.csv"\n'
                    % source)
        done = kt.run_kalends(["run", job])
        self.assertEqual(done.returncode, 0, done.stderr)
        notes = [line for line in done.stdout.splitlines() if "last days of their months" in line]
        self.assertEqual(len(notes), 2, done.stdout)      # the fill's and the extract's
        for note in notes:
            self.assertIn('give date_marks = "start"', note)
            self.assertNotIn("--date-marks", note)


class ExtractBetweenSeasons(kt.TempDirTestCase):
    """A winter survey day is covered by no 16-day composite of the Alaska summers."""

    def test_a_day_between_composites_reads_nothing_and_says_why(self):
        kt.require_binary(kt.KALENDS_BIN)
        folder = kt.shared_path("alaska-ndvi", "observed")
        files = sorted(f for f in os.listdir(folder) if f.endswith(".tif"))
        # The summers of 2004 and 2005, given a geographic grid (the files have none) so that
        # points can be placed: 0.01 degree cells from 150 W, 65 N.
        stack = os.path.join(self.tmp, "stack")
        os.makedirs(stack)
        g = kt.gdal()
        for name in files:
            if name.startswith("ndvi_2004") or name.startswith("ndvi_2005"):
                g.Translate(os.path.join(stack, name), os.path.join(folder, name), outputSRS="EPSG:4326",
                            outputBounds=[-150.0, 65.0, -149.0, 64.0])
        filled = os.path.join(self.tmp, "filled")
        kt.run_fill_ok(self, [os.path.join(stack, "*.tif"), "--out", filled, "--method", "harmonic", "--harmonics", "1"])
        last_2004 = [f for f in files if f.startswith("ndvi_2004")][-1][5:15]
        first_2005 = [f for f in files if f.startswith("ndvi_2005")][0][5:15]
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\nwinter,-149.495,64.505,2005-01-15\n"
                    "summer,-149.495,64.505,%s\n" % first_2005)
        out = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["extract", filled, "--points", points, "--out", out, "--lags", "1,2"])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = {row["id"]: row for row in kt.read_table(out)}
        self.assertEqual(rows["winter"]["ndvi"], "")
        self.assertIn("between %s and %s" % (last_2004, first_2005), rows["winter"]["ndvi.reason"])
        self.assertEqual(rows["summer"]["ndvi.matched"], first_2005)
        self.assertEqual(rows["summer"]["ndvi.reason"], "")
        # Lags read the composites before the gap on purpose (docs/extract.md): lag 1 the last
        # of 2004, lag 2 the one before, with the values GDAL reads from those files.
        dates_2004 = [f[5:15] for f in files if f.startswith("ndvi_2004")]
        for lag, date in ((1, dates_2004[-1]), (2, dates_2004[-2])):
            self.assertEqual(rows["winter"]["ndvi.lag%d.matched" % lag], date)
            ds = g.Open(os.path.join(filled, "ndvi_%s.tif" % date))
            expected = ds.GetRasterBand(1).ReadAsArray()[49, 50]  # -149.495, 64.505 at 0.01 degrees
            ds = None
            self.assertAlmostEqual(float(rows["winter"]["ndvi.lag%d" % lag]), expected, delta=1e-6)
        # In season, lag 1 is the composite before the one that stands for the day.
        self.assertEqual(rows["summer"]["ndvi.lag1.matched"], dates_2004[-1])


class CompositesRestartEachFirstOfJanuary(kt.TempDirTestCase):
    """MODIS 8- and 16-day composites restart on 1 January (days of year 1, 9, ..., 361, or 1,
    17, ..., 353): the last composite of a year covers only the days to 31 December (5 or 6 of
    an 8-day step). That is the products' published calendar (MOD13/MOD11 user guides; from
    memory). Without the next year's 1 January composite (a year missing, or the stack's end)
    the last composite of 2019 had stood for 1-3 January 2020: seasons wrote a 2020 layer of
    that December value, the January synoptic counted it as a fourth year, and extract gave it to
    surveys of early January 2020."""

    def test_the_last_composite_of_a_year_stops_at_its_end(self):
        kt.require_binary(kt.KALENDS_BIN)
        stack = os.path.join(self.tmp, "stack")
        os.makedirs(stack)
        rng = np.random.default_rng(7)
        values = {}
        for year in (2018, 2019, 2021):  # 2020 missing entirely
            for doy in range(1, 366, 8):
                date = datetime.date(year, 1, 1) + datetime.timedelta(days=doy - 1)
                values[date] = float(rng.uniform(0.1, 0.9))
                kt.write_raster(os.path.join(stack, "evi_%s.tif" % date.isoformat()),
                                np.full((2, 2), values[date], np.float32),
                                geotransform=(10.0, 0.01, 0, 5.0, 0, -0.01), epsg=4326)
        seasons = os.path.join(self.tmp, "seasons")
        done = kt.run_kalends(["seasons", os.path.join(stack, "*.tif"), "--out", seasons])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("no composite stands for any day of 2020", done.stderr)
        g = kt.gdal()
        year_2020 = g.Open(os.path.join(seasons, "evi_year_2020.tif")).ReadAsArray()
        self.assertTrue(np.all(np.isnan(year_2020)), "2020 has no composite: %s" % year_2020[:, 0, 0])
        # Asking for the missing year alone is refused, as a year outside the stack is (it had
        # written empty layers with exit 0); suitability, on the same period weights, says what
        # seasons says.
        done = kt.run_kalends(["seasons", os.path.join(stack, "*.tif"), "--out", seasons + "-2020", "--years", "2020"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--years: no composite stands for any day of 2020", done.stderr)
        self.assertFalse(os.path.exists(seasons + "-2020"))
        for years, code in ((None, 0), ("2020", 2)):
            args = ["-q", "suitability", "--temperature", os.path.join(stack, "*.tif"), "--units", "celsius",
                    "--model", "window", "--out", os.path.join(self.tmp, "suitability-%s" % years)]
            done = kt.run_kalends(args + (["--years", years] if years else []))
            self.assertEqual(done.returncode, code, done.stderr)
            # A note on the data: shown with -q too, on stderr (suitability's had been on stdout,
            # hidden by -q).
            self.assertIn("no composite stands for any day of 2020", done.stderr)
        # January: the day-weighted mean of the composites of days 1-25 and 6 of day 25's
        # (January has 31 days), in each of the three years; the synoptic mean over those three.
        januaries = []
        for year in (2018, 2019, 2021):
            weights = {datetime.date(year, 1, d): 8 for d in (1, 9, 17)}
            weights[datetime.date(year, 1, 25)] = 7
            januaries.append(sum(values[d] * w for d, w in weights.items()) / 31)
        synoptic_years = g.Open(os.path.join(seasons, "evi_synoptic_years.tif")).ReadAsArray()[0]
        self.assertEqual(float(synoptic_years[0, 0]), 3.0)
        synoptic = g.Open(os.path.join(seasons, "evi_synoptic_mean.tif")).ReadAsArray()[0]
        self.assertAlmostEqual(float(synoptic[0, 0]), float(np.mean(januaries)), delta=1e-6)
        # December 2019: the composites of days 329 ... 361, the last one for 5 days only.
        dec_2019 = g.Open(os.path.join(seasons, "evi_year_2019.tif")).ReadAsArray()[11]
        weights = {datetime.date(2019, 11, 25): 2, datetime.date(2019, 12, 3): 8, datetime.date(2019, 12, 11): 8,
                   datetime.date(2019, 12, 19): 8, datetime.date(2019, 12, 27): 5}
        self.assertAlmostEqual(float(dec_2019[0, 0]), sum(values[d] * w for d, w in weights.items()) / 31,
                               delta=1e-6)
        # extract: 31 December reads the last composite of 2019; 1 and 3 January 2020 read none.
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\ndec31,10.005,4.995,2019-12-31\njan1,10.005,4.995,2020-01-01\n"
                    "jan3,10.005,4.995,2020-01-03\nlast,10.005,4.995,2021-12-31\nafter,10.005,4.995,2022-01-02\n")
        filled = os.path.join(self.tmp, "filled")  # nothing to fill: the values pass through
        done = kt.run_kalends(["fill", os.path.join(stack, "*.tif"), "--out", filled, "--every", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        # The calendar's twelve months of 2020 rest on the curve across the missing year: said
        # (they had been written as any other month, June 2020 at -0.57 with sd 1.96, without a
        # word). January 2020 counts among them now that December's composite stops on the 31st.
        self.assertIn("12 calendar layers (from 2020-01-01) lie in the season but where the stack has no composite "
                      "that year", done.stderr)
        out = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["extract", filled, "--points", points, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = {row["id"]: row for row in kt.read_table(out)}
        self.assertEqual(rows["dec31"]["evi.matched"], "2019-12-27")
        self.assertAlmostEqual(float(rows["dec31"]["evi"]), values[datetime.date(2019, 12, 27)], delta=1e-6)
        for day in ("jan1", "jan3"):
            self.assertEqual(rows[day]["evi"], "")
            self.assertIn("no layer stands for the survey date (between 2019-12-27 and 2021-01-01)",
                          rows[day]["evi.reason"])
        self.assertEqual(rows["last"]["evi.matched"], "2021-12-27")
        self.assertIn("survey date after the layers", rows["after"]["evi.reason"])

class FillCalendarMonthEnds(kt.TempDirTestCase):
    """kalends fill --every 1M on monthly means stamped at their month's end (Maurer 1999).

    A value stands for the middle of its composite: with --date-marks end the curve's value at
    31 January stands for mid-January, and each calendar month's mean of the curve is close to
    that month's own mean in the file; read as starts it stands for mid-February, a month late.
    Compared here with the file's values read by GDAL (RMS over land cells and months)."""

    def test_end_marks_put_each_month_in_its_own_month(self):
        kt.require_binary(kt.KALENDS_BIN)
        source = 'NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        g = kt.gdal()
        ds = g.Open(source)
        tas = ds.ReadAsArray().astype(np.float64)
        ds = None
        tas[tas > 1e19] = np.nan  # _FillValue over the sea
        rms, months = {}, {}
        for marks in ("start", "end", "auto"):
            out = os.path.join(self.tmp, marks)
            done = kt.run_kalends(["-q", "fill", source, "--out", out, "--method", "whittaker", "--lambda", "0.01",
                                   "--every", "1M", "--date-marks", marks])
            self.assertEqual(done.returncode, 0, done.stderr)
            # Read as ends by the automatic rule (the default), a note says so.
            self.assertEqual("the input dates are the last days of their months" in done.stderr, marks == "auto",
                             done.stderr)
            calendar = os.path.join(out, "calendar-1M")
            names = sorted(os.listdir(calendar))
            months[marks] = [n[4:11] for n in names]
            errors = []
            for n in names:
                year, month = int(n[4:8]), int(n[9:11])
                if year != 1999:
                    continue
                cal = g.Open(os.path.join(calendar, n))
                self.assertEqual(cal.GetMetadataItem("KALENDS_DATE_MARKS"), "end" if marks == "auto" else marks)
                value = cal.ReadAsArray()[0].astype(np.float64)
                cal = None
                errors.append(np.nanmean((value - tas[month - 1]) ** 2))
            rms[marks] = float(np.sqrt(np.mean(errors)))
        print("\nMaurer 1999, fill --every 1M against the file's monthly means: RMS %.2f C with "
              "--date-marks end, %.2f C read as starts" % (rms["end"], rms["start"]), file=sys.stderr)
        self.assertEqual(months["end"], ["1999-%02d" % m for m in range(1, 13)])
        # Read as starts, 31 January stands for 31 January to 27 February (seasons' rule): the
        # calendar runs from January 1999 (its 31st alone) to January 2000.
        self.assertEqual(months["start"], ["1999-%02d" % m for m in range(1, 13)] + ["2000-01"])
        self.assertLess(rms["end"], 1.0)
        self.assertLess(rms["end"], 0.25 * rms["start"])
        self.assertEqual(months["auto"], months["end"])
        self.assertEqual(rms["auto"], rms["end"])



class CalendarDaysAtTheirMiddles(kt.TempDirTestCase):
    """A calendar period is the day-weighted mean of the curve over its days (methods.md), each
    day standing at its middle as each composite does. Read at 00:00, a daily stack whose every
    day holds its month's number gave February 1.98 (half of 31 January in, half of 28 February
    out), and 8-day composites holding k gave k - 0.0625 for their own 8 days. The expected
    values are the stacks' own (each period covers exactly what it should): the linear curve's
    mean over symmetric days."""

    def fill_calendar(self, folder, every, dates, values, extra=()):
        os.makedirs(folder)
        for date, value in zip(dates, values):
            kt.write_raster(os.path.join(folder, "lst_%s.tif" % date.isoformat()), np.full((3, 2), value, np.float32),
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        out = folder + "-out"
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--out", out, "--every", every,
                               "--method", "whittaker", "--lambda", "1e-6", "--order", "1"] + list(extra))
        self.assertEqual(done.returncode, 0, done.stderr)
        folder_out = os.path.join(out, "calendar-" + every)
        means = {}
        for name in sorted(os.listdir(folder_out)):
            if name.endswith(".tif"):
                ds = kt.gdal().Open(os.path.join(folder_out, name))  # held while its band is read
                means[name[4:14]] = float(ds.GetRasterBand(1).ReadAsArray().mean())
                ds = None
        return means

    def test_a_daily_stack_gives_each_month_its_own_days(self):
        days = [datetime.date(2021, 1, 1) + datetime.timedelta(days=k) for k in range(365)]
        means = self.fill_calendar(os.path.join(self.tmp, "daily"), "1M", days, [d.month for d in days])
        self.assertEqual(len(means), 12)
        for label, value in means.items():
            self.assertAlmostEqual(value, int(label[5:7]), delta=2e-4, msg=label)

    def test_eight_day_composites_give_each_period_its_composite(self):
        dates = [datetime.date(2021, 1, 1) + datetime.timedelta(days=8 * k) for k in range(30)]
        means = self.fill_calendar(os.path.join(self.tmp, "eight"), "8d", dates, [k + 1.0 for k in range(30)])
        # The first and last periods hold the curve at the end composites' values before and after
        # their middles (methods.md), so only the periods between are the linear curve's means.
        for k, (label, value) in enumerate(sorted(means.items())[:30]):
            self.assertEqual(label, dates[k].isoformat())
            if 0 < k < 29:
                self.assertAlmostEqual(value, k + 1.0, delta=2e-4, msg=label)


class MonthMiddleStamps(kt.TempDirTestCase):
    def test_monthly_means_stamped_mid_month_stand_for_their_months(self):
        # CF monthly means are often stamped at the middle of their time bounds (the 15th or
        # 16th). Read as starts by default, each had stood for half its month and half the next:
        # a stack whose months hold their numbers gave January 4.42 (December's 12 in it).
        folder = os.path.join(self.tmp, "mid")
        os.makedirs(folder)
        for year in (2019, 2020, 2021):
            for month in range(1, 13):
                day = 15 if month == 2 else 16
                kt.write_raster(os.path.join(folder, "tas_%04d-%02d-%02d.tif" % (year, month, day)),
                                np.full((3, 2), float(month), np.float32),
                                geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        out = os.path.join(self.tmp, "mid-seasons")
        done = kt.run_kalends(["seasons", os.path.join(folder, "*.tif"), "--out", out, "--period", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("the input dates are the middles of their months: read as middles", done.stderr)
        ds = kt.gdal().Open(os.path.join(out, "tas_synoptic_mean.tif"))
        means = [float(ds.GetRasterBand(b).ReadAsArray().mean()) for b in range(1, 13)]
        ds = None
        # Each month mostly its own: a fixed step of 30 days gives a day or two of a month to its
        # neighbour (January 31 to February), so within 0.1 of the month's number, not 0.5 or more.
        for month, value in enumerate(means, start=1):
            self.assertAlmostEqual(value, month, delta=0.1, msg=month)
        done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif")])
        self.assertIn("the dates are the middles of their months", done.stdout)

if __name__ == "__main__":
    unittest.main()
