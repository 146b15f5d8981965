#!/usr/bin/python3
"""`kalends suitability` on real monthly mean air temperature: the gridded observations of
Maurer et al. (2002), J. Climate 15:3237, 1999, 81 x 33 cells (../shared/data/monthly-temperature).
Time values fall on the last day of each month (--date-marks end).

Monthly means are used as given (--temperature: no diurnal cycle). The relative suitability
of every month and the number of suitable months per cell must equal an independent numpy
computation from the published trait table (tests/pylib/thermal_numpy.py; Mordecai et al.
2013 for r0-2013, Detinova 1962 / Martens 1997 for degree-day, Bayoh & Lindsay 2003 for window).
"""
import datetime
import glob
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402
import thermal_numpy as tn  # noqa: E402


def read_bands(path):
    ds = kt.gdal().Open(path)
    out = ds.ReadAsArray().astype(np.float64), [ds.GetRasterBand(b + 1).GetDescription() for b in range(ds.RasterCount)]
    ds = None
    return out


def longest_run(suitable, cyclic):
    series = np.concatenate([suitable, suitable], axis=0) if cyclic else suitable
    best = np.zeros(suitable.shape[1:])
    run = np.zeros(suitable.shape[1:])
    for s in series:
        run = np.where(s, run + 1, 0)
        best = np.maximum(best, run)
    return np.minimum(best, suitable.shape[0])


class SuitabilityMonthlyNetcdf(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        path = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        cls.input = 'NETCDF:"%s":tas' % path
        ds = kt.gdal().Open(cls.input)
        tas = ds.ReadAsArray().astype(np.float64)
        nodata = ds.GetRasterBand(1).GetNoDataValue()
        ds = None
        cls.tas = np.where(tas == np.float32(nodata), np.nan, tas)
        cls.land = np.all(np.isfinite(cls.tas), axis=0)
        assert cls.land.sum() > 1000

    def run_model(self, name, *extra):
        out = os.path.join(self.tmp, name)
        done = kt.run_kalends(["suitability", "--temperature", self.input, "--date-marks", "end", "--out", out]
                              + list(extra))
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("not malaria risk", done.stderr)  # the caution line
        return out, done

    def check(self, out, prefix, expected, threshold):
        year, names = read_bands(os.path.join(out, prefix + "_year_1999.tif"))
        self.assertEqual(names, ["month %02d" % m for m in range(1, 13)])
        land = self.land
        self.assertLess(np.max(np.abs(year[:, land] - expected[:, land])), 1e-6)
        self.assertTrue(np.all(np.isnan(year[:, ~land])))
        summary, names = read_bands(os.path.join(out, prefix + "_summary_1999.tif"))
        self.assertEqual(names, ["suitable_months", "longest_suitable_run", "mean_suitability"])
        suitable = expected > threshold
        np.testing.assert_array_equal(summary[0][land], suitable.sum(axis=0)[land])
        np.testing.assert_array_equal(summary[1][land], longest_run(suitable, False)[land])
        np.testing.assert_allclose(summary[2][land], expected.mean(axis=0)[land], atol=1e-6)
        synoptic, _ = read_bands(os.path.join(out, prefix + "_summary_synoptic.tif"))
        np.testing.assert_array_equal(synoptic[1][land], longest_run(suitable, True)[land])
        return summary[0][land]

    def test_r0_2013_suitable_months(self):
        out, _ = self.run_model("r0")
        expected = tn.relative("r0-2013", self.tas.ravel()).reshape(self.tas.shape)
        months = self.check(out, "r0-2013", expected, 0.0)
        print("\nMaurer 1999, r0-2013: suitable months per cell %d..%d, mean %.2f"
              % (months.min(), months.max(), months.mean()), file=sys.stderr)
        self.assertGreater(months.max(), months.min())  # the data spans more than one answer

    def test_a_fill_summary_of_a_netcdf_input_is_shown_whole(self):
        # The fill statistics had been read with a regular expression: the input
        # 'NETCDF:"...":tas' was shown as 'NETCDF:\' (cut at the escaped quote), and the reasons
        # of series_not_fitted were left out. Checked against Python's json module.
        import html as html_module
        import json
        out = os.path.join(self.tmp, "fill-netcdf")
        done = kt.run_kalends(["-q", "fill", self.input, "--out", os.path.join(out, "fill"), "--method", "harmonic",
                               "--harmonics", "6"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "fill", "fill-summary.json")) as f:
            summary = json.load(f)
        self.assertTrue(summary["series_not_fitted"], "the test needs pixels not fitted")
        page_path = os.path.join(self.tmp, "fill-netcdf.html")
        done = kt.run_kalends(["report", out, "--html", page_path])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page_path) as f:
            page = f.read()
        stats = page.split('id="fill-statistics"')[1].split("</section>")[0]
        self.assertIn("<td>input</td><td>%s</td>" % html_module.escape(summary["input"]), stats)
        # A summary no JSON reader takes (an older version wrote a Latin-1 file name's byte raw)
        # is named on the page, which is still made.
        with open(os.path.join(out, "fill", "fill-summary.json"), "wb") as f:
            f.write(b'{"input": "lat\xe9in/*.tif", "pixel_dates": 5}')
        done = kt.run_kalends(["report", out, "--html", page_path + ".2.html"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page_path + ".2.html") as f:
            self.assertIn("Not a readable fill summary (", f.read())
        # A series within one year: its axis names the months (it had shown no date at all).
        series = page.split('id="time-series"')[1]
        self.assertIn(">Feb 1999</text>", series)   # the first month start after 31 January
        self.assertIn(">Jul</text>", series)
        for reason, pixels in summary["series_not_fitted"].items():
            self.assertIn("<td>series_not_fitted: %s</td><td>%d</td>" % (html_module.escape(reason), pixels),
                          stats)

    def test_the_suitable_months_are_mapped_and_named_for_extract(self):
        # The report had drawn the monthly layers and left out the synoptic suitable months, the
        # usual risk-map covariate; extract had listed layers without saying --descriptors.
        out, _ = self.run_model("r0-report")
        html = os.path.join(self.tmp, "r0-report.html")
        done = kt.run_kalends(["report", out, "--html", html])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(html) as f:
            page = f.read()
        for band in ("suitable_months", "longest_suitable_run", "mean_suitability"):
            self.assertIn("<b>r0-2013_summary_synoptic.%s</b>" % band, page)
        self.assertNotIn("r0-2013_summary_1999", page)   # the years' own: extract --descriptors
        # Each suitability map says its model and what counts as suitable (it had said neither).
        self.assertIn("a period counts as suitable where its index is above 0.", page)
        self.assertIn("Model: ", page)
        # How current the page is: the newest file shown, to the minute (a page left from an
        # earlier night, its report step waiting on a failed step, had not shown its age).
        newest = max(os.stat(p).st_mtime for p in glob.glob(os.path.join(out, "*.tif")))
        stamp = datetime.datetime.fromtimestamp(int(newest), datetime.timezone.utc).strftime("%Y-%m-%d %H:%M")
        self.assertIn("Outputs as of %s UTC (the newest file shown)." % stamp, page)
        points = os.path.join(self.tmp, "one-point.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\np1,-80,35,1999-06-15\n")
        done = kt.run_kalends(["extract", out, "--points", points, "--layers", "r0-2013_summary*", "--out",
                               os.path.join(self.tmp, "summary.csv")])
        self.assertEqual(done.returncode, 2)
        self.assertIn("give --descriptors", done.stderr)
        done = kt.run_kalends(["-q", "extract", out, "--points", points, "--layers", "r0-2013_summary*",
                               "--descriptors", "--out", os.path.join(self.tmp, "summary.csv")])
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_degree_day_vivax_threshold(self):
        out, _ = self.run_model("dd", "--model", "degree-day", "--parasite", "vivax", "--threshold", "0.5")
        expected = tn.relative("degree-day", self.tas.ravel(), "vivax").reshape(self.tas.shape)
        self.check(out, "degree-day-vivax", expected, 0.5)
        # The table entries used (docs/outputs.md): not falciparum's, and no diurnal cycle for
        # temperatures as given (both had been listed).
        used = kt.gdal().Open(os.path.join(out, "degree-day-vivax_synoptic.tif")).GetMetadataItem("KALENDS_PARAMETERS")
        self.assertIn("degree-day.vivax=105,14.5", used)
        self.assertIn("degree-day.lifespan=", used)
        self.assertNotIn("degree-day.falciparum", used)
        self.assertNotIn("diurnal.", used)

    def test_window(self):
        out, done = self.run_model("window", "--model", "window", "--window", "20,30")
        expected = tn.relative("window", self.tas.ravel(), window=(20.0, 30.0)).reshape(self.tas.shape)
        self.check(out, "window", expected, 0.0)
        # Monthly means given as they are: no hours are made from them, and the model says so
        # (it had said "share of hours between 20 and 30 C").
        self.assertIn("share of the values given between 20 and 30 °C", done.stdout)
        ds = kt.gdal().Open(os.path.join(out, "window_year_1999.tif"))
        self.assertIn("share of the values given", ds.GetMetadataItem("KALENDS_MODEL"))
        ds = None

    def test_a_pattern_over_files_of_several_dates(self):
        # Daily or monthly data often comes as one file per year or season, each band dated by
        # the CF time axis. The Maurer year cut into two files of six months (GDAL's
        # multidimensional translate) reads as the whole file does.
        halves = os.path.join(self.tmp, "halves")
        os.makedirs(halves)
        g = kt.gdal()
        path = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        for name, first, last in (("tas_h1.nc", 17927, 18077), ("tas_h2.nc", 18108, 18261)):
            g.MultiDimTranslate(os.path.join(halves, name), path, format="netCDF", arraySpecs=["tas"],
                                subsetSpecs=["time(%d,%d)" % (first, last)])
        whole, _ = self.run_model("whole", "--model", "window", "--window", "20,30", "--name", "tas")
        parts = os.path.join(self.tmp, "parts")
        done = kt.run_kalends(["suitability", "--temperature", os.path.join(halves, "*.nc"), "--date-marks", "end",
                               "--model", "window", "--window", "20,30", "--name", "tas", "--out", parts])
        self.assertEqual(done.returncode, 0, done.stderr)
        for name in ("tas_year_1999.tif", "tas_summary_1999.tif", "tas_synoptic.tif"):
            a, _ = read_bands(os.path.join(parts, name))
            b, _ = read_bands(os.path.join(whole, name))
            np.testing.assert_array_equal(a, b, err_msg=name)
        done = kt.run_kalends(["inspect", os.path.join(halves, "*.nc"), "--quick"])
        self.assertIn("12 dates of 'tas_h'", done.stdout)  # the file names without their number
        self.assertIn("from band metadata", done.stdout)

    def test_years_outside_or_reversed(self):
        # --years selects the years written; a range given backwards or with trailing text is
        # refused the way `kalends seasons` refuses it, before anything is written.
        out, _ = self.run_model("years", "--model", "window", "--window", "20,30", "--years", "1999")
        self.assertTrue(os.path.exists(os.path.join(out, "window_year_1999.tif")))
        for years in ("1999-1998", "1999x"):
            out = os.path.join(self.tmp, "years-" + years)
            done = kt.run_kalends(["suitability", "--temperature", self.input, "--date-marks", "end",
                                   "--model", "window", "--window", "20,30", "--years", years, "--out", out])
            self.assertEqual(done.returncode, 2, years)
            self.assertIn("--years '%s': expected YYYY or YYYY-YYYY" % years, done.stderr)
            self.assertFalse(os.path.exists(out))
        # A window limit that is not a number (NaN once meant "the table's", silently).
        done = kt.run_kalends(["suitability", "--temperature", self.input, "--date-marks", "end", "--model",
                               "window", "--window", "nan,30", "--out", os.path.join(self.tmp, "nan")])
        self.assertEqual(done.returncode, 2)
        self.assertIn("--window: expected two temperatures", done.stderr)

    def test_longitude_latitude_axes_place_the_diurnal_cycle(self):
        # The file names no grid mapping, so GDAL gives it no CRS, but CF declares its axes
        # longitude and latitude (CF Conventions 4.1, 4.2, 5.6): the diurnal cycle can find each
        # cell's latitude. Monthly means given as both minimum and maximum make a flat day, so
        # the result must equal the run that takes them as given.
        out = os.path.join(self.tmp, "extremes")
        done = kt.run_kalends(["suitability", "--tmin", self.input, "--tmax", self.input,
                               "--date-marks", "end", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        expected = tn.relative("r0-2013", self.tas.ravel()).reshape(self.tas.shape)
        self.check(out, "r0-2013", expected, 0.0)
        ds = kt.gdal().Open(os.path.join(out, "r0-2013_year_1999.tif"))
        from osgeo import osr
        srs = osr.SpatialReference(wkt=ds.GetProjectionRef())
        ds = None
        self.assertEqual(srs.GetAuthorityCode(None), "4326")


if __name__ == "__main__":
    unittest.main()
