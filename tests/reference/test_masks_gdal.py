#!/usr/bin/python3
"""Values GDAL hides behind a float read: mask bands and signed bytes, checked with Python GDAL.

- A band's own mask (an internal per-dataset mask, as `gdal_translate -mask` writes, or an alpha
  band, as `gdalwarp -dstalpha` writes): GDAL's GetMaskBand() marks the cells with no value
  (GDAL RFC 15, "Band masks": 0 = invalid). kalends had read them as observations.
- Signed bytes (GeoTIFF PIXELTYPE=SIGNEDBYTE, how GDAL 3.6 stores int8): GDAL's Python
  ReadAsArray gives int8 values; a read into a float buffer gives 0..255, which kalends had used
  (raw -5 at scale 0.01 read as 2.51, nodata -128 never matched).

Expected values come from GDAL's own mask band and numpy's int8 view, never from kalends.
Invented stacks of a fictional district, for the mechanics of reading only.
"""
import csv
import glob
import json
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

DAYS = ["2021-01-01", "2021-01-17", "2021-02-02", "2021-02-18", "2021-03-06", "2021-03-22"]
ROWS, COLS = 16, 20
GEOTRANSFORM = (500000, 250, 0, 9040000, 0, -250)


def create(path, gdal_type, bands=1, options=None):
    g = kt.gdal()
    from osgeo import osr
    srs = osr.SpatialReference()
    srs.ImportFromEPSG(32733)
    ds = g.GetDriverByName("GTiff").Create(path, COLS, ROWS, bands, gdal_type, options or [])
    ds.SetGeoTransform(GEOTRANSFORM)
    ds.SetProjection(srs.ExportToWkt())
    return ds


def inspect(pattern):
    done = kt.run_kalends(["inspect", pattern, "--json"])
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def check_fill_keeps(testcase, pattern, out, truth):
    """Fills `pattern` and checks that the observed cells (flag 0) are those of `truth`, {day:
    (valid, physical values)}, with their values."""
    kt.run_fill_ok(testcase, [pattern, "--out", out, "--lambda", "10", "--threads", "1"])
    for f in sorted(glob.glob(os.path.join(out, "*.tif"))):
        o = kt.read_output(f)
        day = os.path.basename(f).split("_")[-1][:10]
        valid, values = truth[day]
        np.testing.assert_array_equal(o["flag"] == 0, valid, err_msg=day)
        np.testing.assert_allclose(o["value"][valid], values[valid], atol=1e-6, err_msg=day)


class MaskBands(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        g = kt.gdal()
        rng = np.random.default_rng(1)
        cls.internal = os.path.join(cls.tmp, "internal")
        cls.alpha = os.path.join(cls.tmp, "alpha")
        os.makedirs(cls.internal)
        os.makedirs(cls.alpha)
        for day in DAYS:
            v = (0.3 + 0.2 * rng.random((ROWS, COLS))).astype("float32")
            cloud = rng.random((ROWS, COLS)) < 0.3
            v[cloud] = 0.0  # what a masked cell holds
            ds = create(os.path.join(cls.internal, "ndvi_%s.tif" % day), g.GDT_Float32)
            ds.GetRasterBand(1).WriteArray(v)
            ds.CreateMaskBand(g.GMF_PER_DATASET)
            ds.GetRasterBand(1).GetMaskBand().WriteArray(np.where(cloud, 0, 255).astype("uint8"))
            ds = None
            # NDVI in bytes (scale 0.004, offset -0.1) with an alpha band: raw 0 under the alpha.
            raw = np.round((v + 0.1) / 0.004).astype("uint8")
            raw[cloud] = 0
            ds = create(os.path.join(cls.alpha, "ndvi_%s.tif" % day), g.GDT_Byte, bands=2,
                        options=["ALPHA=YES"])
            ds.GetRasterBand(1).WriteArray(raw)
            ds.GetRasterBand(1).SetScale(0.004)
            ds.GetRasterBand(1).SetOffset(-0.1)
            ds.GetRasterBand(2).SetColorInterpretation(g.GCI_AlphaBand)
            ds.GetRasterBand(2).WriteArray(np.where(cloud, 0, 255).astype("uint8"))
            ds = None

    def gdal_truth(self, folder):
        """{day: (valid mask from GDAL's GetMaskBand, physical values)}."""
        g = kt.gdal()
        truth = {}
        for day in DAYS:
            ds = g.Open(os.path.join(folder, "ndvi_%s.tif" % day))  # kept: a band outlives no dataset
            band = ds.GetRasterBand(1)
            self.assertFalse(band.GetMaskFlags() & (g.GMF_ALL_VALID | g.GMF_NODATA))
            valid = band.GetMaskBand().ReadAsArray() > 0
            values = band.ReadAsArray().astype(np.float64) * (band.GetScale() or 1) + (band.GetOffset() or 0)
            truth[day] = (valid, values)
        return truth

    def check_stack(self, folder, mask_name):
        truth = self.gdal_truth(folder)
        report = inspect(os.path.join(folder, "*.tif"))
        for d in report["dates"]:
            valid, _ = truth[d["date"][:10]]
            self.assertEqual(d["observed"], int(valid.sum()), d["date"])
            self.assertEqual(d["mask"], mask_name)
        check_fill_keeps(self, os.path.join(folder, "*.tif"), os.path.join(self.tmp, "out-" + mask_name), truth)

    def test_an_internal_mask_marks_cells_missing(self):
        self.check_stack(self.internal, "mask")

    def test_an_alpha_band_marks_cells_missing(self):
        self.check_stack(self.alpha, "alpha band")

    def test_grid_carries_no_value_under_the_mask(self):
        for folder in (self.internal, self.alpha):
            valid, values = self.gdal_truth(folder)[DAYS[0]]
            out = os.path.join(self.tmp, "grid-" + os.path.basename(folder))
            done = kt.run_kalends(["-q", "grid", os.path.join(folder, "ndvi_%s.tif" % DAYS[0]), "--out", out,
                                   "--crs", "EPSG:32733", "--resample", "nearest"])
            self.assertEqual(done.returncode, 0, done.stderr)
            ds = kt.gdal().Open(os.path.join(out, "ndvi_%s.tif" % DAYS[0]))
            placed = ds.GetRasterBand(1).ReadAsArray()
            np.testing.assert_array_equal(np.isfinite(placed), valid, err_msg=folder)
            np.testing.assert_allclose(placed[valid], values[valid], atol=1e-6, err_msg=folder)

    def test_extract_reads_no_value_under_the_mask(self):
        truth = self.gdal_truth(self.internal)
        day = DAYS[2]
        valid, values = truth[day]
        rows, cols = np.nonzero(~valid)
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["id", "x", "y", "date"])
            for k in range(4):
                r, c = int(rows[k]), int(cols[k])
                w.writerow(["masked%d" % k, GEOTRANSFORM[0] + (c + 0.5) * 250, GEOTRANSFORM[3] - (r + 0.5) * 250, day])
            r, c = [int(a[0]) for a in np.nonzero(valid)]
            w.writerow(["clear", GEOTRANSFORM[0] + (c + 0.5) * 250, GEOTRANSFORM[3] - (r + 0.5) * 250, day])
        table = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["-q", "extract", os.path.join(self.internal, "*.tif"), "--points", points,
                               "--crs", "EPSG:32733", "--x-column", "x", "--y-column", "y", "--out", table])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows_out = {row["id"]: row for row in kt.read_table(table)}
        for k in range(4):
            self.assertEqual(rows_out["masked%d" % k]["ndvi"], "", rows_out["masked%d" % k])
        self.assertAlmostEqual(float(rows_out["clear"]["ndvi"]), float(values[r, c]), places=6)


class MaskWithNodataAndFloatAlpha(kt.TempDirTestCase):
    def test_grid_applies_a_mask_beside_a_nodata_value(self):
        # int16 NDVI with nodata -3000 and an internal mask: GDAL's warper takes the nodata and
        # leaves the mask unused, so `grid` had carried the masked cells (NDVI 0) into its output.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "both")
        os.makedirs(folder)
        rng = np.random.default_rng(8)
        raw = rng.integers(2000, 8000, (ROWS, COLS)).astype("int16")
        raw[rng.random((ROWS, COLS)) < 0.1] = -3000
        cloud = rng.random((ROWS, COLS)) < 0.3
        raw[cloud] = 0
        path = os.path.join(folder, "ndvi_%s.tif" % DAYS[0])
        ds = create(path, g.GDT_Int16)
        band = ds.GetRasterBand(1)
        band.WriteArray(raw)
        band.SetNoDataValue(-3000)
        band.SetScale(1e-4)
        ds.CreateMaskBand(g.GMF_PER_DATASET)
        ds.GetRasterBand(1).GetMaskBand().WriteArray(np.where(cloud, 0, 255).astype("uint8"))
        ds = None
        ds = g.Open(path)
        valid = (ds.GetRasterBand(1).GetMaskBand().ReadAsArray() > 0) & (raw != -3000)
        out = os.path.join(self.tmp, "grid-both")
        done = kt.run_kalends(["-q", "grid", path, "--out", out, "--crs", "EPSG:32733", "--resample", "nearest"])
        self.assertEqual(done.returncode, 0, done.stderr)
        placed_ds = g.Open(os.path.join(out, os.path.basename(path)))
        placed = placed_ds.GetRasterBand(1).ReadAsArray()
        np.testing.assert_array_equal(np.isfinite(placed), valid)
        np.testing.assert_allclose(placed[valid], raw[valid] * 1e-4, atol=1e-6)

    def test_an_alpha_band_beside_float_values_marks_cells_missing(self):
        # `gdalwarp -dstalpha` writes an alpha band beside Float32 data too; GDAL takes it as the
        # mask of Byte and UInt16 bands only (mask flags 1 here), so its zeros had been read as
        # NDVI 0. Expected: alpha 0 is no value.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "float-alpha")
        os.makedirs(folder)
        rng = np.random.default_rng(9)
        truth = {}
        for day in DAYS:
            v = rng.uniform(0.2, 0.8, (ROWS, COLS)).astype("float32")
            cloud = rng.random((ROWS, COLS)) < 0.25
            v[cloud] = 0.0
            ds = create(os.path.join(folder, "ndvi_%s.tif" % day), g.GDT_Float32, bands=2)
            ds.GetRasterBand(1).WriteArray(v)
            ds.GetRasterBand(2).SetColorInterpretation(g.GCI_AlphaBand)
            ds.GetRasterBand(2).WriteArray(np.where(cloud, 0, 255).astype("float32"))
            ds = None
            truth[day] = (~cloud, v.astype(np.float64))
        ds = g.Open(os.path.join(folder, "ndvi_%s.tif" % DAYS[0]))
        self.assertTrue(ds.GetRasterBand(1).GetMaskFlags() & g.GMF_ALL_VALID)  # GDAL does not mask it
        report = inspect(os.path.join(folder, "*.tif"))
        for d in report["dates"]:
            self.assertEqual(d["observed"], int(truth[d["date"][:10]][0].sum()))
            self.assertEqual(d["mask"], "alpha band")
        check_fill_keeps(self, os.path.join(folder, "*.tif"), os.path.join(self.tmp, "out-float-alpha"), truth)


class AlphaBandIsNoDate(kt.TempDirTestCase):
    def test_an_alpha_band_beside_dated_bands_or_a_dated_name_is_their_mask(self):
        # A multi-band file dated by band descriptions with an alpha band, and a file named
        # with its date holding one value band and an alpha band: both had failed, "band 6: no
        # date found" and "band 1: no date found", the alpha band taken for a date.
        g = kt.gdal()
        rng = np.random.default_rng(12)
        values = rng.uniform(0.2, 0.8, (5, ROWS, COLS)).astype("float32")
        alpha = np.where(rng.random((ROWS, COLS)) < 0.3, 0, 255).astype("float32")
        dated = os.path.join(self.tmp, "bands.tif")
        ds = create(dated, g.GDT_Float32, bands=6)
        for k in range(5):
            ds.GetRasterBand(k + 1).SetDescription(DAYS[k])
            ds.GetRasterBand(k + 1).WriteArray(values[k])
        ds.GetRasterBand(6).SetColorInterpretation(g.GCI_AlphaBand)
        ds.GetRasterBand(6).WriteArray(alpha)
        ds = None
        report = inspect(dated)
        self.assertEqual([d["date"][:10] for d in report["dates"]], DAYS[:5])
        self.assertEqual([d["observed"] for d in report["dates"]], [int((alpha > 0).sum())] * 5)
        named = os.path.join(self.tmp, "ndvi_%s.tif" % DAYS[0])
        ds = create(named, g.GDT_Float32, bands=2)
        ds.GetRasterBand(1).WriteArray(values[0])
        ds.GetRasterBand(2).SetColorInterpretation(g.GCI_AlphaBand)
        ds.GetRasterBand(2).WriteArray(alpha)
        ds = None
        report = inspect(named)
        self.assertEqual([d["date"][:10] for d in report["dates"]], [DAYS[0]])
        self.assertEqual(report["dates"][0]["observed"], int((alpha > 0).sum()))


class SignedBytes(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        g = kt.gdal()
        rng = np.random.default_rng(4)
        cls.folder = os.path.join(cls.tmp, "in")
        os.makedirs(cls.folder)
        for day in DAYS:
            v = rng.integers(-20, 90, (ROWS, COLS)).astype("int8")
            v[rng.random((ROWS, COLS)) < 0.3] = -128
            ds = create(os.path.join(cls.folder, "ndvi_%s.tif" % day), g.GDT_Byte, options=["PIXELTYPE=SIGNEDBYTE"])
            band = ds.GetRasterBand(1)
            band.WriteArray(v.view("uint8"))
            band.SetNoDataValue(-128)
            band.SetScale(0.01)
            ds = None

    def truth(self):
        """{day: (valid, physical values)} from numpy's int8 view of the stored bytes."""
        g = kt.gdal()
        out = {}
        for day in DAYS:
            ds = g.Open(os.path.join(self.folder, "ndvi_%s.tif" % day))
            band = ds.GetRasterBand(1)
            raw = band.ReadAsArray().astype(np.uint8).view(np.int8)
            out[day] = (raw != -128, raw.astype(np.float64) * 0.01)
        return out

    def test_signed_bytes_are_read_as_signed_with_their_nodata(self):
        truth = self.truth()
        report = inspect(os.path.join(self.folder, "*.tif"))
        for d in report["dates"]:
            valid, values = truth[d["date"][:10]]
            self.assertEqual(d["observed"], int(valid.sum()))
            self.assertAlmostEqual(d["min"], values[valid].min(), places=6)
            self.assertAlmostEqual(d["max"], values[valid].max(), places=6)
        self.assertLess(min(d["min"] for d in report["dates"]), 0)
        check_fill_keeps(self, os.path.join(self.folder, "*.tif"), os.path.join(self.tmp, "out"), truth)

    def test_grid_reads_signed_bytes(self):
        valid, values = self.truth()[DAYS[0]]
        out = os.path.join(self.tmp, "grid")
        done = kt.run_kalends(["-q", "grid", os.path.join(self.folder, "ndvi_%s.tif" % DAYS[0]), "--out", out,
                               "--crs", "EPSG:32733", "--resample", "nearest"])
        self.assertEqual(done.returncode, 0, done.stderr)
        ds = kt.gdal().Open(os.path.join(out, "ndvi_%s.tif" % DAYS[0]))
        placed = ds.GetRasterBand(1).ReadAsArray()
        np.testing.assert_array_equal(np.isfinite(placed), valid)
        np.testing.assert_allclose(placed[valid], values[valid], atol=1e-6)

    def test_a_signed_nodata_can_be_given(self):
        # -128 fits a signed byte; it had been refused as outside "Byte values (0 to 255)".
        done = kt.run_kalends(["inspect", os.path.join(self.folder, "*.tif"), "--nodata", "-128", "--json"])
        self.assertEqual(done.returncode, 0, done.stderr)
        observed = sum(d["observed"] for d in json.loads(done.stdout)["dates"])
        self.assertEqual(observed, sum(int(v.sum()) for v, _ in self.truth().values()))
        done = kt.run_kalends(["inspect", os.path.join(self.folder, "*.tif"), "--nodata", "200", "--quick"])
        self.assertEqual(done.returncode, 2)
        self.assertIn("-128 to 127", done.stderr)


if __name__ == "__main__":
    unittest.main()
