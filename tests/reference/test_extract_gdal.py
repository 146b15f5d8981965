#!/usr/bin/python3
"""kalends extract on a real projected grid, checked with Python GDAL/OSR and numpy.

Data: ../shared/data/landsat7-bands/L7_ETMs.tif, a USGS Landsat 7 ETM+ scene (public domain),
six bands of digital numbers on UTM zone 25S (SIRGAS 2000), 28.5 m pixels.

For WGS 84 points, the expected values are computed here, independently of kalends:
- the points are transformed with osr.CoordinateTransformation (PROJ), in longitude-latitude
  / easting-northing order (OAMS_TRADITIONAL_GIS_ORDER);
- pixel positions with gdal.InvGeoTransform; nearest = the cell holding the point; bilinear =
  the textbook weights of the four surrounding cell centres (edge cells repeated beyond the
  outermost centres), missing when a cell with a non-zero weight is missing;
- buffer mean = numpy mean of the cells whose centre is within the radius (grid distance in
  metres, the CRS's unit).
"""
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def value(text):
    return float(text) if text != "" else np.nan


class ExtractLandsat(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.raster = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        g = kt.gdal()
        from osgeo import osr
        ds = g.Open(cls.raster)
        cls.bands = ds.ReadAsArray().astype(np.float64)  # (6, rows, cols)
        cls.gt = ds.GetGeoTransform()
        cls.inv = g.InvGeoTransform(cls.gt)
        layer_srs = osr.SpatialReference(wkt=ds.GetProjection())
        layer_srs.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
        wgs84 = osr.SpatialReference()
        wgs84.ImportFromEPSG(4326)
        wgs84.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
        to_layer = osr.CoordinateTransformation(wgs84, layer_srs)
        to_wgs84 = osr.CoordinateTransformation(layer_srs, wgs84)
        rows, cols = cls.bands.shape[1:]
        rng = np.random.default_rng(20250608)
        # Points drawn in pixel space (inside, at the edges, a few outside) and taken to WGS 84.
        px = np.concatenate([rng.uniform(0, cols, 40), [0.01, cols - 0.01, 0.3, cols - 0.4, -3, cols + 5, -1]])
        py = np.concatenate([rng.uniform(0, rows, 40), [0.01, rows - 0.01, rows - 0.2, 0.45, 10, 20, 30.5]])
        cls.points = []
        for i, (c, r) in enumerate(zip(px, py)):
            x = cls.gt[0] + c * cls.gt[1] + r * cls.gt[2]
            y = cls.gt[3] + c * cls.gt[4] + r * cls.gt[5]
            lon, lat, _ = to_wgs84.TransformPoint(x, y)
            cls.points.append(("p%02d" % i, lon, lat))
        cls.to_layer = to_layer
        cls.csv = os.path.join(cls.tmp, "points.csv")
        with open(cls.csv, "w") as f:
            f.write("site,lon,lat\n")
            for pid, lon, lat in cls.points:
                f.write("%s,%.10f,%.10f\n" % (pid, lon, lat))
        cls.tables = {}
        for sampling in ("nearest", "bilinear"):
            out = os.path.join(cls.tmp, sampling + ".csv")
            done = kt.run_kalends(["-q", "extract", cls.raster, "--points", cls.csv, "--out", out,
                                   "--sampling", sampling, "--buffer", "100", "--id-column", "site",
                                   "--x-column", "lon", "--y-column", "lat", "--date-column", ""])
            assert done.returncode == 0, done.stderr
            cls.tables[sampling] = kt.read_table(out)

    def pixel(self, lon, lat):
        x, y, _ = self.to_layer.TransformPoint(lon, lat)
        c = self.inv[0] + x * self.inv[1] + y * self.inv[2]
        r = self.inv[3] + x * self.inv[4] + y * self.inv[5]
        return x, y, c, r

    def inside(self, c, r):
        rows, cols = self.bands.shape[1:]
        return 0 <= c < cols and 0 <= r < rows

    def test_nearest_equals_gdal_osr(self):
        checked = 0
        for row, (pid, lon, lat) in zip(self.tables["nearest"], self.points):
            self.assertEqual(row["site"], pid)
            _, _, c, r = self.pixel(lon, lat)
            for b in range(6):
                got = row["L7_ETMs.b%d" % (b + 1)]
                if not self.inside(c, r):
                    self.assertEqual(got, "")
                    self.assertEqual(row["L7_ETMs.b%d.reason" % (b + 1)], "outside the layer")
                    continue
                self.assertEqual(float(got), self.bands[b, int(np.floor(r)), int(np.floor(c))], pid)
                checked += 1
        self.assertGreaterEqual(checked, 6 * 40)

    def test_bilinear_equals_numpy(self):
        rows, cols = self.bands.shape[1:]
        checked = 0
        for row, (pid, lon, lat) in zip(self.tables["bilinear"], self.points):
            _, _, c, r = self.pixel(lon, lat)
            if not self.inside(c, r):
                self.assertEqual(row["L7_ETMs.b1"], "")
                continue
            u, v = c - 0.5, r - 0.5
            c0, r0 = int(np.floor(u)), int(np.floor(v))
            fx, fy = u - c0, v - r0
            cs = np.clip([c0, c0 + 1], 0, cols - 1)
            rs = np.clip([r0, r0 + 1], 0, rows - 1)
            for b in range(6):
                a = self.bands[b]
                expected = ((1 - fx) * (1 - fy) * a[rs[0], cs[0]] + fx * (1 - fy) * a[rs[0], cs[1]] +
                            (1 - fx) * fy * a[rs[1], cs[0]] + fx * fy * a[rs[1], cs[1]])
                self.assertAlmostEqual(float(row["L7_ETMs.b%d" % (b + 1)]), expected, delta=1e-6 * max(1, expected))
                checked += 1
        self.assertGreaterEqual(checked, 6 * 40)

    def test_buffer_mean_equals_numpy(self):
        rows, cols = self.bands.shape[1:]
        cc, rr = np.meshgrid(np.arange(cols) + 0.5, np.arange(rows) + 0.5)
        cx = self.gt[0] + cc * self.gt[1] + rr * self.gt[2]
        cy = self.gt[3] + cc * self.gt[4] + rr * self.gt[5]
        checked = outside_with_cells = 0
        for row, (pid, lon, lat) in zip(self.tables["nearest"], self.points):
            x, y, c, r = self.pixel(lon, lat)
            within = np.hypot(cx - x, cy - y) <= 100.0
            self.assertEqual(int(row["L7_ETMs.b1.buffer_cells"]), int(within.sum()), pid)
            if not self.inside(c, r):
                # Outside the layer: no value of its own, but the buffer's cells inside it count
                # (docs/extract.md: the cells whose centre lies within the radius).
                self.assertEqual(row["L7_ETMs.b1"], "", pid)
                self.assertEqual(row["L7_ETMs.b1.reason"], "outside the layer", pid)
                if not within.any():
                    self.assertEqual(row["L7_ETMs.b1.buffer_mean"], "", pid)
                    continue
                outside_with_cells += 1
            # a 100 m radius on 28.5 m cells holds about 38 cells; fewer only at the edges
            for b in range(6):
                expected = self.bands[b][within].mean()
                self.assertAlmostEqual(float(row["L7_ETMs.b%d.buffer_mean" % (b + 1)]), expected,
                                       delta=1e-6 * expected)
                checked += 1
        self.assertGreaterEqual(checked, 6 * 40)
        self.assertGreaterEqual(outside_with_cells, 1)   # the last point, 1 px (28.5 m) west of the scene

    def extract_site_table(self, points, out, *extra):
        """`kalends extract` of the Landsat scene at a table with columns site, lon, lat and no date."""
        return kt.run_kalends(list(extra) + ["extract", self.raster, "--points", points, "--out", out,
                                             "--id-column", "site", "--x-column", "lon", "--y-column", "lat",
                                             "--date-column", ""])

    def test_bad_points_file_is_one_clear_line(self):
        bad = os.path.join(self.tmp, "bad.csv")
        with open(bad, "w") as f:
            f.write("site,lon,lat\np1,-34.87,minus eight\n")
        done = self.extract_site_table(bad, os.path.join(self.tmp, "x.csv"))
        self.assertEqual(done.returncode, 2)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("bad.csv:2", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "x.csv")))
        done = kt.run_kalends(["extract", self.raster, "--points", self.csv, "--out", os.path.join(self.tmp, "x.csv")])
        self.assertEqual(done.returncode, 2)
        self.assertIn("no column 'id'", done.stderr)
        done = kt.run_kalends(["extract", self.raster, "--points", os.path.join(self.tmp, "none.csv"), "--out",
                               os.path.join(self.tmp, "x.csv")])
        self.assertEqual(done.returncode, 2)
        self.assertIn("none.csv: no such file", done.stderr)
        # A row cut short (a longitude, no latitude) is refused by its row, not taken as a point
        # without coordinates.
        with open(bad, "w") as f:
            f.write("site,lon,lat\np1,-34.87,-7.98\np2,-34.87\n")
        done = self.extract_site_table(bad, os.path.join(self.tmp, "x.csv"))
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("bad.csv:3: has lon '-34.87' but no lat", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "x.csv")))
        # A latitude beyond the poles (WGS 84 points) is a slip, refused by its row.
        with open(bad, "w") as f:
            f.write("site,lon,lat\np1,-34.87,-97.98\n")
        done = self.extract_site_table(bad, os.path.join(self.tmp, "x.csv"))
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("bad.csv:2: lat -97.98 is beyond ±90 degrees", done.stderr)

    def test_coordinates_are_echoed_as_written(self):
        points = os.path.join(self.tmp, "echo.csv")
        with open(points, "w") as f:
            f.write("site,lon,lat\np1,-34.875000001,-7.98\np2,,\n")
        out = os.path.join(self.tmp, "echo_table.csv")
        done = self.extract_site_table(points, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = kt.read_table(out)
        self.assertEqual((rows[0]["lon"], rows[0]["lat"]), ("-34.875000001", "-7.98"))
        self.assertEqual((rows[1]["lon"], rows[1]["lat"]), ("", ""))
        self.assertEqual(rows[1]["L7_ETMs.b1.reason"], "no coordinates")
        self.assertNotIn("more than one point", done.stderr)
        # An id used twice: both points keep their rows, and a note says so.
        with open(points, "a") as f:
            f.write("p1,-34.88,-7.99\n")
        done = self.extract_site_table(points, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual([r["site"] for r in kt.read_table(out)], ["p1", "p2", "p1"])
        self.assertIn("1 ids name more than one point (first: 'p1')", done.stderr)

    def test_bad_lists_name_the_option_and_the_item(self):
        out = os.path.join(self.tmp, "lists.csv")
        base = ["extract", self.raster, "--points", self.csv, "--out", out, "--id-column", "site",
                "--x-column", "lon", "--y-column", "lat", "--date-column", ""]
        for extra, expected in ((["--lags", "1,,2"], "--lags '1,,2': an empty item"),
                                (["--lags", "1.5"], "--lags '1.5': expected a whole number"),
                                (["--lags", "0"], "--lags"),
                                (["--layers", "b1,"], "--layers 'b1,': an empty item"),
                                (["--buffer", "nan"], "--buffer: the radius must be positive"),
                                (["--out", self.tmp], "is a folder; give the table's file name")):
            command = base + extra
            if extra[0] == "--out":  # the folder replaces the table's name
                command = [a for i, a in enumerate(base) if a != "--out" and (i == 0 or base[i - 1] != "--out")] + extra
            done = kt.run_kalends(command)
            self.assertEqual(done.returncode, 2, extra)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn(expected, done.stderr)
            self.assertFalse(os.path.exists(out))


if __name__ == "__main__":
    unittest.main(verbosity=2)
