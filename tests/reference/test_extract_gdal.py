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
- buffer mean = numpy mean of the cells whose centre is within the radius: the distance on the
  layer's ellipsoid between the point and each cell centre, both taken to the layer's own
  geographic CRS by osr, by Vincenty's inverse formula (Vincenty 1975, Survey Review 23:88-93,
  from memory; about 0.5 mm, an algorithm other than the one kalends calls in PROJ).

A second class does the same on an invented raster on the MODIS sinusoidal grid at 65 N, 150 W,
where distance on the grid and on the ground differ most (sinusoidal: x = R lambda cos phi,
y = R phi; Snyder 1987, USGS Professional Paper 1395, from memory).
"""
import datetime
import math
import csv
import os
import shutil
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def haversine_m(lon1, lat1, lon2, lat2, radius=6371008.8):
    p1, p2 = np.radians(lat1), np.radians(lat2)
    a = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(np.radians(lon2 - lon1) / 2) ** 2
    return 2 * radius * np.arcsin(np.minimum(1.0, np.sqrt(a)))


def vincenty_m(lon1, lat1, lon2, lat2, a=6378137.0, f=1 / 298.257223563):
    """Distance on the ellipsoid (a, f) by Vincenty's inverse formula, vectorised; a sphere
    (f = 0) by the haversine on radius a."""
    lon2, lat2 = np.broadcast_arrays(np.asarray(lon2, float), np.asarray(lat2, float))
    if f == 0:
        return haversine_m(lon1, lat1, lon2, lat2, a)
    b = a * (1 - f)
    big_l = np.radians(((lon2 - lon1) + 180) % 360 - 180)
    u1 = np.arctan((1 - f) * np.tan(np.radians(lat1)))
    u2 = np.arctan((1 - f) * np.tan(np.radians(lat2)))
    su1, cu1, su2, cu2 = np.sin(u1), np.cos(u1), np.sin(u2), np.cos(u2)
    lam = big_l.copy()
    for _ in range(200):
        sl, cl = np.sin(lam), np.cos(lam)
        sin_s = np.sqrt((cu2 * sl) ** 2 + (cu1 * su2 - su1 * cu2 * cl) ** 2)
        cos_s = su1 * su2 + cu1 * cu2 * cl
        sigma = np.arctan2(sin_s, cos_s)
        sin_a = np.where(sin_s == 0, 0.0, cu1 * cu2 * sl / np.where(sin_s == 0, 1, sin_s))
        cos2_a = 1 - sin_a ** 2
        cos_2sm = np.where(cos2_a == 0, 0.0, cos_s - 2 * su1 * su2 / np.where(cos2_a == 0, 1, cos2_a))
        c = f / 16 * cos2_a * (4 + f * (4 - 3 * cos2_a))
        previous = lam
        lam = big_l + (1 - c) * f * sin_a * (sigma + c * sin_s * (cos_2sm + c * cos_s * (-1 + 2 * cos_2sm ** 2)))
        if np.max(np.abs(lam - previous)) < 1e-12:
            break
    u_sq = cos2_a * (a * a - b * b) / (b * b)
    big_a = 1 + u_sq / 16384 * (4096 + u_sq * (-768 + u_sq * (320 - 175 * u_sq)))
    big_b = u_sq / 1024 * (256 + u_sq * (-128 + u_sq * (74 - 47 * u_sq)))
    delta = big_b * sin_s * (cos_2sm + big_b / 4 * (cos_s * (-1 + 2 * cos_2sm ** 2) - big_b / 6 * cos_2sm *
                                                     (-3 + 4 * sin_s ** 2) * (-3 + 4 * cos_2sm ** 2)))
    return b * big_a * (sigma - delta)


def ground_distances(srs_wkt, gt, shape, x, y):
    """Great-circle distance (m) from (x, y) to every cell centre of a grid in a projected CRS."""
    kt.gdal()
    from osgeo import osr
    layer = osr.SpatialReference(wkt=srs_wkt)
    layer.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    geographic = layer.CloneGeogCS()
    geographic.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    to_geographic = osr.CoordinateTransformation(layer, geographic)
    rows, cols = shape
    cc, rr = np.meshgrid(np.arange(cols) + 0.5, np.arange(rows) + 0.5)
    cx = gt[0] + cc * gt[1] + rr * gt[2]
    cy = gt[3] + cc * gt[4] + rr * gt[5]
    centres = np.array(to_geographic.TransformPoints(np.column_stack([cx.ravel(), cy.ravel()])))
    lon, lat, _ = to_geographic.TransformPoint(x, y)
    inverse_flattening = layer.GetInvFlattening()
    distance = vincenty_m(lon, lat, centres[:, 0], centres[:, 1], layer.GetSemiMajor(),
                          1 / inverse_flattening if inverse_flattening > 0 else 0)
    return distance.reshape(shape), (cx, cy)


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
        cls.wkt = ds.GetProjection()
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
        checked = outside_with_cells = 0
        for row, (pid, lon, lat) in zip(self.tables["nearest"], self.points):
            x, y, c, r = self.pixel(lon, lat)
            within = ground_distances(self.wkt, self.gt, self.bands.shape[1:], x, y)[0] <= 100.0
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

    def test_a_buffer_wider_than_the_layer_takes_every_cell(self):
        # Found with UBSan: a radius of 1e12 m overflowed the rows' cast; the mean came out empty
        # with 0 cells, exit 0. Any radius reaching past the layer takes all its cells.
        g = kt.gdal()
        cells = g.Open(self.raster).RasterXSize * g.Open(self.raster).RasterYSize
        for radius in ("1e7", "1e12"):
            out = os.path.join(self.tmp, "wide-%s.csv" % radius)
            done = kt.run_kalends(["-q", "extract", self.raster, "--points", self.csv, "--out", out, "--buffer", radius,
                                   "--id-column", "site", "--x-column", "lon", "--y-column", "lat",
                                   "--date-column", ""])
            self.assertEqual(done.returncode, 0, done.stderr)
            row = kt.read_table(out)[0]
            self.assertEqual(int(row["L7_ETMs.b1.buffer_cells"]), cells, radius)
            self.assertAlmostEqual(float(row["L7_ETMs.b1.buffer_mean"]), float(self.bands[0].mean()),
                                   delta=1e-5 * float(self.bands[0].mean()))

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
        # without coordinates: with its field missing, or empty.
        with open(bad, "w") as f:
            f.write("site,lon,lat\np1,-34.87,-7.98\np2,-34.87\n")
        done = self.extract_site_table(bad, os.path.join(self.tmp, "x.csv"))
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("bad.csv:3: has 2 fields where the header has 3 (a row cut short?)", done.stderr)
        with open(bad, "w") as f:
            f.write("site,lon,lat\np1,-34.87,-7.98\np2,-34.87,\n")
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
            f.write("site,lon,lat\np1,-34.875000001,-7.98\np2,,\np3,NA,NA\n")
        out = os.path.join(self.tmp, "echo_table.csv")
        done = self.extract_site_table(points, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = kt.read_table(out)
        self.assertEqual((rows[0]["lon"], rows[0]["lat"]), ("-34.875000001", "-7.98"))
        self.assertEqual((rows[1]["lon"], rows[1]["lat"]), ("", ""))
        self.assertEqual(rows[1]["L7_ETMs.b1.reason"], "no coordinates")
        # R's missing marker: no coordinates either, echoed as written.
        self.assertEqual((rows[2]["lon"], rows[2]["lat"], rows[2]["L7_ETMs.b1.reason"]), ("NA", "NA", "no coordinates"))
        self.assertNotIn("more than one point", done.stderr)
        # An id used twice: both points keep their rows, and a note says so.
        with open(points, "a") as f:
            f.write("p1,-34.88,-7.99\n")
        done = self.extract_site_table(points, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual([r["site"] for r in kt.read_table(out)], ["p1", "p2", "p3", "p1"])
        self.assertIn("1 id names more than one point (first: 'p1')", done.stderr)

    def test_rows_whose_fields_do_not_match_the_header_are_refused(self):
        bad = os.path.join(self.tmp, "fields.csv")
        out = os.path.join(self.tmp, "fields_table.csv")
        lon, lat = self.points[0][1], self.points[0][2]
        # A decimal comma in an unquoted field shifts the columns: refused by its line (4: the
        # empty line 3 counts), not read as a point at longitude 5.
        with open(bad, "w") as f:
            f.write("site,weight,lon,lat\np1,1.5,%.8f,%.8f\n\np2,1,5,%.8f,%.8f\n" % (lon, lat, lon, lat))
        done = self.extract_site_table(bad, out)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("fields.csv:4: has 5 fields where the header has 4 (a decimal comma", done.stderr)
        self.assertFalse(os.path.exists(out))
        with open(bad, "w") as f:
            f.write("site;note;lon;lat\np1;\"two\nlines; quoted\";%.8f;%.8f\np2;x;%.8f\n" % (lon, lat, lon))
        done = self.extract_site_table(bad, out)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("fields.csv:4: has 3 fields where the header has 4 (a row cut short?)", done.stderr)
        # Rows of separators and spaces (a spreadsheet's leftovers) are skipped like empty lines.
        with open(bad, "w") as f:
            f.write("site,lon,lat\r\np1,%.8f,%.8f\r\n,,\r\n  \r\n,, \r\n" % (lon, lat))
        done = self.extract_site_table(bad, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual([r["site"] for r in kt.read_table(out)], ["p1"])
        self.assertEqual(done.stderr, "")

    def test_two_layers_of_one_series_name_are_refused(self):
        # layer.tif in two folders given to one run: both would be the series 'layer', and one
        # was silently dropped. Refused, naming both; their parent folder names them a.layer
        # and b.layer.
        from osgeo import osr
        g = kt.gdal()
        srs = osr.SpatialReference()
        srs.ImportFromEPSG(32736)
        for name, value in (("a", 1.0), ("b", 2.0)):
            os.makedirs(os.path.join(self.tmp, "two", name))
            ds = g.GetDriverByName("GTiff").Create(os.path.join(self.tmp, "two", name, "layer.tif"), 10, 10, 1,
                                                   g.GDT_Float32)
            ds.SetGeoTransform((420000, 250, 0, 9650000, 0, -250))
            ds.SetProjection(srs.ExportToWkt())
            ds.GetRasterBand(1).WriteArray(np.full((10, 10), value, np.float32))
            ds = None
        points = os.path.join(self.tmp, "two-points.csv")
        with open(points, "w") as f:
            f.write("id,x,y,date\np1,421000,9649000,2020-01-01\n")
        table = os.path.join(self.tmp, "two.csv")
        base = ["extract", "--points", points, "--out", table, "--x-column", "x", "--y-column", "y",
                "--crs", "EPSG:32736"]
        done = kt.run_kalends(base[:1] + [os.path.join(self.tmp, "two", "a"), os.path.join(self.tmp, "two", "b")] +
                              base[1:])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("would be the series 'layer'", done.stderr)
        self.assertFalse(os.path.exists(table))
        done = kt.run_kalends(base[:1] + [os.path.join(self.tmp, "two")] + base[1:])
        self.assertEqual(done.returncode, 0, done.stderr)
        row = kt.read_table(table)[0]
        self.assertEqual((float(row["a.layer"]), float(row["b.layer"])), (1.0, 2.0))

    def test_two_columns_of_one_name_are_refused(self):
        # A table pasted together from two sheets: which 'site' is meant cannot be told (the
        # first had been taken without a word).
        dup = os.path.join(self.tmp, "dup.csv")
        with open(dup, "w") as f:
            f.write("site,lon,lat,site\np1,%.8f,%.8f,p9\n" % (self.points[0][1], self.points[0][2]))
        done = self.extract_site_table(dup, os.path.join(self.tmp, "dup_table.csv"))
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("dup.csv: has two columns named 'site' (columns 1 and 4)", done.stderr)

    def test_empty_and_renamed_tables(self):
        empty = os.path.join(self.tmp, "empty.csv")
        open(empty, "w").close()
        done = self.extract_site_table(empty, os.path.join(self.tmp, "e.csv"))
        self.assertEqual(done.returncode, 2)
        self.assertIn("empty.csv: is empty", done.stderr)
        collection = os.path.join(self.tmp, "none.geojson")
        with open(collection, "w") as f:
            f.write('{"type": "FeatureCollection", "features": []}')
        done = kt.run_kalends(["extract", self.raster, "--points", collection, "--out", os.path.join(self.tmp, "e.csv")])
        self.assertEqual(done.returncode, 2)
        self.assertIn("none.geojson: holds no points", done.stderr)
        # The same table named .txt and tab-separated reads as the CSV does.
        text = os.path.join(self.tmp, "sites.txt")
        with open(self.csv) as f, open(text, "w") as g:
            g.write(f.read().replace(",", "\t"))
        out = os.path.join(self.tmp, "from_text.csv")
        done = self.extract_site_table(text, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        from_csv = os.path.join(self.tmp, "from_csv.csv")
        self.assertEqual(self.extract_site_table(self.csv, from_csv, "-q").returncode, 0)
        self.assertEqual(kt.read_table(out), kt.read_table(from_csv))
        self.assertEqual(len(kt.read_table(out)), len(self.points))

    def test_the_table_and_the_page_replace_no_input(self):
        # A copy of the scene: the shared data itself is never written to, even by a failure.
        layer = os.path.join(self.tmp, "scene", "L7_ETMs.tif")
        os.makedirs(os.path.dirname(layer))
        shutil.copy(self.raster, layer)
        points = os.path.join(self.tmp, "keep.csv")
        shutil.copy(self.csv, points)
        before = {path: open(path, "rb").read() for path in (layer, points)}
        for out, expected in ((points, "is the points file itself"), (layer, "is a file of the layer")):
            done = kt.run_kalends(["extract", os.path.dirname(layer), "--points", points, "--out", out,
                                   "--id-column", "site", "--x-column", "lon", "--y-column", "lat",
                                   "--date-column", ""])
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn(expected, done.stderr)
        done = kt.run_kalends(["report", os.path.dirname(layer), "--html", layer])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("the file exists and is not a kalends report", done.stderr)
        for path, content in before.items():
            with open(path, "rb") as f:
                self.assertEqual(f.read(), content, path)
        # A folder as the page, or a page in a folder that does not exist: one line naming the
        # path and the reason (they had been "basic_filebuf::underflow error reading the file:
        # Is a directory", without a path, and "cannot write" without a reason).
        folder = os.path.join(self.tmp, "a-folder.html")
        os.makedirs(folder)
        done = kt.run_kalends(["report", os.path.dirname(layer), "--html", folder])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: --html '%s': is a folder; give a file name, e.g. report.html"
                         % folder)
        # The same for the page (it had failed at the rename, exit 1, naming no file), and an
        # empty name.
        page = os.path.join(self.tmp, "no-such-folder", "report.html")
        done = kt.run_kalends(["report", os.path.dirname(layer), "--html", page])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: --html '%s': the folder '%s' does not exist"
                         % (page, os.path.dirname(page)))
        done = kt.run_kalends(["report", os.path.dirname(layer), "--html", ""])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: --html: needs a file name, e.g. report.html")
        missing = os.path.join(self.tmp, "no-such-folder", "table.csv")
        done = kt.run_kalends(["extract", os.path.dirname(layer), "--points", points, "--out", missing,
                               "--id-column", "site", "--x-column", "lon", "--y-column", "lat", "--date-column", ""])
        # Said before the work (version 0.3.18; it had been "cannot write", exit 1, after it).
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: --out '%s': the folder '%s' does not exist"
                         % (missing, os.path.dirname(missing)))
        # An earlier page is replaced.
        page = os.path.join(self.tmp, "page.html")
        for _ in range(2):
            done = kt.run_kalends(["-q", "report", os.path.dirname(layer), "--html", page])
            self.assertEqual(done.returncode, 0, done.stderr)

    def test_only_an_earlier_table_is_replaced(self):
        # A shapefile's .dbf, a summary beside the layers, any user file: each would be lost if
        # the table replaced it (they were, before 0.3.14). An earlier table, wide or long, is
        # replaced.
        keep = os.path.join(self.tmp, "notes.dbf")
        with open(keep, "wb") as f:
            f.write(b"\x03\x7d\x0c\x04 a user's attribute table")
        with open(keep, "rb") as f:
            before = f.read()
        done = self.extract_site_table(self.csv, keep)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("notes.dbf': exists and is not a table kalends extract wrote", done.stderr)
        with open(keep, "rb") as f:
            self.assertEqual(f.read(), before)
        for extra in ([], ["--long"]):
            table = os.path.join(self.tmp, "again%s.csv" % len(extra))
            for _ in range(2):
                done = kt.run_kalends(["-q", "extract", self.raster, "--points", self.csv, "--out", table,
                                       "--id-column", "site", "--x-column", "lon", "--y-column", "lat",
                                       "--date-column", ""] + extra)
                self.assertEqual(done.returncode, 0, done.stderr)

    def test_pipe_separated_blank_and_capitalised_tables(self):
        # extract.md: comma, semicolon, tab or pipe separated. GDAL 3.6 does not read '|' itself.
        piped = os.path.join(self.tmp, "sites_pipe.csv")
        with open(self.csv) as f, open(piped, "w") as g:
            g.write(f.read().replace(",", "|").replace("site|lon|lat", "Site|Lon|Lat"))
        out = os.path.join(self.tmp, "from_pipe.csv")
        done = self.extract_site_table(piped, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        from_csv = os.path.join(self.tmp, "from_csv_for_pipe.csv")
        self.assertEqual(self.extract_site_table(self.csv, from_csv, "-q").returncode, 0)
        with open(out) as f:
            self.assertTrue(f.readline().startswith("Site,Lon,Lat,"))  # the file's own spelling
        self.assertEqual([list(row.values()) for row in kt.read_table(out)],
                         [list(row.values()) for row in kt.read_table(from_csv)])
        # A file of nothing but a byte-order mark and blank lines is empty, not of an unknown format.
        blank = os.path.join(self.tmp, "blank.csv")
        with open(blank, "wb") as f:
            f.write(b"\xef\xbb\xbf\n\r\n  \n")
        done = self.extract_site_table(blank, os.path.join(self.tmp, "b.csv"))
        self.assertEqual(done.returncode, 2)
        self.assertIn("blank.csv: is empty", done.stderr)

    def extracted_without_dates(self, points):
        """The rows of `kalends extract` of the scene at the vector file `points` (no date column)."""
        out = os.path.splitext(points)[0] + ".csv"
        done = kt.run_kalends(["-q", "extract", self.raster, "--points", points, "--out", out, "--date-column", ""])
        self.assertEqual(done.returncode, 0, done.stderr)
        return kt.read_table(out)

    def test_vector_points_keyed_multipoint_and_without_crs(self):
        from osgeo import ogr, osr
        wgs84 = osr.SpatialReference()
        wgs84.ImportFromEPSG(4326)
        pid, lon, lat = self.points[0]
        # A GeoPackage whose key column is the id (FID=id), a common export.
        keyed = os.path.join(self.tmp, "keyed.gpkg")
        ds = ogr.GetDriverByName("GPKG").CreateDataSource(keyed)
        layer = ds.CreateLayer("pts", wgs84, ogr.wkbPoint, options=["FID=id"])
        feature = ogr.Feature(layer.GetLayerDefn())
        feature.SetFID(7)
        feature.SetGeometry(ogr.CreateGeometryFromWkt("POINT (%.10f %.10f)" % (lon, lat)))
        layer.CreateFeature(feature)
        ds = None
        rows = self.extracted_without_dates(keyed)
        self.assertEqual(rows[0]["id"], "7")
        nearest = {r["site"]: r for r in self.tables["nearest"]}[pid]
        self.assertEqual(rows[0]["L7_ETMs.b1"], nearest["L7_ETMs.b1"])
        # A multipoint of one point is that point; a polygon is named by its place, from 1.
        shapes = os.path.join(self.tmp, "shapes.geojson")
        ds = ogr.GetDriverByName("GeoJSON").CreateDataSource(shapes)
        layer = ds.CreateLayer("pts", wgs84, ogr.wkbUnknown)
        layer.CreateField(ogr.FieldDefn("id", ogr.OFTString))
        for i, wkt in enumerate(["MULTIPOINT (%.10f %.10f)" % (lon, lat), "POINT (%.10f %.10f)" % (lon, lat)]):
            feature = ogr.Feature(layer.GetLayerDefn())
            feature.SetField("id", "s%d" % i)
            feature.SetGeometry(ogr.CreateGeometryFromWkt(wkt))
            layer.CreateFeature(feature)
        ds = None
        rows = self.extracted_without_dates(shapes)
        self.assertEqual([r["L7_ETMs.b1"] for r in rows], [nearest["L7_ETMs.b1"]] * 2)
        with open(shapes, "w") as f:
            f.write('{"type": "FeatureCollection", "features": ['
                    '{"type": "Feature", "properties": {"id": "s0"}, "geometry": {"type": "Point", "coordinates": [%.10f, %.10f]}}, '
                    '{"type": "Feature", "properties": {"id": "s1"}, "geometry": {"type": "LineString", '
                    '"coordinates": [[%.10f, %.10f], [0, 0]]}}]}' % (lon, lat, lon, lat))
        done = kt.run_kalends(["extract", self.raster, "--points", shapes, "--out", os.path.join(self.tmp, "lines.csv"),
                               "--date-column", ""])
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn("shapes.geojson feature 2: a LINESTRING, not a point", done.stderr)
        # A Shapefile without its .prj: the CRS taken is said.
        bare = os.path.join(self.tmp, "bare.shp")
        ds = ogr.GetDriverByName("ESRI Shapefile").CreateDataSource(bare)
        layer = ds.CreateLayer("bare", None, ogr.wkbPoint)
        layer.CreateField(ogr.FieldDefn("id", ogr.OFTString))
        feature = ogr.Feature(layer.GetLayerDefn())
        feature.SetField("id", "b1")
        feature.SetGeometry(ogr.CreateGeometryFromWkt("POINT (%.10f %.10f)" % (lon, lat)))
        layer.CreateFeature(feature)
        ds = None
        done = kt.run_kalends(["extract", self.raster, "--points", bare, "--out", os.path.join(self.tmp, "bare.csv"),
                               "--date-column", ""])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("bare.shp: states no CRS", done.stderr)
        self.assertIn("taken as EPSG:4326", done.stderr)

    def test_a_layer_without_a_crs_is_named_as_such(self):
        # It had been "has no georeferencing (geotransform and CRS)" for a file with a
        # geotransform. Invented data.
        layer = os.path.join(self.tmp, "no-crs", "elevation.tif")
        os.makedirs(os.path.dirname(layer))
        kt.write_raster(layer, np.ones((5, 5), np.float32), geotransform=(500000.0, 30.0, 0, 9000000.0, 0, -30.0))
        done = kt.run_kalends(["extract", layer, "--points", self.csv, "--out", os.path.join(self.tmp, "no-crs.csv"),
                               "--id-column", "site", "--x-column", "lon", "--y-column", "lat", "--date-column", ""])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("elevation.tif: states no CRS; points cannot be placed on it", done.stderr)

    def test_ids_in_a_legacy_encoding_are_read_as_latin_1_and_said(self):
        # A spreadsheet saved as Latin-1: its raw bytes had gone into the UTF-8 table unsaid.
        points = os.path.join(self.tmp, "latin1.csv")
        _, lon, lat = self.points[0]
        with open(points, "wb") as f:
            f.write(b"site,lon,lat\n" + ("Sant\xe9 Orvane,%.10f,%.10f\n" % (lon, lat)).encode("latin-1"))
        out = os.path.join(self.tmp, "latin1-table.csv")
        done = kt.run_kalends(["extract", self.raster, "--points", points, "--id-column", "site", "--x-column", "lon",
                               "--y-column", "lat", "--date-column", "", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("1 id is not UTF-8 text (first at ", done.stderr)
        with open(out, encoding="utf-8") as f:
            self.assertIn("Sant\u00e9 Orvane", f.read())

    def test_a_quote_inside_an_unquoted_field_is_refused_and_a_quoted_one_read(self):
        # An inch mark in `well 3" deep` had opened a quote that ran on to the next one, rows
        # later: the rows between were joined into one id, which took the last one's value, exit
        # 0. RFC 4180, section 2: a quote belongs at the start of a quoted field, doubled inside it.
        (_, lon1, lat1), (_, lon2, lat2), (_, lon3, lat3) = self.points[:3]
        stray = os.path.join(self.tmp, "stray.csv")
        with open(stray, "w") as f:
            f.write('site,lon,lat\nwell 3" deep,%.10f,%.10f\nq2,%.10f,%.10f\nwell 5" deep,%.10f,%.10f\n'
                    % (lon1, lat1, lon2, lat2, lon3, lat3))
        out = os.path.join(self.tmp, "stray-table.csv")
        done = self.extract_site_table(stray, out)
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn('stray.csv:2: has a quote (") inside a field that does not start with one', done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1)
        self.assertFalse(os.path.exists(out))
        # Text after a closing quote is the same mistake.
        with open(stray, "w") as f:
            f.write('site,lon,lat\n"well" 3,%.10f,%.10f\n' % (lon1, lat1))
        done = self.extract_site_table(stray, out)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("stray.csv:2: has a quote", done.stderr)
        # Quoted as RFC 4180 says, the three rows are read, each at its own pixel (Python's csv
        # module reads the same ids).
        quoted = os.path.join(self.tmp, "quoted.csv")
        with open(quoted, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["site", "lon", "lat"])
            for pid, (_, lon, lat) in zip(['well 3" deep', "q2", 'well 5" deep'], self.points[:3]):
                w.writerow([pid, "%.10f" % lon, "%.10f" % lat])
        done = self.extract_site_table(quoted, out, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = kt.read_table(out)
        self.assertEqual([r["site"] for r in rows], ['well 3" deep', "q2", 'well 5" deep'])
        for row, (_, lon, lat) in zip(rows, self.points[:3]):
            _, _, c, r = self.pixel(lon, lat)
            self.assertEqual(float(row["L7_ETMs.b1"]), self.bands[0, int(np.floor(r)), int(np.floor(c))])

    def test_tables_without_geometries_read_their_coordinate_columns(self):
        # A workbook, a GeoPackage's attribute table, a .dbf alone: every point had been "no
        # coordinates", exit 0, with a note blaming a missing .prj.
        from osgeo import ogr
        ogr.UseExceptions()
        chosen = self.points[:5]
        for driver, name in (("XLSX", "sites.xlsx"), ("GPKG", "sites.gpkg"), ("ESRI Shapefile", "sites.dbf")):
            path = os.path.join(self.tmp, name)
            ds = ogr.GetDriverByName(driver).CreateDataSource(path)
            layer = ds.CreateLayer("sites", geom_type=ogr.wkbNone)
            for field, kind in (("site", ogr.OFTString), ("lon", ogr.OFTReal), ("lat", ogr.OFTReal)):
                layer.CreateField(ogr.FieldDefn(field, kind))
            for pid, lon, lat in chosen:
                feature = ogr.Feature(layer.GetLayerDefn())
                feature.SetField("site", pid)
                feature.SetField("lon", lon)
                feature.SetField("lat", lat)
                layer.CreateFeature(feature)
                feature = None
            layer = ds = None
            out = os.path.join(self.tmp, name + "-table.csv")
            done = self.extract_site_table(path, out)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertNotIn("states no CRS", done.stderr)
            rows = kt.read_table(out)
            self.assertEqual([r["site"] for r in rows], [p[0] for p in chosen], name)
            checked = 0
            for row, (pid, lon, lat) in zip(rows, chosen):
                _, _, c, r = self.pixel(lon, lat)
                if not self.inside(c, r):
                    self.assertEqual(row["L7_ETMs.b4.reason"], "outside the layer")
                    continue
                self.assertEqual(float(row["L7_ETMs.b4"]), self.bands[3, int(np.floor(r)), int(np.floor(c))], name)
                checked += 1
            self.assertGreaterEqual(checked, 4, name)

    def test_a_column_named_as_written_wins_over_one_differing_in_case(self):
        (_, lon, lat) = self.points[0]
        two = os.path.join(self.tmp, "two-ids.csv")
        with open(two, "w") as f:
            f.write("site,SITE,lon,lat\nlower,UPPER,%.10f,%.10f\n" % (lon, lat))
        out = os.path.join(self.tmp, "two-ids-table.csv")
        for column, expected in (("site", "lower"), ("SITE", "UPPER")):
            done = kt.run_kalends(["-q", "extract", self.raster, "--points", two, "--out", out, "--id-column", column,
                                   "--x-column", "lon", "--y-column", "lat", "--date-column", ""])
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertEqual(kt.read_table(out)[0][column], expected)
        # Neither written as given: which is meant cannot be told.
        done = kt.run_kalends(["extract", self.raster, "--points", two, "--out", out, "--id-column", "Site",
                               "--x-column", "lon", "--y-column", "lat", "--date-column", ""])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("has columns 'site' and 'SITE' (columns 1 and 2), neither written as 'Site' (--id-column)",
                      done.stderr)

    def test_spreadsheet_exports_get_a_hint(self):
        (_, lon, lat) = self.points[0]
        cases = {
            # A locale that writes decimal commas, in a semicolon table.
            "decimal.csv": ("site;lon;lat\np1;%s;%s\n" % (("%.6f" % lon).replace(".", ","),
                                                         ("%.6f" % lat).replace(".", ",")),
                            "is not a coordinate (a decimal comma? write %.6f)" % lon),
            # Excel's first line naming the separator.
            "sep.csv": ("sep=,\nsite,lon,lat\np1,%.6f,%.6f\n" % (lon, lat),
                        "sep.csv:1: starts with a spreadsheet's \"sep=\" line; remove that line"),
        }
        for name, (text, message) in cases.items():
            path = os.path.join(self.tmp, name)
            with open(path, "w") as f:
                f.write(text)
            done = self.extract_site_table(path, os.path.join(self.tmp, "hint-table.csv"))
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn(message, done.stderr)
        utf16 = os.path.join(self.tmp, "unicode.csv")
        with open(utf16, "wb") as f:
            f.write(("site,lon,lat\np1,%.6f,%.6f\n" % (lon, lat)).encode("utf-16"))
        done = self.extract_site_table(utf16, os.path.join(self.tmp, "hint-table.csv"))
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("unicode.csv: is UTF-16 text", done.stderr)
        # A NUL byte (found by fuzzing): GDAL's reader ended the field there and dropped the
        # row's coordinates, and the point came out "no coordinates", exit 0.
        damaged = os.path.join(self.tmp, "damaged.csv")
        with open(damaged, "wb") as f:
            f.write(("site,lon,lat\np1,%.6f,%.6f\np2\0,%.6f,%.6f\n" % (lon, lat, lon, lat)).encode())
        table = os.path.join(self.tmp, "damaged-table.csv")
        done = self.extract_site_table(damaged, table)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("damaged.csv:3: holds a NUL byte", done.stderr)
        self.assertFalse(os.path.exists(table))

    def test_a_survey_wholly_outside_the_grid_and_a_second_layer_are_said(self):
        # Longitudes and latitudes swapped: every value empty, exit 0, and nothing said.
        swapped = os.path.join(self.tmp, "swapped.csv")
        with open(swapped, "w") as f:
            f.write("site,lon,lat\n")
            for pid, lon, lat in self.points[:10]:
                f.write("%s,%.10f,%.10f\n" % (pid, lat, lon))
        done = self.extract_site_table(swapped, os.path.join(self.tmp, "swapped-table.csv"))
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("none of the 10 located points of", done.stderr)
        self.assertIn("(lon and lat swapped, or coordinates of another CRS than --crs EPSG:4326?)", done.stderr)
        # The original table says nothing of the kind.
        done = self.extract_site_table(self.csv, os.path.join(self.tmp, "plain-table.csv"))
        self.assertNotIn("falls inside", done.stderr)
        # A GeoPackage of two survey rounds: the second had been left out unsaid.
        from osgeo import ogr, osr
        ogr.UseExceptions()
        path = os.path.join(self.tmp, "rounds.gpkg")
        ds = ogr.GetDriverByName("GPKG").CreateDataSource(path)
        wgs84 = osr.SpatialReference()
        wgs84.ImportFromEPSG(4326)
        for name in ("first_round", "second_round"):
            layer = ds.CreateLayer(name, wgs84, ogr.wkbPoint)
            layer.CreateField(ogr.FieldDefn("id", ogr.OFTString))
            feature = ogr.Feature(layer.GetLayerDefn())
            feature.SetField("id", name)
            feature.SetGeometry(ogr.CreateGeometryFromWkt("POINT (%.10f %.10f)" % (self.points[0][1], self.points[0][2])))
            layer.CreateFeature(feature)
            feature = layer = None
        ds = None
        done = kt.run_kalends(["extract", self.raster, "--points", path, "--out", os.path.join(self.tmp, "rounds.csv"),
                               "--date-column", ""])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("rounds.gpkg: holds 2 layers; the points were read from the first, 'first_round', not from "
                      "'second_round'", done.stderr)

    def test_bad_lists_name_the_option_and_the_item(self):
        out = os.path.join(self.tmp, "lists.csv")
        base = ["extract", self.raster, "--points", self.csv, "--out", out, "--id-column", "site",
                "--x-column", "lon", "--y-column", "lat", "--date-column", ""]
        for extra, expected in ((["--lags", "1,,2"], "--lags '1,,2': an empty item"),
                                (["--lags", "1.5"], "--lags '1.5': expected a whole number"),
                                (["--lags", "0"], "--lags"),
                                (["--layers", "b1,"], "--layers 'b1,': an empty item"),
                                (["--buffer", "nan"], "--buffer: the radius must be a positive, finite number"),
                                # inf had given every point an empty buffer mean, with no reason.
                                (["--buffer", "inf"], "--buffer: the radius must be a positive, finite number"),
                                # PROJ alone reads this as EPSG:4326: a slip would go unseen.
                                (["--crs", "EPSG:4326x"], "--crs 'EPSG:4326x': not a CRS PROJ knows"),
                                (["--out", self.tmp], "is a folder; give a file name, e.g. table.csv"),
                                # An empty name had run, written nothing and exited 0.
                                (["--out", ""], "--out: needs a file name, e.g. table.csv")):
            command = base + extra
            if extra[0] == "--out":  # the folder replaces the table's name
                command = [a for i, a in enumerate(base) if a != "--out" and (i == 0 or base[i - 1] != "--out")] + extra
            done = kt.run_kalends(command)
            self.assertEqual(done.returncode, 2, extra)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn(expected, done.stderr)
            self.assertFalse(os.path.exists(out))



class BufferOnASinusoidalGrid(kt.TempDirTestCase):
    def test_the_buffer_is_a_circle_on_the_ground(self):
        # An invented 80 x 80 raster on the MODIS sinusoidal grid (463.3127 m cells, sphere of
        # 6 371 007.181 m, as MODIS tiles are defined; from memory) around 150 W, 65 N, where a
        # grid step north also moves 2.4 steps east on the ground: the grid's 2 km circle had
        # held 58 cells of which 26 lie within 2 km.
        g = kt.gdal()
        from osgeo import osr
        sinusoidal = osr.SpatialReference()
        sinusoidal.ImportFromProj4("+proj=sinu +lon_0=0 +x_0=0 +y_0=0 +R=6371007.181 +units=m +no_defs")
        sinusoidal.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
        geographic = sinusoidal.CloneGeogCS()
        geographic.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
        x0, y0, _ = osr.CoordinateTransformation(geographic, sinusoidal).TransformPoint(-150.0, 65.0)
        size = 463.3127
        gt = (x0 - 40 * size, size, 0, y0 + 40 * size, 0, -size)
        values = np.random.default_rng(65).random((80, 80)).astype(np.float32)
        raster = os.path.join(self.tmp, "sinusoidal.tif")
        ds = g.GetDriverByName("GTiff").Create(raster, 80, 80, 1, g.GDT_Float32)
        ds.SetGeoTransform(gt)
        ds.SetProjection(sinusoidal.ExportToWkt())
        ds.GetRasterBand(1).WriteArray(values)
        ds = None
        points = os.path.join(self.tmp, "points.csv")
        sites = [("a", -150.0, 65.0), ("b", -150.013, 65.004), ("c", -149.98, 64.995)]
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\n" + "".join("%s,%r,%r,\n" % s for s in sites))
        out = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["-q", "extract", raster, "--points", points, "--out", out, "--buffer", "2000"])
        self.assertEqual(done.returncode, 0, done.stderr)
        to_layer = osr.CoordinateTransformation(geographic, sinusoidal)
        for row, (pid, lon, lat) in zip(kt.read_table(out), sites):
            x, y, _ = to_layer.TransformPoint(lon, lat)
            distance, (cx, cy) = ground_distances(sinusoidal.ExportToWkt(), gt, values.shape, x, y)
            within = distance <= 2000
            grid_circle = np.hypot(cx - x, cy - y) <= 2000
            self.assertGreater(int((within != grid_circle).sum()), 20, pid)   # the premise: they differ
            self.assertEqual(int(row["sinusoidal.buffer_cells"]), int(within.sum()), pid)
            self.assertAlmostEqual(float(row["sinusoidal.buffer_mean"]), float(values[within].astype(np.float64).mean()),
                                   delta=1e-6, msg=pid)


class BufferRoundTheGlobe(kt.TempDirTestCase):
    def test_the_buffer_crosses_the_seam_and_the_pole(self):
        # Invented global 0.5 degree grids, -180..180 and 0..360: a buffer beside the seam had
        # held only its own side (22 cells of 37 at 179.95 E), and one over a pole only the
        # longitudes of its box. Reference: Vincenty's distance on WGS 84 to every cell centre,
        # numpy.
        values = np.random.default_rng(180).random((360, 720)).astype(np.float32)
        lat = 89.75 - 0.5 * np.arange(360)
        cases = [((-180.0, 0.5, 0, 90.0, 0, -0.5), [(179.95, 10.0, 100e3), (-179.95, 10.0, 100e3),
                                                     (-179.9, -40.0, 100e3), (-170.0, -89.9, 20e3)]),
                 ((0.0, 0.5, 0, 90.0, 0, -0.5), [(0.05, 20.0, 50e3), (359.95, 20.0, 50e3)]),
                 # A regional grid ending at 180 E, a point just across it (it had found none).
                 ((160.0, 0.5, 0, 90.0, 0, -0.5), [(-179.95, 50.0, 50e3), (180.05, 50.0, 50e3)])]
        for k, (gt, points) in enumerate(cases):
            raster = os.path.join(self.tmp, "globe%d.tif" % k)
            columns = 40 if gt[0] == 160.0 else 720
            kt.write_raster(raster, values[:, :columns].copy(), geotransform=gt, epsg=4326)
            lon = gt[0] + 0.25 + 0.5 * np.arange(columns)
            for x, y, radius in points:
                csv_path = os.path.join(self.tmp, "p.csv")
                with open(csv_path, "w") as f:
                    f.write("id,longitude,latitude,date\np,%r,%r,\n" % (x, y))
                out = os.path.join(self.tmp, "t.csv")
                done = kt.run_kalends(["-q", "extract", raster, "--points", csv_path, "--out", out,
                                       "--buffer", str(radius)])
                self.assertEqual(done.returncode, 0, done.stderr)
                row = kt.read_table(out)[0]
                lon_grid, lat_grid = np.meshgrid(lon, lat)
                within = vincenty_m(x, y, lon_grid, lat_grid) <= radius   # EPSG:4326: WGS 84
                column = "globe%d" % k
                self.assertEqual(int(row[column + ".buffer_cells"]), int(within.sum()), (x, y))
                self.assertGreater(int(within.sum()), 0, (x, y))
                self.assertAlmostEqual(float(row[column + ".buffer_mean"]),
                                       float(values[:, :columns][within].astype(np.float64).mean()), delta=1e-6,
                                       msg=(x, y))


class PointsOnEdgesAndCentres(kt.TempDirTestCase):
    def test_every_edge_goes_east_or_south_and_a_centre_needs_its_own_cells(self):
        # A 0.01 x 0.005 degree grid from -148, 65 (invented), each cell holding column * 1000 +
        # row. Survey coordinates rounded to the grid's step lie on edges; the inverse
        # geotransform puts some a few 1e-12 px to the west or north, so 16 of 100 west edges
        # had read the cell to the west. The rule (docs/extract.md): a cell holds its west and
        # north edges. The expected cells come from exact decimal arithmetic (fractions), not
        # from kalends.
        from fractions import Fraction
        cols, rows = 100, 60
        values = (np.arange(cols)[None, :] * 1000 + np.arange(rows)[:, None]).astype(np.float32)
        missing = values.copy()
        missing[0, 52] = np.nan  # north of the centre of (52, 1)
        layer = os.path.join(self.tmp, "cells", "index.tif")
        os.makedirs(os.path.dirname(layer))
        kt.write_raster(layer, missing, geotransform=(-148.0, 0.01, 0, 65.0, 0, -0.005), epsg=4326, nodata=float("nan"))
        points = os.path.join(self.tmp, "edges.csv")
        expected = {}
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\n")
            for c in range(1, cols):
                lon = "%.2f" % (-148 + c * 0.01)
                f.write("w%d,%s,64.7525,2021-06-01\n" % (c, lon))  # mid-row of row 49
                column = int((Fraction(lon) + 148) / Fraction("0.01"))
                expected["w%d" % c] = column * 1000 + 49
            for r in range(1, rows):
                lat = "%.3f" % (65 - r * 0.005)
                f.write("n%d,-147.455,%s,2021-06-01\n" % (r, lat))  # mid-column of column 54
                row = int((65 - Fraction(lat)) / Fraction("0.005"))
                expected["n%d" % r] = 54 * 1000 + row
            f.write("centre,-147.475,64.9925,2021-06-01\n")
        out = os.path.join(self.tmp, "nearest.csv")
        done = kt.run_kalends(["extract", layer, "--points", points, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        got = {row["id"]: row for row in kt.read_table(out)}
        wrong = [k for k, v in expected.items() if got[k]["index"] == "" or float(got[k]["index"]) != v]
        self.assertEqual(wrong, [], [(k, got[k]["index"], expected[k]) for k in wrong[:5]])
        # Bilinear at a cell centre needs only that cell (weights 1, 0, 0, 0): the missing cell
        # to the north takes no part (it had a weight of about 1e-12, and the value was dropped).
        out = os.path.join(self.tmp, "bilinear.csv")
        done = kt.run_kalends(["extract", layer, "--points", points, "--out", out, "--sampling", "bilinear"])
        self.assertEqual(done.returncode, 0, done.stderr)
        got = {row["id"]: row for row in kt.read_table(out)}
        self.assertEqual(got["centre"]["index.reason"], "")
        self.assertEqual(float(got["centre"]["index"]), 52001.0)

class SummersOnly(kt.TempDirTestCase):
    def test_an_empty_cell_says_nodata(self):
        # A point on a cell without a value, and one beside it on a cell with one (invented
        # layer, mechanics only). The reason had been lost when the season's reason was added.
        folder = os.path.join(self.tmp, "fixed")
        os.makedirs(folder)
        values = np.full((4, 5), 0.5, np.float32)
        values[1, 1] = np.nan
        kt.write_raster(os.path.join(folder, "cover.tif"), values, geotransform=(400000, 250, 0, 7200000, 0, -250),
                        epsg=32606, nodata=float("nan"))
        points = os.path.join(self.tmp, "cells.csv")
        with open(points, "w") as f:
            f.write("id,x,y\nempty,400375,7199625\nfull,400625,7199625\n")
        out = os.path.join(self.tmp, "cells_table.csv")
        done = kt.run_kalends(["-q", "extract", folder, "--points", points, "--crs", "EPSG:32606", "--x-column", "x",
                               "--y-column", "y", "--date-column", "", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = {r["id"]: r for r in kt.read_table(out)}
        self.assertEqual((rows["empty"]["cover"], rows["empty"]["cover.reason"]), ("", "nodata"))
        self.assertEqual((rows["full"]["cover"], rows["full"]["cover.reason"]), ("0.5", ""))

    def test_a_month_outside_the_season_says_so(self):
        # Invented summers (8 composites of 16 days from day 145, as the Alaska stack has) of
        # 2031 and 2032 on a small UTM grid: the calendar months of the winter between them have
        # no composite of any year, so their values are empty by design, not "nodata".
        import datetime as dt
        stack = os.path.join(self.tmp, "stack")
        os.makedirs(stack)
        for year in (2031, 2032):
            for k in range(8):
                day = dt.date(year, 1, 1) + dt.timedelta(days=144 + 16 * k)
                kt.write_raster(os.path.join(stack, "ndvi_%s.tif" % day.isoformat()),
                                np.full((4, 5), 0.4 + 0.02 * k, np.float32), geotransform=(400000, 250, 0, 7200000, 0, -250),
                                epsg=32606)
        job = os.path.join(self.tmp, "job")
        done = kt.run_kalends(["-q", "fill", os.path.join(stack, "*.tif"), "--out", os.path.join(job, "fill"),
                               "--every", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,x,y,date\nwinter,400600,7199400,2032-01-15\nsummer,400600,7199400,2031-07-15\n"
                    "undated,400600,7199400,NA\nmay,400600,7199400,2031-05-28\n")
        out = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["-q", "extract", job, "--points", points, "--crs", "EPSG:32606", "--x-column", "x",
                               "--y-column", "y", "--layers", "fill.calendar-1M.ndvi", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        # May rests on the days from the first composite's (its start, 25 May) to the month's
        # end: a mean of a week, not of the month, which a note says (it had said nothing). July
        # is covered whole and is not counted.
        first = dt.date(2031, 1, 1) + dt.timedelta(days=144)
        self.assertIn("fill.calendar-1M.ndvi: 1 value read from calendar periods that the composites cover only in "
                      "part (first: 2031-05-01: %d of 31 days)" % (31 - first.day + 1), done.stderr)
        rows = {r["id"]: r for r in kt.read_table(out)}
        self.assertEqual(rows["winter"]["fill.calendar-1M.ndvi"], "")
        self.assertTrue(rows["winter"]["fill.calendar-1M.ndvi.reason"].startswith("outside the stack's season"),
                        rows["winter"])
        self.assertNotEqual(rows["summer"]["fill.calendar-1M.ndvi"], "")
        self.assertEqual(rows["summer"]["fill.calendar-1M.ndvi.reason"], "")
        self.assertEqual(rows["undated"]["fill.calendar-1M.ndvi.reason"], "no survey date")


class CalendarLagsAfterTheLastPeriod(kt.TempDirTestCase):
    def test_lags_of_a_survey_after_the_last_month_read_the_months_written(self):
        # A survey in the month after a monthly calendar's last one: its own month is not
        # written yet, but lag 1 is the last month, as a year layer's lag 1 reads it. It had
        # been "survey date after the layers" at every lag. Invented 16-day composites of 2031
        # (mechanics only); the expected values are read from the calendar files with GDAL.
        import datetime as dt
        stack = os.path.join(self.tmp, "stack")
        os.makedirs(stack)
        rng = np.random.default_rng(2)
        for k in range(23):
            day = dt.date(2031, 1, 1) + dt.timedelta(days=16 * k)
            kt.write_raster(os.path.join(stack, "ndvi_%s.tif" % day.isoformat()),
                            rng.uniform(0.2, 0.7, (4, 5)).astype(np.float32),
                            geotransform=(400000, 250, 0, 7200000, 0, -250), epsg=32606)
        job = os.path.join(self.tmp, "job")
        done = kt.run_kalends(["-q", "fill", os.path.join(stack, "*.tif"), "--out", os.path.join(job, "fill"),
                               "--every", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        months = sorted(os.listdir(os.path.join(job, "fill", "calendar-1M")))
        last = months[-1]  # the calendar's last month, from its file name
        self.assertTrue(last.startswith("ndvi_2031-12"), months)
        g = kt.gdal()

        def mean_of(name):
            ds = g.Open(os.path.join(job, "fill", "calendar-1M", name))
            return float(ds.GetRasterBand(1).ReadAsArray()[1, 2])  # the point's cell: row 1, column 2
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,x,y,date\njanuary,400600,7199650,2032-01-20\nfebruary,400600,7199650,2032-02-10\n")
        out = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["-q", "extract", job, "--points", points, "--crs", "EPSG:32606", "--x-column", "x",
                               "--y-column", "y", "--layers", "fill.calendar-1M.ndvi", "--lags", "1,2",
                               "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = {r["id"]: r for r in kt.read_table(out)}
        name = "fill.calendar-1M.ndvi"
        for row in rows.values():
            self.assertEqual(row[name], "")
            self.assertTrue(row[name + ".reason"].startswith("survey date after the layers"), row)
        self.assertAlmostEqual(float(rows["january"][name + ".lag1"]), mean_of(months[-1]), places=6)
        self.assertAlmostEqual(float(rows["january"][name + ".lag2"]), mean_of(months[-2]), places=6)
        self.assertEqual(rows["february"][name + ".lag1"], "")
        self.assertTrue(rows["february"][name + ".lag1.reason"].startswith("survey date after the layers"))
        self.assertAlmostEqual(float(rows["february"][name + ".lag2"]), mean_of(months[-1]), places=6)


class RawStacks(kt.TempDirTestCase):
    """Stacks that kalends did not write, read at survey dates as `kalends fill` reads them.

    Data: ../shared/data/monthly-temperature/bcsd_obs_1999.nc, the gridded observations of Maurer
    et al. (2002), J. Climate 15:3237-3251: 12 monthly means of 1999 whose CF time axis (days since
    1950-01-01) stamps each month on its last day. The expected values are read here with Python
    GDAL and numpy: the band whose date is the last one on or before the survey day (dates as
    starts), or the first one on or after it (--date-marks end), at the cell holding the point
    (gdal.InvGeoTransform), nodata (1e20) as missing.
    """

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        import datetime as dt
        g = kt.gdal()
        cls.nc = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        cls.tas = 'NETCDF:"%s":tas' % cls.nc
        ds = g.Open(cls.tas)
        cls.cube = {}
        for variable in ("tas", "pr"):
            v = g.Open('NETCDF:"%s":%s' % (cls.nc, variable))
            band = v.GetRasterBand(1)
            cube = v.ReadAsArray().astype(np.float64)
            cube[cube == band.GetNoDataValue()] = np.nan
            cls.cube[variable] = cube
        days = ds.GetMetadataItem("NETCDF_DIM_time_VALUES").strip("{}").split(",")
        cls.dates = [dt.date(1950, 1, 1) + dt.timedelta(days=int(float(d))) for d in days]
        cls.inv = g.InvGeoTransform(ds.GetGeoTransform())
        sea = np.argwhere(np.isnan(cls.cube["tas"][5]))[0]
        gt = ds.GetGeoTransform()
        sea_lon, sea_lat = gt[0] + (sea[1] + 0.5) * gt[1], gt[3] + (sea[0] + 0.5) * gt[5]
        cls.points = os.path.join(cls.tmp, "surveys.csv")
        with open(cls.points, "w") as f:
            f.write("id,longitude,latitude,date\n")
            f.write("a,-80.0,35.0,1999-06-15\nb,-78.3,36.1,1999-03-02\nc,-83.2,33.9,1999-11-20\n")
            f.write("sea,%.4f,%.4f,1999-06-15\nearly,-80.0,35.0,1999-01-10\n" % (sea_lon, sea_lat))

    def expected(self, variable, row, marks, lag=0):
        import datetime as dt
        day = dt.date.fromisoformat(row["date"])
        if marks == "start":
            index = max([i for i, d in enumerate(self.dates) if d <= day], default=None)
        else:
            index = min([i for i, d in enumerate(self.dates) if d >= day], default=None)
        if index is None or index - lag < 0:
            return None, None
        lon, lat = float(row["longitude"]), float(row["latitude"])
        c = int(np.floor(self.inv[0] + lon * self.inv[1] + lat * self.inv[2]))
        r = int(np.floor(self.inv[3] + lon * self.inv[4] + lat * self.inv[5]))
        return self.cube[variable][index - lag, r, c], self.dates[index - lag].isoformat()

    def check(self, table, column, variable, marks, lag=0):
        for row in table:
            want, date = self.expected(variable, row, marks, lag)
            got = row[column]
            if want is None:
                self.assertEqual(got, "", row)
                self.assertNotEqual(row[column + ".reason"], "", row)
            elif np.isnan(want):
                self.assertEqual((got, row[column + ".reason"]), ("", "nodata"), row)
            else:
                self.assertEqual(row[column + ".matched"], date, row)
                self.assertAlmostEqual(float(got), want, places=4, msg=row)

    def test_a_netcdf_variable_is_read_at_the_survey_dates(self):
        # It had been refused as "no such file or folder"; a folder's fill of it was the only way.
        out = os.path.join(self.tmp, "tas.csv")
        done = kt.run_kalends(["extract", self.tas, "--points", self.points, "--out", out, "--lags", "1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        # Month-end stamps are read as the ends of their months by default (version 0.3.19).
        self.assertIn("the input dates are the last days of their months: read as month ends", done.stderr)
        table = kt.read_table(out)
        self.check(table, "tas", "tas", "end")
        self.check(table, "tas.lag1", "tas", "end", lag=1)
        out = os.path.join(self.tmp, "tas-start.csv")
        done = kt.run_kalends(["-q", "extract", self.tas, "--points", self.points, "--out", out, "--lags", "1",
                               "--date-marks", "start"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.check(kt.read_table(out), "tas", "tas", "start")
        self.check(kt.read_table(out), "tas.lag1", "tas", "start", lag=1)
        out = os.path.join(self.tmp, "tas-end.csv")
        done = kt.run_kalends(["-q", "extract", self.tas, "--points", self.points, "--out", out,
                               "--date-marks", "end"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.check(kt.read_table(out), "tas", "tas", "end")

    def test_a_file_of_several_variables_gives_a_series_each(self):
        # It had been refused as "has no raster band".
        out = os.path.join(self.tmp, "both.csv")
        done = kt.run_kalends(["-q", "extract", self.nc, "--points", self.points, "--out", out,
                               "--date-marks", "end"])
        self.assertEqual(done.returncode, 0, done.stderr)
        table = kt.read_table(out)
        self.check(table, "bcsd_obs_1999.tas", "tas", "end")
        self.check(table, "bcsd_obs_1999.pr", "pr", "end")

    def test_a_pattern_of_dated_files_is_one_series(self):
        # Invented int16 composites of a fictional district (mechanics): a scale factor in the
        # band metadata, nodata -3000, dates in the names. Each file had been a fixed layer.
        import datetime as dt
        folder = os.path.join(self.tmp, "raw")
        os.makedirs(folder)
        rng = np.random.default_rng(7)
        cube = {}
        for k in range(6):
            day = dt.date(2031, 1, 1) + dt.timedelta(days=16 * k)
            raw = rng.integers(-2000, 9000, size=(5, 6)).astype(np.int16)
            raw[2, 3] = -3000
            cube[day] = raw
            kt.write_raster(os.path.join(folder, "evi_%s.tif" % day.isoformat()), raw,
                            geotransform=(500000, 250, 0, 9100000, 0, -250), epsg=32736, scale=0.0001,
                            nodata=-3000)
        points = os.path.join(self.tmp, "plots.csv")
        with open(points, "w") as f:
            f.write("id,x,y,date\nq,500875,9099625,2031-02-10\nhole,500875,9099375,2031-02-10\n")
        out = os.path.join(self.tmp, "evi.csv")
        done = kt.run_kalends(["-q", "extract", os.path.join(folder, "evi_*.tif"), "--points", points,
                               "--crs", "EPSG:32736", "--x-column", "x", "--y-column", "y", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = {r["id"]: r for r in kt.read_table(out)}
        # 2031-02-10 lies in the composite of 2031-02-02 (day 33, 16 days).
        self.assertEqual(rows["q"]["evi.matched"], "2031-02-02")
        self.assertAlmostEqual(float(rows["q"]["evi"]), cube[dt.date(2031, 2, 2)][1, 3] * 0.0001, places=6)
        self.assertEqual((rows["hole"]["evi"], rows["hole"]["evi.reason"]), ("", "nodata"))


def write_cf(path, times, units, calendar="standard", variables=("tas",), bounds=False, nx=5, ny=4):
    """A small CF NetCDF (invented values of a fictional district) by GDAL's multidimensional API:
    time, lat, lon axes, one float32 variable per name holding 10 * band + row, and optionally a
    time_bnds variable as CF section 7.1 has it (from memory)."""
    g = kt.gdal()
    ds = g.GetDriverByName("netCDF").CreateMultiDimensional(path)
    root = ds.GetRootGroup()
    text = g.ExtendedDataType.CreateString()
    f64 = g.ExtendedDataType.Create(g.GDT_Float64)
    t_dim = root.CreateDimension("time", "TEMPORAL", None, len(times))
    y_dim = root.CreateDimension("lat", "HORIZONTAL_Y", None, ny)
    x_dim = root.CreateDimension("lon", "HORIZONTAL_X", None, nx)
    t = root.CreateMDArray("time", [t_dim], f64)
    t.Write(np.array(times, "f8"))
    for key, value in (("units", units), ("calendar", calendar), ("axis", "T"), ("standard_name", "time")):
        t.CreateAttribute(key, [], text).Write(value)
    y = root.CreateMDArray("lat", [y_dim], f64)
    y.Write(np.array([10.0 - 0.1 * i for i in range(ny)]))
    y.CreateAttribute("units", [], text).Write("degrees_north")
    x = root.CreateMDArray("lon", [x_dim], f64)
    x.Write(np.array([20.0 + 0.1 * i for i in range(nx)]))
    x.CreateAttribute("units", [], text).Write("degrees_east")
    if bounds:
        t.CreateAttribute("bounds", [], text).Write("time_bnds")
        nv = root.CreateDimension("nv", None, None, 2)
        b = root.CreateMDArray("time_bnds", [t_dim, nv], f64)
        b.Write(np.array([[v - 0.5, v + 0.5] for v in times], "f8"))
    for name in variables:
        v = root.CreateMDArray(name, [t_dim, y_dim, x_dim], g.ExtendedDataType.Create(g.GDT_Float32))
        v.Write(np.array([[[10.0 * k + r for _ in range(nx)] for r in range(ny)] for k in range(len(times))], "f4"))
    ds = None


class PointsTheLayerHolds(kt.TempDirTestCase):
    """Points a layer holds however its grid or the table is written. Real values: June of the
    Maurer 1999 monthly NetCDF (tas, 0.125 degree cells; see ../shared/data/README.md)."""

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        g = kt.gdal()
        ds = g.Open('NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc"))
        cls.gt = ds.GetGeoTransform()
        cls.tas = ds.GetRasterBand(6).ReadAsArray().astype(np.float32)
        ds = None
        cls.tas[cls.tas > 1e19] = np.nan
        rows = cls.tas.shape[0]
        # North-up as GDAL reads the file, and the same cells stored south-up (rows reversed,
        # positive pixel height from the southern edge).
        cls.north_up = os.path.join(cls.tmp, "north_up.tif")
        kt.write_raster(cls.north_up, cls.tas, geotransform=cls.gt, epsg=4326)
        cls.south_up = os.path.join(cls.tmp, "south_up.tif")
        gt = cls.gt
        kt.write_raster(cls.south_up, cls.tas[::-1].copy(),
                        geotransform=(gt[0], gt[1], 0, gt[3] + rows * gt[5], 0, -gt[5]), epsg=4326)

    def extract(self, raster, rows, *extra, header="id,longitude,latitude,date"):
        points = os.path.join(self.tmp, "points-%d.csv" % len(os.listdir(self.tmp)))
        with open(points, "w") as f:
            f.write(header + "\n" + "".join(r + "\n" for r in rows))
        out = points.replace(".csv", "-table.csv")
        return kt.run_kalends(["-q", "extract", raster, "--points", points, "--out", out] + list(extra)), out

    def test_a_south_up_grid_gives_each_edge_to_the_cell_north_of_it_too(self):
        # docs/extract.md: a cell holds its west and north edges. On the south-up copy every
        # point on a row edge had read the cell one row further north.
        rows = []
        for r in range(1, self.tas.shape[0], 3):
            for c in range(0, self.tas.shape[1], 7):
                lon = self.gt[0] + (c + 0.5) * self.gt[1]
                lat = self.gt[3] + r * self.gt[5]           # the edge between rows r-1 and r
                rows.append("e%d_%d,%r,%r," % (r, c, lon, lat))
        tables = []
        for raster in (self.north_up, self.south_up):
            done, out = self.extract(raster, rows)
            self.assertEqual(done.returncode, 0, done.stderr)
            tables.append(kt.read_table(out))
        for a, b in zip(*tables):
            r, c = map(int, a["id"][1:].split("_"))
            expected = self.tas[r, c]                         # the cell south of the edge
            column = [k for k in a if k not in ("id", "longitude", "latitude", "date") and "." not in k][0]
            self.assertEqual(a[column] == "", bool(np.isnan(expected)), a)
            if a[column]:
                self.assertAlmostEqual(float(a[column]), float(expected), places=4, msg=a)
            self.assertEqual(a[column], b[column.replace("north_up", "south_up")], (a, b))

    def test_longitudes_of_0_to_360_find_the_layer(self):
        # A point at 280 E is at 80 W: it had been "outside the layer".
        done, out = self.extract(self.north_up, ["w,-80.0,35.0,", "e,280.0,35.0,"])
        self.assertEqual(done.returncode, 0, done.stderr)
        west, east = kt.read_table(out)
        self.assertNotEqual(west["north_up"], "")
        self.assertEqual(west["north_up"], east["north_up"])

    def test_what_is_no_date_or_coordinate_is_refused(self):
        cases = [(["a,-80,35,1999-06-30 garbage"], "is not a date"), (["a,-80,35,1999-06-30T23:99"], "is not a date"),
                 (["a,-80,35,1999-06-30T24:00"], "is not a date"),
                 (["a,0x10,35,1999-06-30"], "'0x10' is not a coordinate")]
        for rows, words in cases:
            done, out = self.extract(self.north_up, rows)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn(words, done.stderr)
            self.assertFalse(os.path.exists(out))
        # A time of day (and a zone) after the date is allowed and ignored.
        done, out = self.extract(self.north_up, ["a,-80,35,1999-06-30 12:00", "b,-80,35,1999-06-30T12:00:00Z",
                                                 "c,-80,35,1999-06-30t23:30:00z"])
        self.assertEqual(done.returncode, 0, done.stderr)
        done, _ = self.extract(self.north_up, ["a,-80,35,1999-06-30"], "--y-column", "longitude")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("name the same column", done.stderr)

    def test_fixed_layers_need_no_date_column(self):
        # A table of sites without dates had been refused for a fixed layer ("no column 'date'").
        done, out = self.extract(self.north_up, ["a,-80.0,35.0"], header="id,longitude,latitude")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotEqual(kt.read_table(out)[0]["north_up"], "")
        # A dated layer needs them, and says so; a date column the user names must be there.
        tas = 'NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        done, _ = self.extract(tas, ["a,-80.0,35.0"], header="id,longitude,latitude")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("no column 'date' (--date-column): the layer tas is dated", done.stderr)
        done, _ = self.extract(self.north_up, ["a,-80.0,35.0"], "--date-column", "date", header="id,longitude,latitude")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("no column 'date' (--date-column); the columns are", done.stderr)

    def test_a_cell_the_fill_could_not_fill_says_so(self):
        # Invented 4 x 4 px dates with one pixel never observed: whittaker leaves it empty with
        # flag 3, which the table had given as plain "nodata".
        stack = os.path.join(self.tmp, "never")
        os.makedirs(stack)
        for k in range(6):
            values = np.full((4, 4), 0.3 + 0.05 * k, np.float32)
            values[1, 1] = np.nan
            date = datetime.date(2021, 5, 1) + datetime.timedelta(days=16 * k)
            kt.write_raster(os.path.join(stack, "ndvi_%s.tif" % date.isoformat()), values,
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        filled = os.path.join(self.tmp, "never-filled")
        done = kt.run_kalends(["-q", "fill", os.path.join(stack, "*.tif"), "--out", filled, "--method", "whittaker"])
        self.assertEqual(done.returncode, 0, done.stderr)
        done, out = self.extract(filled, ["hole,30.015,-1.015,2021-05-20", "full,30.005,-1.005,2021-05-20"])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = {r["id"]: r for r in kt.read_table(out)}
        self.assertEqual((rows["hole"]["ndvi"], rows["hole"]["ndvi.reason"], rows["hole"]["ndvi.flag"]),
                         ("", "not filled (flag 3)", "3"))
        self.assertNotEqual(rows["full"]["ndvi"], "")

    def test_points_columns_named_as_the_long_tables_own_are_refused(self):
        # A header "layer,...,layer,..." had been written, which R and pandas rename unseen.
        done, out = self.extract(self.north_up, ["p1,-80.0,35.0,"], "--long", "--id-column", "layer",
                                 header="layer,longitude,latitude,date")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--id-column 'layer': is a column the long table (--long) writes itself", done.stderr)
        self.assertFalse(os.path.exists(out))
        # The wide table too: a date column named as the layer's own column.
        done, out = self.extract(self.north_up, ["p1,-80.0,35.0,"], "--date-column", "north_up",
                                 header="id,longitude,latitude,north_up")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("its column 'north_up' has the name of a column the table writes (for a layer)", done.stderr)
        self.assertFalse(os.path.exists(out))

    def test_a_folder_of_dated_files_is_one_dated_series(self):
        # Five invented 16-day composites dated by their names: the folder had given five fixed
        # layers, each read for every survey date (and a note each); it is the series the quoted
        # pattern gives.
        folder = os.path.join(self.tmp, "dated-files")
        os.makedirs(folder)
        for k in range(5):
            date = datetime.date(2021, 1, 1) + datetime.timedelta(days=16 * k)
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date.isoformat()), np.full((4, 4), 0.1 * k, np.float32),
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        rows = ["p1,30.015,-1.015,2021-01-20", "p2,30.015,-1.015,2021-03-10"]
        done, by_folder = self.extract(folder, rows, "--lags", "1")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("fixed layer", done.stderr)
        done, by_pattern = self.extract(os.path.join(folder, "*.tif"), rows, "--lags", "1")
        self.assertEqual(done.returncode, 0, done.stderr)
        a, b = kt.read_table(by_folder), kt.read_table(by_pattern)
        self.assertEqual(a, b)
        self.assertEqual((a[0]["ndvi"], a[0]["ndvi.matched"]), ("0.100000001", "2021-01-17"))

    def test_a_quote_never_closed_is_named(self):
        # It had been "has 1 fields where the header has 4 (a row cut short?)".
        done, out = self.extract(self.north_up, ["p1,-80,35,1999-06-15", '"p2,-80,35,1999-06-15', "p3,-80,35,1999-06-15"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn(":3: a quote (\") opened in this row is never closed", done.stderr)
        self.assertFalse(os.path.exists(out))
        # In the header: it had read "holds no points".
        done, out = self.extract(self.north_up, ["p1,-80,35,1999-06-15"], header='id,"longitude,latitude,date')
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn(":1: a quote (\") opened in the header is never closed", done.stderr)

    def test_projected_coordinates_in_a_file_without_a_crs_are_refused(self):
        # A Shapefile without its .prj, in UTM metres, read as degrees: every value had been
        # missing ("cannot be transformed"), exit 0.
        g = kt.gdal()
        from osgeo import ogr
        path = os.path.join(self.tmp, "sites.shp")
        ds = ogr.GetDriverByName("ESRI Shapefile").CreateDataSource(path)
        layer = ds.CreateLayer("sites", None, ogr.wkbPoint)
        for name in ("id", "date"):
            layer.CreateField(ogr.FieldDefn(name, ogr.OFTString))
        feature = ogr.Feature(layer.GetLayerDefn())
        feature.SetField("id", "s1")
        feature.SetGeometry(ogr.CreateGeometryFromWkt("POINT (512345.0 1788422.6)"))
        layer.CreateFeature(feature)
        ds = None
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "sites.prj")))
        done = kt.run_kalends(["extract", self.north_up, "--points", path, "--out", os.path.join(self.tmp, "shp.csv")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("1788422.6 is beyond ±90 degrees", done.stderr)


class RawStacksAtTheEdges(kt.TempDirTestCase):
    """Raw stacks whose time axis is unusual (invented CF files of a fictional district)."""

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.points = os.path.join(cls.tmp, "points.csv")
        with open(cls.points, "w") as f:
            f.write("id,longitude,latitude,date\na,20.12,9.86,2001-01-20\nb,20.12,9.86,1990-05-01\n")

    def extract(self, *inputs, expect=0):
        out = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["extract"] + list(inputs) + ["--points", self.points, "--out", out])
        self.assertEqual(done.returncode, expect, done.stderr)
        return done, (kt.read_table(out) if expect == 0 else None)

    def test_an_unsupported_calendar_is_refused_not_read_as_undated_bands(self):
        # noleap: every survey had got every band as a "fixed" layer, exit 0.
        path = os.path.join(self.tmp, "noleap.nc")
        write_cf(path, [0, 16, 32], "days since 2001-01-01", calendar="noleap")
        for given in (path, 'NETCDF:"%s":tas' % path):
            done, _ = self.extract(given, expect=2)
            self.assertIn("calendar 'noleap' is not supported", done.stderr)

    def test_one_date_is_a_fixed_layer_and_said_so(self):
        path = os.path.join(self.tmp, "one.nc")
        write_cf(path, [10], "days since 2001-01-01")
        done, table = self.extract('NETCDF:"%s":tas' % path)
        self.assertIn("tas: its one band, dated 2001-01-11, is read as a fixed layer for every survey date",
                      done.stderr)
        self.assertEqual([r["tas.matched"] for r in table], ["fixed", "fixed"])

    def test_bounds_are_no_layer_and_one_variable_is_named_as_many(self):
        # time_bnds (no grid) had stopped the whole extract: "has no georeferencing".
        both = os.path.join(self.tmp, "both.nc")
        write_cf(both, [0, 16, 32], "days since 2001-01-01", variables=("tas", "pr"), bounds=True)
        single = os.path.join(self.tmp, "single.nc")
        write_cf(single, [0, 16, 32], "days since 2001-01-01")
        done, table = self.extract(both, single)
        columns = [c for c in table[0] if not c.endswith((".matched", ".reason"))][4:]
        self.assertEqual(sorted(columns), ["both.pr", "both.tas", "single.tas"])
        # 2001-01-20 lies in the composite of 2001-01-17 (band 2): 10 * 1 + row 1.
        self.assertEqual(table[0]["single.tas.matched"], "2001-01-17")
        self.assertEqual(float(table[0]["both.pr"]), 11.0)

    def test_a_raw_stack_beside_fill_outputs_of_its_name_is_named(self):
        # A raw evi.tif whose two bands carry dates beside a fill output evi_2001-01-01.tif: both
        # would be the series 'evi'; it had said "the same date or year as".
        g = kt.gdal()
        folder = os.path.join(self.tmp, "clash")
        os.makedirs(folder)
        for name, bands, metadata in (("evi.tif", 2, {}),
                                      ("evi_2001-01-01.tif", 1, {"KALENDS_DATE": "2001-01-01", "KALENDS_VERSION": "0"})):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, name), 5, 4, bands, g.GDT_Float32)
            ds.SetGeoTransform((20.0, 0.1, 0, 10.0, 0, -0.1))
            ds.SetProjection('GEOGCS["WGS 84",DATUM["WGS_1984",SPHEROID["WGS 84",6378137,298.257223563]],'
                             'PRIMEM["Greenwich",0],UNIT["degree",0.0174532925199433]]')
            for b in range(bands):
                ds.GetRasterBand(b + 1).WriteArray(np.full((4, 5), b, np.float32))
                if bands > 1:
                    ds.GetRasterBand(b + 1).SetDescription(("2001-01-01", "2001-01-17")[b])
            for key, value in metadata.items():
                ds.SetMetadataItem(key, value)
            ds = None
        done, _ = self.extract(folder, expect=2)
        self.assertIn("would be the series 'evi'", done.stderr)

    def test_hourly_records_are_said_to_be_read_at_midnight(self):
        grib = kt.shared_path("hourly-temperature", "era5-2mt-2019-03-uk.grib")
        folder = os.path.join(self.tmp, "hourly")
        os.makedirs(folder)
        os.symlink(grib, os.path.join(folder, os.path.basename(grib)))
        points = os.path.join(self.tmp, "uk.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\nm,-1.5,52.5,2019-03-10\n")
        out = os.path.join(self.tmp, "uk.csv.out")
        done = kt.run_kalends(["extract", folder, "--points", points, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("several dates a day; a survey day reads the record that stands for its first moment", done.stderr)
        self.assertEqual(kt.read_table(out)[0]["era5-2mt-2019-03-uk.matched"], "2019-03-10")

if __name__ == "__main__":
    unittest.main(verbosity=2)
