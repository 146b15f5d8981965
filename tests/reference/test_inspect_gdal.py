#!/usr/bin/python3
"""kalends inspect: how a stack is read, checked with Python GDAL and numpy.

Data (../shared/data, see its README):
  alaska-ndvi/masked50: MODIS NDVI 16-day composites (Didan 2015, MOD13A1 V006), NaN = missing,
    dates in the file names (ndvi_YYYY-MM-DD.tif).
  monthly-temperature/bcsd_obs_1999.nc: Maurer et al. (2002), J. Climate 15:3237; CF time axis
    "days since 1950-01-01", _FillValue 1e20 over the sea, longitude/latitude axes.
A synthetic stack with a QA stack (tools/synth_stack.py; invented data, for the mechanics of
the QA count only).

Expected values are computed here: dates from the names with a regular expression or from the
CF time values (CF Conventions 4.4: origin + value x unit), observed cells with numpy on
what GDAL reads, the QA rule "bits0-1 in 0,1" as (qa & 3) <= 1.
"""
import datetime
import glob
import json
import os
import re
import shutil
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "tools"))
import kalends_testlib as kt  # noqa: E402
import synth_stack  # noqa: E402


def inspect(*args):
    done = kt.run_kalends(["inspect"] + list(args) + ["--json"])
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


class InspectRealData(kt.TempDirTestCase):
    def test_alaska_dates_from_names_and_observed_cells(self):
        folder = kt.shared_path("alaska-ndvi", "masked50")
        report = inspect(os.path.join(folder, "*.tif"))
        files = sorted(glob.glob(os.path.join(folder, "*.tif")))
        names = [re.search(r"(\d{4}-\d{2}-\d{2})", os.path.basename(f)).group(1) for f in files]
        self.assertEqual([d["date"][:10] for d in report["dates"]], names)
        self.assertTrue(all(d["from"] == "file name" for d in report["dates"]))
        self.assertIsNone(report["crs"])
        self.assertIsNone(report["geotransform"])
        g = kt.gdal()
        ever = np.zeros((100, 100), dtype=bool)
        for f, d in zip(files, report["dates"]):
            values = g.Open(f).ReadAsArray()
            finite = np.isfinite(values)
            ever |= finite
            self.assertEqual(d["observed"], int(finite.sum()), f)
            self.assertEqual(d["nodata"], "NaN")
            self.assertAlmostEqual(d["mean"], float(values[finite].astype(np.float64).mean()), places=6)
            self.assertAlmostEqual(d["min"], float(values[finite].min()), places=7)
        self.assertEqual(report["pixels_never_observed"], int((~ever).sum()))
        # 16-day composites: the median spacing.
        days = [datetime.date.fromisoformat(n) for n in names]
        self.assertEqual(report["time_grid"]["step_days"], float(np.median(np.diff([d.toordinal() for d in days]))))
        self.assertEqual(report["time_grid"]["slots_with_data"], len(files))

    def test_a_share_short_of_all_is_not_shown_as_100_percent(self):
        # alaska-ndvi/observed: its best-observed date has 9995 of 10000 pixels (numpy). The
        # summary had rounded that to "100.0 %", which reads as every pixel.
        folder = kt.shared_path("alaska-ndvi", "observed")
        g = kt.gdal()
        best = max(int(np.isfinite(g.Open(f).ReadAsArray()).sum()) for f in glob.glob(os.path.join(folder, "*.tif")))
        self.assertLess(best, 10000)
        done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif")])
        self.assertEqual(done.returncode, 0, done.stderr)
        line = [l for l in done.stdout.splitlines() if "most" in l][0]
        self.assertRegex(line, r"most > 99\.9 % on")

    def test_netcdf_time_axis_crs_and_fill_value(self):
        path = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        source = 'NETCDF:"%s":tas' % path
        report = inspect(source)
        g = kt.gdal()
        ds = g.Open(source)
        md = ds.GetMetadata()
        origin = datetime.date(1950, 1, 1)
        expected = [(origin + datetime.timedelta(days=int(v))).isoformat()
                    for v in md["NETCDF_DIM_time_VALUES"].strip("{}").split(",")]
        self.assertEqual([d["date"][:10] for d in report["dates"]], expected)
        self.assertTrue(all(d["from"] == "band metadata" for d in report["dates"]))
        self.assertIn("EPSG:4326", report["crs"])  # CF longitude/latitude axes, no grid mapping
        tas = ds.ReadAsArray()
        for k, d in enumerate(report["dates"]):
            self.assertEqual(d["observed"], int((tas[k] < 1e19).sum()))
            self.assertEqual(d["band"], k + 1)
        ds = None
        # Month-end stamps: the text report says they are read as month ends, and how not to.
        done = kt.run_kalends(["inspect", source])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("read each as the end of the month it closes", done.stdout)
        self.assertIn("--date-marks start", done.stdout)
        # The range of the observed physical values, where a forgotten scale factor would show.
        land = tas[tas < 1e19].astype(np.float64)
        self.assertIn("range     %.4g .. %.4g," % (land.min(), land.max()), done.stdout)

    def test_one_band_of_a_multi_band_raster(self):
        # --band picks one band of a multi-band raster, dated by its own metadata or by --date
        # (docs/inputs.md); before version 0.3.10 a single file ignored both and read every band.
        g = kt.gdal()
        path = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        source = 'NETCDF:"%s":tas' % path
        ds = g.Open(source)
        may = ds.GetRasterBand(5).ReadAsArray()
        md = ds.GetMetadata()
        ds = None
        report = inspect(source, "--band", "5")
        self.assertEqual(len(report["dates"]), 1)
        day = int(md["NETCDF_DIM_time_VALUES"].strip("{}").split(",")[4])
        self.assertEqual(report["dates"][0]["date"][:10],
                         (datetime.date(1950, 1, 1) + datetime.timedelta(days=day)).isoformat())
        self.assertEqual(report["dates"][0]["observed"], int((may < 1e19).sum()))
        # Landsat 7 bands (no dates): band 3 (red) as one date.
        landsat = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        report = inspect(landsat, "--band", "3", "--date", "2000-07-01")
        self.assertEqual([d["date"][:10] for d in report["dates"]], ["2000-07-01"])
        self.assertEqual(report["dates"][0]["band"], 3)
        ds = g.Open(landsat)
        red = ds.GetRasterBand(3).ReadAsArray().astype(np.float64)
        ds = None
        self.assertAlmostEqual(report["dates"][0]["mean"], float(red.mean()), places=3)
        done = kt.run_kalends(["inspect", source, "--band", "13"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("has no band 13 (it has 12)", done.stderr)
        # --date on the NetCDF, whose 12 bands carry their dates, would have read band 1 alone
        # under that date and dropped the other eleven without a word.
        done = kt.run_kalends(["inspect", source, "--date", "1999-05-01"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("its 12 bands carry their own dates; --date would read band 1 alone", done.stderr)
        # --date on a pattern of dated names (the Alaska NDVI): each name's date had won, and
        # the --date was ignored without a word.
        alaska = os.path.join(kt.shared_path("alaska-ndvi", "masked20"), "*.tif")
        done = kt.run_kalends(["inspect", alaska, "--quick", "--date", "2001-01-01"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("--date 2001-01-01:", done.stderr)
        self.assertIn("carries its own date", done.stderr)

    def test_an_impossible_date_in_band_metadata_is_named(self):
        # Scenes dated by a DATE item (no date in their names), one of them 30 February: the
        # error had said "no date ... nor in its bands' metadata", as if the item were absent.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "dated-by-metadata")
        os.makedirs(folder)
        for name, date in (("a", "2021-01-01"), ("b", "2021-02-30")):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "scene_%s.tif" % name), 4, 4, 1, g.GDT_Float32)
            ds.SetGeoTransform((0, 1, 0, 0, 0, -1))
            ds.GetRasterBand(1).WriteArray(np.ones((4, 4), np.float32))
            ds.GetRasterBand(1).SetMetadataItem("DATE", date)
            ds = None
        done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif"), "--quick"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("scene_b.tif", done.stderr)
        self.assertIn("DATE '2021-02-30' is not a date", done.stderr)

    def test_dates_that_disagree_are_noted(self):
        # A band's description and its DATE item a day apart, and a file whose name says one day
        # and whose band description another (invented files): one source wins by the documented
        # order (docs/inputs.md) and a note names the first disagreement; there had been none.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "disagree")
        os.makedirs(folder)
        multi = os.path.join(folder, "scenes.tif")
        ds = g.GetDriverByName("GTiff").Create(multi, 4, 4, 3, g.GDT_Float32)
        ds.SetGeoTransform((0, 1, 0, 0, 0, -1))
        for b in range(3):
            band = ds.GetRasterBand(b + 1)
            band.WriteArray(np.ones((4, 4), np.float32))
            band.SetDescription(("2021-01-01", "2021-01-17", "2021-02-02")[b])
            band.SetMetadataItem("DATE", ("2021-01-02", "2021-01-18", "2021-02-03")[b])
        ds = None
        done = kt.run_kalends(["inspect", multi, "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("2021-01-01 .. 2021-02-02", done.stdout)
        self.assertIn("dates disagree in 3 bands (first: %s band 1: its band description says 2021-01-01, "
                      "its DATE item 2021-01-02)" % multi, done.stdout)
        named = os.path.join(folder, "named")
        os.makedirs(named)
        for day, described in (("2021-01-01", "2021-01-01"), ("2021-01-17", "2021-01-19")):
            kt.write_raster(os.path.join(named, "ndvi_%s.tif" % day), np.ones((4, 4), np.float32),
                            geotransform=(0, 1, 0, 0, 0, -1), description=described)
        done = kt.run_kalends(["inspect", os.path.join(named, "*.tif"), "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("2021-01-01 .. 2021-01-17", done.stdout)
        self.assertIn("dates disagree in 1 band (first: %s band 1: its name says 2021-01-17, its band "
                      "description 2021-01-19)" % os.path.join(named, "ndvi_2021-01-17.tif"), done.stdout)
        # Agreeing sources: no note.
        done = kt.run_kalends(["inspect", os.path.join(named, "ndvi_2021-01-01.tif"), "--quick"])
        self.assertNotIn("dates disagree", done.stdout + done.stderr)

    def test_a_composite_missing_from_a_long_8_day_record_keeps_its_grid(self):
        # An invented ten-year 8-day record (tools/synth_stack.py) without one composite of
        # 2015: the record had gone onto a 5-day grid (every year's values moved; a --reach job
        # redid every year). The dates are placed by their intervals instead.
        stack = os.path.join(self.tmp, "ten-years")
        kt.make_synthetic_stack(stack, 4, 4, "--start-year", "2010", "--step", "8", years=10)
        os.remove(os.path.join(stack, "ndvi_2015-05-09.tif"))
        done = kt.run_kalends(["inspect", os.path.join(stack, "ndvi_*.tif"), "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("time grid step 8 days (the median spacing; dates placed by their intervals", done.stdout)
        self.assertIn("460 slots, 459 with a date", done.stdout)

    def test_brackets_in_a_folder_name(self):
        # A folder named "survey[2021]": glob reads the brackets as a set of one character, so the
        # pattern matches nothing; the error says how to write them (glob(7)).
        folder = os.path.join(self.tmp, "survey[2021]")
        os.makedirs(folder)
        for path in sorted(glob.glob(os.path.join(kt.shared_path("alaska-ndvi", "masked20"), "*.tif")))[:3]:
            shutil.copy(path, folder)
        done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif"), "--quick"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("written as [[] and []]", done.stderr)
        escaped = os.path.join(self.tmp, "survey[[]2021[]]", "*.tif")
        done = kt.run_kalends(["inspect", escaped, "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("3 dates", done.stdout)

    def test_quick_reads_no_value(self):
        report = inspect(os.path.join(kt.shared_path("alaska-ndvi", "masked20"), "*.tif"), "--quick")
        self.assertFalse(report["values_read"])
        self.assertIsNone(report["pixels_never_observed"])
        self.assertTrue(all(d["observed"] is None for d in report["dates"]))
        self.assertEqual(len(report["dates"]), 48)


class InspectQa(kt.TempDirTestCase):
    def test_qa_rejections_equal_numpy(self):
        ndvi, qa = os.path.join(self.tmp, "ndvi"), os.path.join(self.tmp, "qa")
        synth_stack.make_stack(ndvi, width=64, height=48, years=1, qa_dir=qa)
        report = inspect(os.path.join(ndvi, "ndvi_*.tif"), "--qa", os.path.join(qa, "qa_*.tif"),
                         "--keep", "bits0-1 in 0,1")
        g = kt.gdal()
        values = sorted(glob.glob(os.path.join(ndvi, "ndvi_*.tif")))
        masks = sorted(glob.glob(os.path.join(qa, "qa_*.tif")))
        self.assertEqual(len(report["dates"]), len(values))
        rejected_total = 0
        for v, q, d in zip(values, masks, report["dates"]):
            ds = g.Open(v)
            band = ds.GetRasterBand(1)
            raw = band.ReadAsArray()
            has_value = raw != band.GetNoDataValue()
            kept = (g.Open(q).ReadAsArray().astype(np.int64) & 3) <= 1
            self.assertEqual(d["rejected_by_qa"], int((has_value & ~kept).sum()), v)
            self.assertEqual(d["observed"], int((has_value & kept).sum()), v)
            self.assertAlmostEqual(d["scale"], band.GetScale())
            rejected_total += d["rejected_by_qa"]
        self.assertGreater(rejected_total, 0)

    def test_signed_qa_is_read_as_its_bits(self):
        # QA stored as int16 (as a QA band beside int16 values must be): bit 15 set is a
        # negative number, which had been clamped to 0 and so passed every rule. Expected with
        # numpy on the stored bits (view as uint16). Invented values: mechanics only.
        values, masks = os.path.join(self.tmp, "signed", "v"), os.path.join(self.tmp, "signed", "q")
        os.makedirs(values)
        os.makedirs(masks)
        qa = np.array([[-32768, -32766, -1, 0, 1, 2]], np.int16)   # 0x8000 0x8002 0xFFFF 0 1 2
        for day in ("2031-01-01", "2031-01-17", "2031-02-02"):
            kt.write_raster(os.path.join(values, "v_%s.tif" % day), np.full((1, 6), 5000, np.int16),
                            geotransform=(0, 1, 0, 0, 0, -1))
            kt.write_raster(os.path.join(masks, "q_%s.tif" % day), qa, geotransform=(0, 1, 0, 0, 0, -1))
        bits = qa.view(np.uint16).astype(np.int64)
        for rule, kept in (("bit 15 == 0", (bits >> 15) & 1 == 0), ("bits0-1 in 0,1", bits & 3 <= 1),
                           ("bit 15 == 0 and bits0-1 in 0,1", ((bits >> 15) & 1 == 0) & (bits & 3 <= 1))):
            report = inspect(os.path.join(values, "*.tif"), "--qa", os.path.join(masks, "*.tif"), "--keep", rule)
            for d in report["dates"]:
                self.assertEqual(d["observed"], int(kept.sum()), rule)
                self.assertEqual(d["rejected_by_qa"], int((~kept).sum()), rule)
        # A bit beyond the 16-bit values is a slip, refused before anything is read.
        done = kt.run_kalends(["inspect", os.path.join(values, "*.tif"), "--qa", os.path.join(masks, "*.tif"),
                               "--keep", "bit 16 == 0"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("reads bit 16, beyond the 16-bit QA values", done.stderr)
        # A float QA layer holding a fraction (resampled by averaging) has no bits to test.
        kt.write_raster(os.path.join(masks, "q_2031-01-17.tif"), np.array([[0, 1.5, 2, 0, 1, 2]], np.float32),
                        geotransform=(0, 1, 0, 0, 0, -1))
        for command in ("inspect", "fill"):
            args = [command, os.path.join(values, "*.tif"), "--qa", os.path.join(masks, "*.tif"), "--keep",
                    "bits0-1 in 0,1"] + (["--out", os.path.join(self.tmp, "signed", "out")] if command == "fill" else [])
            done = kt.run_kalends(args)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn("q_2031-01-17.tif: QA value 1.5 is not a whole number", done.stderr)

    def test_a_stated_scaling_gdal_leaves_unapplied_is_named(self):
        # Files whose metadata states scale_factor/add_offset that GDAL does not turn into a band
        # scale (HDF-EOS grids; here GeoTIFF metadata items, invented values): the report names
        # them, unless --scale is given. The Maurer NetCDF (CF, applied by GDAL) states none.
        folder = os.path.join(self.tmp, "stated")
        os.makedirs(folder)
        g = kt.gdal()
        for date in ("2020-01-01", "2020-01-17"):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "ndvi_%s.tif" % date), 8, 6, 1, g.GDT_Int16)
            band = ds.GetRasterBand(1)
            band.WriteArray(np.full((6, 8), 5000, np.int16))
            band.SetMetadataItem("scale_factor", "10000")
            band.SetMetadataItem("add_offset", "0")
            ds = None
        pattern = os.path.join(folder, "*.tif")
        self.assertEqual(inspect(pattern, "--quick")["unapplied_scaling"], "scale_factor=10000, add_offset=0")
        self.assertIsNone(inspect(pattern, "--quick", "--scale", "0.0001")["unapplied_scaling"])
        text = kt.run_kalends(["inspect", pattern, "--quick"]).stdout
        self.assertIn("the file states scale_factor=10000, add_offset=0, which GDAL leaves unapplied", text)
        # kalends fill fills the values as stored and says so on standard error.
        for extra, noted in (([], True), (["--scale", "0.0001"], False)):
            done = kt.run_kalends(["-q", "fill", pattern, "--out", os.path.join(self.tmp, "filled-%s" % noted)] + extra)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertEqual("states scale_factor=10000, add_offset=0, which GDAL leaves unapplied" in done.stderr,
                             noted, done.stderr)
        maurer = 'NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        self.assertIsNone(inspect(maurer, "--quick")["unapplied_scaling"])
        # GDAL's HDF5 driver names the attributes after their variable (ndvi_scale_factor).
        h5 = os.path.join(self.tmp, "stated-h5")
        os.makedirs(h5)
        for date in ("20200101", "20200117"):
            ds = g.GetDriverByName("netCDF").CreateMultiDimensional(os.path.join(h5, "veg_%s.h5" % date), [],
                                                                    ["FORMAT=NC4"])
            root = ds.GetRootGroup()
            dims = [root.CreateDimension(n, None, None, 4) for n in ("y", "x")]
            var = root.CreateMDArray("ndvi", dims, g.ExtendedDataType.Create(g.GDT_Int16))
            var.Write(np.full((4, 4), 5000, np.int16))
            attr = var.CreateAttribute("scale_factor", [], g.ExtendedDataType.Create(g.GDT_Float64))
            attr.Write(0.0001)
            ds = None
        stated = inspect('HDF5:"%s"://ndvi' % os.path.join(h5, "*.h5"), "--quick")["unapplied_scaling"]
        self.assertIsNotNone(stated)
        self.assertIn("scale_factor=", stated)

    def test_value_rules_that_differ_between_dates_are_noted_by_fill(self):
        # Each file is read with its own nodata; where one date's differs (a slip in one file's
        # metadata, or a product whose encoding changed), fill says so, as inspect does.
        folder = os.path.join(self.tmp, "mixed")
        os.makedirs(folder)
        for k, date in enumerate(("2020-01-01", "2020-01-17", "2020-02-02")):
            values = np.full((4, 4), 5000, np.int16)
            values[:2] = -3000
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date), values, scale=0.0001,
                            nodata=-2000 if k == 2 else -3000)
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--out", os.path.join(self.tmp, "mixed-out")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("the inputs' value rules differ: 2020-02-02 has nodata -2000 (first date -3000)", done.stderr)
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--nodata", "-3000", "--out",
                               os.path.join(self.tmp, "mixed-given")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("value rules differ", done.stderr)
        # One date of unscaled Int16 counts (5000) among Float32 NDVI (0.5), the rules otherwise
        # the same: taken without a word, and the fill had carried thousands into the dates
        # beside it.
        types = os.path.join(self.tmp, "types")
        os.makedirs(types)
        for k, date in enumerate(("2020-01-01", "2020-01-17", "2020-02-02", "2020-02-18")):
            values = np.full((4, 4), 5000, np.int16) if k == 2 else np.full((4, 4), 0.5, np.float32)
            kt.write_raster(os.path.join(types, "ndvi_%s.tif" % date), values)
        done = kt.run_kalends(["-q", "fill", os.path.join(types, "*.tif"), "--out", os.path.join(self.tmp, "types-out")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("the inputs' value rules differ: 2020-02-02 has data type Int16 (first date Float32)", done.stderr)
        # Float64 beside Float32 holds the same values: no note (it had advised --scale for nothing).
        os.remove(os.path.join(types, "ndvi_2020-02-02.tif"))
        kt.write_raster(os.path.join(types, "ndvi_2020-02-02.tif"), np.full((4, 4), 0.5, np.float64))
        done = kt.run_kalends(["-q", "fill", os.path.join(types, "*.tif"), "--out", os.path.join(self.tmp, "types-out2")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("value rules differ", done.stderr)
        # One date labelled in degrees Celsius among kelvin files: no value is converted, and the
        # outputs carry the first label; it had passed without a word.
        units = os.path.join(self.tmp, "units")
        os.makedirs(units)
        for k, date in enumerate(("2020-01-01", "2020-01-17", "2020-02-02")):
            kt.write_raster(os.path.join(units, "lst_%s.tif" % date), np.full((4, 4), 290.0, np.float32))
            ds = kt.gdal().Open(os.path.join(units, "lst_%s.tif" % date), 1)
            ds.GetRasterBand(1).SetUnitType("C" if k == 1 else "K")
            ds = None
        done = kt.run_kalends(["-q", "fill", os.path.join(units, "*.tif"), "--out", os.path.join(self.tmp, "units-out")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("2020-01-17 has unit 'C' (first date 'K', which the outputs carry)", done.stderr)
        # A label on one side only: a file of the series saved without its unit.
        ds = kt.gdal().Open(os.path.join(units, "lst_2020-01-17.tif"), 1)
        ds.GetRasterBand(1).SetUnitType("")
        ds = None
        done = kt.run_kalends(["-q", "fill", os.path.join(units, "*.tif"), "--out", os.path.join(self.tmp, "units-out2")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("2020-01-17 has unit none (first date 'K', which the outputs carry)", done.stderr)
        # Every differing date is named, up to four, then counted: the first alone had hidden a
        # second file's wrong scale.
        scales = os.path.join(self.tmp, "scales")
        os.makedirs(scales)
        for k in range(8):
            kt.write_raster(os.path.join(scales, "ndvi_2020-%02d-01.tif" % (k + 1)), np.full((4, 4), 5000, np.int16),
                            scale=0.001 if k in (2, 3, 4, 5, 6, 7) else 0.0001)
        done = kt.run_kalends(["-q", "fill", os.path.join(scales, "*.tif"), "--out", os.path.join(self.tmp, "scales-out")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("2020-03-01 has scale 0.001 (first date 0.0001); 2020-04-01 has scale 0.001", done.stderr)
        self.assertIn("2020-06-01 has scale 0.001 (first date 0.0001); and 2 more dates; each file was read with its own",
                      done.stderr)

    def test_bad_input_is_one_line_and_exit_2(self):
        done = kt.run_kalends(["inspect", os.path.join(self.tmp, "nothing", "*.tif")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("no file matches", done.stderr)


if __name__ == "__main__":
    unittest.main()
