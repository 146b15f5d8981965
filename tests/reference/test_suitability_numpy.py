#!/usr/bin/python3
"""`kalends suitability` end to end on a small invented land-surface temperature stack (day and
night overpasses, kelvin x 50 in uint16 with scale 0.02, as LST products store it), checked
against a numpy computation of every step: pixel latitude and longitude from the georeferencing
(GDAL's osr), Cooper's declination, the extremes inferred from the 13:30 and 01:30 samples, the
Parton & Logan (1981) hours, the Mordecai et al. (2013) relative R0 averaged over 24 hourly
midpoints, day-weighted monthly means (each composite stands for the 16 days from its date)
and the suitable-month counts. Invented data: mechanics only, no accuracy claim.

Also: bad input gives one line naming the file, a non-zero exit and no output.
"""
import datetime as dt
import glob
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402
import thermal_numpy as tn  # noqa: E402

EPSG = 32736
GT = (420000.0, 250.0, 0.0, 9650000.0, 0.0, -250.0)
WIDTH, HEIGHT = 9, 7
DATES = [dt.date(2021, 1, 1) + dt.timedelta(days=16 * i) for i in range(23)]


def write_lst(path, kelvin, unit="K", scale=0.02, epsg=EPSG):
    raw = np.where(np.isfinite(kelvin), np.round(kelvin * 50), 0).astype(np.uint16)
    kt.write_raster(path, raw, geotransform=GT if epsg else None, epsg=epsg, scale=scale, nodata=0)
    if unit:
        ds = kt.gdal().Open(path, 1)
        ds.GetRasterBand(1).SetUnitType(unit)
        ds = None


def make_stack(folder, rng, **kwargs):
    os.makedirs(os.path.join(folder, "day"), exist_ok=True)
    os.makedirs(os.path.join(folder, "night"), exist_ok=True)
    cols, rows = np.meshgrid(np.arange(WIDTH), np.arange(HEIGHT))
    for i, d in enumerate(DATES):
        season = np.cos(2 * np.pi * (d.timetuple().tm_yday - 30) / 365.0)
        day = 300.0 + 8 * season + 0.8 * cols - 0.5 * rows + rng.normal(0, 0.5, cols.shape)
        night = 284.0 + 5 * season + 0.3 * cols + rng.normal(0, 0.5, cols.shape)
        day[rng.random(cols.shape) < 0.08] = np.nan  # cloud gaps
        night[rng.random(cols.shape) < 0.08] = np.nan
        write_lst(os.path.join(folder, "day", "lst_day_%s.tif" % d.isoformat()), day, **kwargs)
        write_lst(os.path.join(folder, "night", "lst_night_%s.tif" % d.isoformat()), night, **kwargs)


def pixel_lat_lon():
    from osgeo import osr
    src, dst = osr.SpatialReference(), osr.SpatialReference()
    src.ImportFromEPSG(EPSG)
    dst.ImportFromEPSG(4326)
    src.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    dst.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    t = osr.CoordinateTransformation(src, dst)
    lat, lon = np.empty((HEIGHT, WIDTH)), np.empty((HEIGHT, WIDTH))
    for r in range(HEIGHT):
        for c in range(WIDTH):
            x, y, _ = t.TransformPoint(GT[0] + (c + 0.5) * GT[1], GT[3] + (r + 0.5) * GT[5])
            lon[r, c], lat[r, c] = x, y
    return lat, lon


def read_celsius(path):
    ds = kt.gdal().Open(path)
    band = ds.GetRasterBand(1)
    raw = band.ReadAsArray().astype(np.float64)
    physical = np.where(raw == band.GetNoDataValue(), np.nan, (raw * band.GetScale()).astype(np.float32))
    ds = None
    return (physical.astype(np.float64) - 273.15).astype(np.float32).astype(np.float64)


def read_bands(path):
    ds = kt.gdal().Open(path)
    out = ds.ReadAsArray().astype(np.float64)
    meta = ds.GetMetadata()
    ds = None
    return out, meta


class SuitabilityOverpasses(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.stack = os.path.join(cls.tmp, "lst")
        make_stack(cls.stack, np.random.default_rng(2))
        cls.out = os.path.join(cls.tmp, "suit")
        cls.done = kt.run_kalends(["suitability", "--day", os.path.join(cls.stack, "day", "*.tif"),
                                   "--night", os.path.join(cls.stack, "night", "*.tif"),
                                   "--model", "r0-2013", "--out", cls.out])

    def expected_months(self):
        lat, _ = pixel_lat_lon()
        daily = []
        for d in DATES:
            day = read_celsius(os.path.join(self.stack, "day", "lst_day_%s.tif" % d.isoformat()))
            night = read_celsius(os.path.join(self.stack, "night", "lst_night_%s.tif" % d.isoformat()))
            doy = (d + dt.timedelta(days=8)).timetuple().tm_yday  # the middle of the composite
            rise, _, length = tn.sun(lat, doy)
            tmin, tmax = tn.extremes_from_samples(day, 13.5, night, 1.5, rise, length)
            hours = [tn.parton_logan(h + 0.5, tmin, tmax, rise, length, tmin, tmax, rise, length, tmin, rise)
                     for h in range(24)]
            r = np.mean([tn.relative("r0-2013", x.ravel()).reshape(x.shape) for x in hours], axis=0)
            daily.append(np.where(np.isfinite(tmin), r, np.nan))
        daily = np.array(daily)
        months = np.full((12, HEIGHT, WIDTH), np.nan)
        for m in range(12):
            first = dt.date(2021, m + 1, 1)
            last = dt.date(2021 + (m == 11), (m + 1) % 12 + 1, 1)
            total = np.zeros((HEIGHT, WIDTH))
            weight = np.zeros((HEIGHT, WIDTH))
            for i, d in enumerate(DATES):
                end = DATES[i + 1] if i + 1 < len(DATES) else d + dt.timedelta(days=16)
                overlap = (min(end, last) - max(d, first)).days
                if overlap > 0:
                    ok = np.isfinite(daily[i])
                    total += np.where(ok, overlap * np.nan_to_num(daily[i]), 0)
                    weight += np.where(ok, overlap, 0)
            months[m] = np.where(weight > 0, total / np.where(weight > 0, weight, 1), np.nan)
        return months

    def test_layers_equal_numpy(self):
        self.assertEqual(self.done.returncode, 0, self.done.stderr)
        expected = self.expected_months()
        year, meta = read_bands(os.path.join(self.out, "r0-2013_year_2021.tif"))
        self.assertIn("not malaria risk", meta["KALENDS_CAUTION"])
        ok = np.isfinite(expected)
        np.testing.assert_array_equal(np.isfinite(year), ok)
        self.assertLess(np.max(np.abs(year[ok] - expected[ok])), 2e-5)
        self.assertGreater(np.nanmax(expected) - np.nanmin(expected), 0.2)  # the months differ
        synoptic, _ = read_bands(os.path.join(self.out, "r0-2013_synoptic.tif"))
        np.testing.assert_allclose(synoptic[ok], year[ok], atol=1e-7)  # one year: synoptic = the year
        summary, _ = read_bands(os.path.join(self.out, "r0-2013_summary_2021.tif"))
        full = np.all(ok, axis=0)
        np.testing.assert_array_equal(summary[0][full], (expected > 0).sum(axis=0)[full])
        self.assertTrue(np.all(np.isnan(summary[0][~full])))
        # The average count is over the pixels with a value in every month, and says so where
        # those are not all: it had read as the whole area's.
        self.assertGreater(int((~full).sum()), 0)
        self.assertIn("per pixel on average (suitability above 0), over the %d of %d pixels with a value in every "
                      "period" % (full.sum(), full.size), self.done.stdout)

    def test_diurnal_hours_from_overpasses_equal_numpy(self):
        out = os.path.join(self.tmp, "hours")
        done = kt.run_kalends(["-q", "diurnal", "--day", os.path.join(self.stack, "day", "*.tif"),
                               "--night", os.path.join(self.stack, "night", "*.tif"), "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        lat, lon = pixel_lat_lon()
        for d in (DATES[0], DATES[11]):
            got, meta = read_bands(os.path.join(out, "diurnal_%s.tif" % d.isoformat()))
            day = read_celsius(os.path.join(self.stack, "day", "lst_day_%s.tif" % d.isoformat()))
            night = read_celsius(os.path.join(self.stack, "night", "lst_night_%s.tif" % d.isoformat()))
            rise, _, length = tn.sun(lat, (d + dt.timedelta(days=8)).timetuple().tm_yday)
            tmin, tmax = tn.extremes_from_samples(day, 13.5, night, 1.5, rise, length)
            for h in range(24):
                t = np.mod(h + lon / 15.0, 24)  # UTC -> local solar time; the same typical day
                expected = tn.parton_logan(t, tmin, tmax, rise, length, tmin, tmax, rise, length, tmin, rise)
                ok = np.isfinite(expected)
                np.testing.assert_array_equal(np.isfinite(got[h]), ok)
                self.assertLess(np.max(np.abs(got[h][ok] - expected[ok])), 1e-4, "hour %d" % h)

    def test_caution_is_printed(self):
        self.assertEqual(self.done.returncode, 0, self.done.stderr)
        lines = [l for l in self.done.stderr.splitlines() if "not malaria risk" in l]
        self.assertEqual(len(lines), 1)
        self.assertIn("land-surface temperature is not air temperature", lines[0])
        # What the issue asks the reminder to say, and what else a reader of the layers needs.
        for words in ("by day it can be far hotter, above all in dry, bare areas", "a relative index",
                      "vectors, rainfall, humidity, interventions and immunity are not in it",
                      "decisions belong with national programme data"):
            self.assertIn(words, lines[0])


class BadInput(kt.TempDirTestCase):
    def run_bad(self, args, must_name):
        out = os.path.join(self.tmp, "out-%d" % len(os.listdir(self.tmp)))
        done = kt.run_kalends(["suitability"] + args + ["--out", out])
        self.assertNotEqual(done.returncode, 0)
        lines = done.stderr.strip().splitlines()
        self.assertEqual(len(lines), 1, done.stderr)
        self.assertIn(must_name, lines[0])
        self.assertEqual(glob.glob(os.path.join(out, "*.tif")), [])
        return lines[0]

    def test_missing_scale_factor(self):
        folder = os.path.join(self.tmp, "noscale")
        make_stack(folder, np.random.default_rng(1), scale=None)
        line = self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"], "noscale")
        self.assertIn("scale", line)

    def test_one_date_without_its_scale_factor(self):
        # 22 dates of kelvin x 50 with scale 0.02 and one date stored without it: that date's
        # values (about 15000 "kelvin") were all taken as missing among the counted values, and
        # the layers of that date written empty. Refused, naming the file.
        folder = os.path.join(self.tmp, "onescale")
        make_stack(folder, np.random.default_rng(1))
        odd = os.path.join(folder, "day", "lst_day_%s.tif" % DATES[7].isoformat())
        ds = kt.gdal().Open(odd, 1)
        ds.GetRasterBand(1).SetScale(1.0)
        ds = None
        line = self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"], odd)
        self.assertIn("every value lies outside -100..100 deg C", line)

    def test_unknown_unit(self):
        folder = os.path.join(self.tmp, "nounit")
        make_stack(folder, np.random.default_rng(1), unit=None)
        line = self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"], "nounit")
        self.assertIn("--units", line)
        # --units is for every input: a day and a night in two units need their files labelled,
        # which the message had not said (following it left a user refused either way).
        self.assertIn("inputs in two units need their files labelled, gdal_edit.py -units K or -units C", line)

    def test_a_date_without_its_partner_is_left_out_with_a_note(self):
        # A night composite not yet arrived (or left out by a --skip-bad run) had refused the
        # whole run: the day's date is left out instead, as if it had not arrived either.
        folder = os.path.join(self.tmp, "unpaired")
        make_stack(folder, np.random.default_rng(1))
        os.remove(os.path.join(folder, "night", "lst_night_%s.tif" % DATES[5].isoformat()))
        out = os.path.join(self.tmp, "unpaired-out")
        done = kt.run_kalends(["suitability", "--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif",
                               "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("1 date of --day without --night left out: %s" % DATES[5].isoformat(), done.stderr)
        # The same as the day's date removed too.
        os.remove(os.path.join(folder, "day", "lst_day_%s.tif" % DATES[5].isoformat()))
        both = os.path.join(self.tmp, "unpaired-both")
        done = kt.run_kalends(["-q", "suitability", "--day", folder + "/day/*.tif", "--night",
                               folder + "/night/*.tif", "--out", both])
        self.assertEqual(done.returncode, 0, done.stderr)
        names = sorted(os.listdir(both))
        self.assertEqual(sorted(os.listdir(out)), names)
        for name in names:
            if name.endswith(".tif"):
                np.testing.assert_array_equal(kt.gdal().Open(os.path.join(out, name)).ReadAsArray(),
                                              kt.gdal().Open(os.path.join(both, name)).ReadAsArray(), err_msg=name)

    def test_inputs_that_mostly_do_not_pair_are_refused(self):
        # Under half of one input's dates with a partner: a mistake (another calendar), named.
        folder = os.path.join(self.tmp, "mostly-unpaired")
        make_stack(folder, np.random.default_rng(1))
        for d in DATES[10:]:
            os.remove(os.path.join(folder, "night", "lst_night_%s.tif" % d.isoformat()))
        line = self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"], "night")
        self.assertIn("has no layer for %s" % DATES[10].isoformat(), line)
        self.assertIn("10 of their dates pair", line)

    def test_no_georeferencing(self):
        folder = os.path.join(self.tmp, "nocrs")
        make_stack(folder, np.random.default_rng(1), epsg=None)
        line = self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"], "nocrs")
        self.assertIn("latitude", line)

    def run_with_parameters(self, name, text):
        """A refused suitability run of an invented stack with the parameter file `text`; the
        one error line, which must name the file."""
        folder = os.path.join(self.tmp, "params-" + name)
        make_stack(folder, np.random.default_rng(1))
        params = os.path.join(self.tmp, name)
        with open(params, "w") as f:
            f.write(text)
        return self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif",
                             "--parameters", params], params)

    def test_bad_parameter_file(self):
        self.assertIn("biting_rate", self.run_with_parameters("bad.toml", "[r0-2013]\nbiting_rate = [1, 2]\n"))

    def test_an_empty_missing_or_folder_parameter_file_is_refused(self):
        # A folder had read as an empty table and an empty file had been taken: the published
        # values were used, exit 0, without a word. Diurnal reads the same files.
        self.assertIn("holds no parameters", self.run_with_parameters("empty.toml", ""))
        # An empty section, or one of no model, had been taken the same way.
        self.assertIn("holds no parameters", self.run_with_parameters("empty-section.toml", "[r0-2013]\n"))
        self.assertIn("unknown section [no-such-model]", self.run_with_parameters("unknown.toml", "[no-such-model]\n"))
        folder = os.path.join(self.tmp, "params-folder")
        make_stack(folder, np.random.default_rng(1))
        inputs = ["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"]
        self.assertIn("is a folder", self.run_bad(inputs + ["--parameters", folder], folder))
        missing = os.path.join(self.tmp, "nothing.toml")
        self.assertIn("does not exist", self.run_bad(inputs + ["--parameters", missing], missing))
        done = kt.run_kalends(["diurnal"] + inputs + ["--parameters", folder, "--out",
                                                      os.path.join(self.tmp, "diurnal-folder")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("is a folder", done.stderr)

    def test_parameters_that_leave_the_model_at_zero_name_their_file(self):
        # A Briere c of 0 for the biting rate (Mordecai et al. 2013's form) makes R0 = 0 at
        # every temperature: the error had named the model alone, not the file that did it.
        line = self.run_with_parameters("zero-biting.toml", "[r0-2013]\nbiting_rate = [0, 11.7, 42.3]\n")
        self.assertIn("R0 = 0 at every temperature", line)

    def test_parameter_values_out_of_range(self):
        # Diurnal a, b, c outside the ranges --calibrate searches, or window limits out of
        # order, are refused naming the file and the key (not an option that was not given),
        # exit 2, by diurnal and suitability alike, before any output.
        folder = os.path.join(self.tmp, "ranges")
        make_stack(folder, np.random.default_rng(1))
        inputs = ["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"]
        for name, text, key, model in (("a.toml", "[diurnal]\na = -5\n", "diurnal.a", "r0-2013"),
                                       ("b.toml", "[diurnal]\nb = -3\n", "diurnal.b", "r0-2013"),
                                       ("window.toml", "[window]\nlimits = [30, 20]\n", "window.limits",
                                        "window")):
            params = os.path.join(self.tmp, name)
            with open(params, "w") as f:
                f.write(text)
            line = self.run_bad(inputs + ["--model", model, "--parameters", params], params)
            self.assertIn(key, line)
            self.assertNotIn("--window", line)
            if key.startswith("diurnal"):
                out = os.path.join(self.tmp, "diurnal-" + name)
                done = kt.run_kalends(["diurnal"] + inputs + ["--parameters", params, "--out", out])
                self.assertEqual(done.returncode, 2, done.stderr)
                self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
                self.assertIn(params, done.stderr)
                self.assertIn(key, done.stderr)
                self.assertEqual(glob.glob(os.path.join(out, "*.tif")), [])

    def test_options_of_another_model_or_mode_are_refused(self):
        # Each would do nothing: --window and --parasite belong to their own models, and
        # --calibrate fits parameters without writing hourly layers.
        folder = os.path.join(self.tmp, "others")
        make_stack(folder, np.random.default_rng(1))
        inputs = ["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"]
        for extra, option in ((["--window", "10,20"], "--window"),
                              (["--parasite", "vivax"], "--parasite"),
                              (["--model", "window", "--parasite", "vivax"], "--parasite")):
            line = self.run_bad(inputs + extra, option)
            self.assertIn("applies to --model", line)
        done = kt.run_kalends(["diurnal"] + inputs + ["--out", os.path.join(self.tmp, "d"), "--calibrate",
                                                      folder + "/day/*.tif"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--calibrate: fits a, b and c alone", done.stderr)

    def refused_by_both(self, inputs):
        """The one-line refusals of `suitability` and `diurnal` given `inputs` (exit 2, no output)."""
        lines = []
        for command in ("suitability", "diurnal"):
            out = os.path.join(self.tmp, "refused-%d" % len(os.listdir(self.tmp)))
            done = kt.run_kalends([command] + inputs + ["--out", out])
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertEqual(glob.glob(os.path.join(out, "*.tif")), [])
            lines.append(done.stderr.strip())
        return lines

    def test_day_and_night_swapped(self):
        # Given the other way round, every day sample is colder than its night sample: each day
        # would be taken as flat at their mean, a plausible but wrong layer (docs/methods.md).
        folder = os.path.join(self.tmp, "swapped")
        make_stack(folder, np.random.default_rng(1))
        for line in self.refused_by_both(["--day", folder + "/night/*.tif", "--night", folder + "/day/*.tif"]):
            self.assertIn("--day %s/night/*.tif, --night %s/day/*.tif" % (folder, folder), line)
            self.assertIn("the day sample is not warmer than the night sample on 100 % of pixel-days", line)
            self.assertIn("are --day and --night swapped?", line)

    def test_day_colder_than_night_on_a_few_pixel_days_is_counted(self):
        folder = os.path.join(self.tmp, "few")
        make_stack(folder, np.random.default_rng(1))
        # Two dates' night samples raised above their day samples: 2 x 63 pixel-days, less
        # the cloud gaps of either sample.
        expected = 0
        for d in DATES[:2]:
            day = read_celsius(os.path.join(folder, "day", "lst_day_%s.tif" % d.isoformat())) + 273.15
            night = os.path.join(folder, "night", "lst_night_%s.tif" % d.isoformat())
            old = read_celsius(night) + 273.15
            write_lst(night, np.where(np.isfinite(old), day + 1, np.nan))
            expected += int(np.sum(np.isfinite(old) & np.isfinite(day)))
        done = kt.run_kalends(["suitability", "--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif",
                               "--out", os.path.join(self.tmp, "few-out")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("%d pixel-day(s) with the day sample not warmer than the night sample were taken as flat "
                      "at their mean" % expected, done.stderr)

    def test_one_stack_without_its_scale_factor(self):
        # The night stack alone lost its scale (raw kelvin x 50 read as kelvin): half of all
        # values are implausible, which a test over both stacks together let through, and the
        # layers came out empty with exit 0.
        folder = os.path.join(self.tmp, "halfscale")
        make_stack(folder, np.random.default_rng(1))
        for path in glob.glob(os.path.join(folder, "night", "*.tif")):
            ds = kt.gdal().Open(path, 1)
            ds.GetRasterBand(1).SetScale(1.0)
            ds = None
        for line in self.refused_by_both(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"]):
            self.assertIn("--night %s/night/*.tif" % folder, line)
            self.assertNotIn("--day", line)
            self.assertIn("scale factor", line)

    def test_the_other_input_on_another_grid_is_named(self):
        # The night stack is consistent in itself; it is the day stack whose grid it misses.
        folder = os.path.join(self.tmp, "shifted")
        make_stack(folder, np.random.default_rng(1))
        for path in glob.glob(os.path.join(folder, "night", "*.tif")):
            ds = kt.gdal().Open(path, 1)
            ds.SetGeoTransform((GT[0] + 1000,) + GT[1:])
            ds = None
        line = self.run_bad(["--day", folder + "/day/*.tif", "--night", folder + "/night/*.tif"],
                            "--night %s/night/*.tif" % folder)
        self.assertIn("differs from that of --day %s/day/*.tif" % folder, line)


class MonthlySummariesAndReruns(kt.TempDirTestCase):
    """Monthly mean temperatures as given (--temperature), three invented years."""

    def write_months(self, folder, years, celsius):
        os.makedirs(folder, exist_ok=True)
        for year in years:
            for month in range(1, 13):
                path = os.path.join(folder, "tas_%d-%02d-01.tif" % (year, month))
                kt.write_raster(path, np.full((3, 4), celsius, np.float32), geotransform=(30, 0.1, 0, 0, 0, -0.1),
                                epsg=4326)
                ds = kt.gdal().Open(path, 1)
                ds.GetRasterBand(1).SetUnitType("C")
                ds = None

    def test_summaries_count_the_values_as_written(self):
        # At 16.1 C the degree-day model's falciparum value is about 1e-51 (111 degree-days
        # above 16 C take 1110 days, survival 0.9 per day; Detinova 1962 and Martens, from
        # memory): below float32's range, written as 0. The year summary had counted 12
        # suitable months where the layer shows none; the synoptic summary, 0.
        folder = os.path.join(self.tmp, "cool")
        self.write_months(folder, [2031], 16.1)
        out = os.path.join(self.tmp, "cool-out")
        done = kt.run_kalends(["suitability", "--temperature", folder + "/*.tif", "--model", "degree-day",
                               "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        year, _ = read_bands(os.path.join(out, "degree-day-falciparum_year_2031.tif"))
        self.assertTrue(np.all(year == 0))
        for layer in ("summary_2031", "summary_synoptic"):
            bands, _ = read_bands(os.path.join(out, "degree-day-falciparum_%s.tif" % layer))
            self.assertTrue(np.all(bands[0] == 0), layer)   # suitable months
            self.assertTrue(np.all(bands[1] == 0), layer)   # longest run
            # The counts are months; the report's legend had said "(no unit)".
            ds = kt.gdal().Open(os.path.join(out, "degree-day-falciparum_%s.tif" % layer))
            self.assertEqual([ds.GetRasterBand(b).GetUnitType() for b in (1, 2, 3)], ["months", "months", ""], layer)

    def test_extracting_suitability_shows_the_caution(self):
        # A survey table is where a suitability value is most easily read as a risk.
        folder = os.path.join(self.tmp, "extract")
        self.write_months(folder, [2031], 24.0)
        out = os.path.join(self.tmp, "extract-out")
        self.assertEqual(kt.run_kalends(["-q", "suitability", "--temperature", folder + "/*.tif", "--out", out]).returncode, 0)
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\nA,30.15,-0.15,2031-06-15\n")
        done = kt.run_kalends(["-q", "extract", out, "--points", points, "--out", os.path.join(self.tmp, "t.csv")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(done.stderr.count("not malaria risk"), 1, done.stderr)
        # Saved again by another tool without KALENDS_CAUTION (its model still named): the
        # caution stays, in extract and on the report's maps.
        g = kt.gdal()
        for path in glob.glob(os.path.join(out, "**", "*.tif"), recursive=True):
            ds = g.Open(path, g.GA_Update)
            if ds.GetMetadataItem("KALENDS_MODEL"):
                ds.SetMetadataItem("KALENDS_CAUTION", None)
            ds = None
        done = kt.run_kalends(["-q", "extract", out, "--points", points, "--out", os.path.join(self.tmp, "t.csv")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(done.stderr.count("not malaria risk"), 1, done.stderr)
        page = os.path.join(self.tmp, "stripped.html")
        done = kt.run_kalends(["-q", "report", out, "--html", page])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page) as f:
            self.assertIn('<p class="caution">Caution: temperature suitability', f.read())

    def test_a_narrower_span_of_years_removes_the_others(self):
        folder = os.path.join(self.tmp, "warm")
        self.write_months(folder, [2031, 2032, 2033], 24.0)
        out = os.path.join(self.tmp, "warm-out")
        args = ["suitability", "--temperature", folder + "/*.tif", "--out", out]
        self.assertEqual(kt.run_kalends(args).returncode, 0)
        # A file of the user's with a name like the layers' (no KALENDS_MODEL) is not touched.
        own = os.path.join(out, "r0-2013_year_2030.tif")
        kt.write_raster(own, np.zeros((3, 4), np.float32))
        done = kt.run_kalends(args + ["--years", "2032-2033"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("removed the layers of 2031 from an earlier run: outside this run's years", done.stderr)
        names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(out, "*.tif")))
        self.assertEqual(names, ["r0-2013_summary_2032.tif", "r0-2013_summary_2033.tif",
                                 "r0-2013_summary_synoptic.tif", "r0-2013_synoptic.tif", "r0-2013_year_2030.tif",
                                 "r0-2013_year_2032.tif", "r0-2013_year_2033.tif"])


if __name__ == "__main__":
    unittest.main()
