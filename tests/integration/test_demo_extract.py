#!/usr/bin/python3
"""Time matching of kalends extract on the demo scenario (invented Lower Tamsin data, a small
version of tools/demo.sh: fill with monthly means, then seasons).

A point surveyed on a given day must get exactly: the fill output of the composite holding
that day and the composites before it (lags); the monthly mean of that month and the months
before; the year-specific layer's band of that month and year; the synoptic layer's band of
that calendar month. The expected file and band are worked out here with Python's datetime
and read with GDAL at the cell holding the point (its centre, transformed with osr); nothing
is taken from kalends but the table it writes. Mechanics on invented data, not accuracy.
"""
import datetime
import glob
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "tools"))
import kalends_testlib as kt  # noqa: E402
import synth_stack  # noqa: E402

SIZE = 64
LAGS = (1, 2, 3)


class DemoExtract(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        ndvi = os.path.join(cls.tmp, "input", "ndvi")
        qa = os.path.join(cls.tmp, "input", "qa")
        synth_stack.make_stack(ndvi, width=SIZE, height=SIZE, years=3, qa_dir=qa, drought_year=2022)
        cls.out = os.path.join(cls.tmp, "out")
        fill = os.path.join(cls.out, "fill")
        for step in (["fill", os.path.join(ndvi, "ndvi_*.tif"), "--qa", os.path.join(qa, "qa_*.tif"),
                      "--keep", "bits0-1 in 0,1", "--out", fill, "--every", "1M"],
                     ["seasons", fill, "--out", os.path.join(cls.out, "seasons")]):
            done = kt.run_kalends(["-q"] + step)
            assert done.returncode == 0, "%s: %s" % (step[0], done.stderr)
        g = kt.gdal()
        from osgeo import osr
        first = g.Open(sorted(glob.glob(os.path.join(fill, "ndvi_*.tif")))[0])
        gt = first.GetGeoTransform()
        layer = osr.SpatialReference(wkt=first.GetProjection())
        layer.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
        wgs84 = osr.SpatialReference()
        wgs84.ImportFromEPSG(4326)
        wgs84.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
        to_wgs84 = osr.CoordinateTransformation(layer, wgs84)
        rng = np.random.default_rng(8)
        surveys = ["2021-03-05", "2021-01-02", "2022-01-10", "2022-07-31", "2023-12-31", "2022-02-16",
                   "2023-06-15", "2021-11-30"]
        cls.points = []
        for i, day in enumerate(surveys):
            col, row = int(rng.integers(0, SIZE)), int(rng.integers(0, SIZE))
            x = gt[0] + (col + 0.5) * gt[1]
            y = gt[3] + (row + 0.5) * gt[5]
            lon, lat, _ = to_wgs84.TransformPoint(x, y)
            cls.points.append(dict(id="s%d" % i, lon=lon, lat=lat, date=day, col=col, row=row))
        # A year-month, a date before the stack, one after, no date.
        extra = [("2022-03", 10, 20), ("2020-06-01", 5, 5), ("2024-02-01", 6, 6), ("", 7, 7)]
        for i, (day, col, row) in enumerate(extra):
            x = gt[0] + (col + 0.5) * gt[1]
            y = gt[3] + (row + 0.5) * gt[5]
            lon, lat, _ = to_wgs84.TransformPoint(x, y)
            cls.points.append(dict(id="e%d" % i, lon=lon, lat=lat, date=day, col=col, row=row))
        cls.csv = os.path.join(cls.tmp, "surveys.csv")
        with open(cls.csv, "w") as f:
            f.write("id,longitude,latitude,date\n")
            for p in cls.points:
                f.write("%s,%.10f,%.10f,%s\n" % (p["id"], p["lon"], p["lat"], p["date"]))
        cls.table = os.path.join(cls.tmp, "table.csv")
        done = kt.run_kalends(["-q", "extract", cls.out, "--points", cls.csv, "--out", cls.table,
                               "--lags", ",".join(map(str, LAGS))])
        assert done.returncode == 0, done.stderr
        cls.rows = {r["id"]: r for r in kt.read_table(cls.table)}
        cls.fill_dates = sorted(datetime.date.fromisoformat(os.path.basename(p)[5:15])
                                for p in glob.glob(os.path.join(fill, "ndvi_*.tif")))
        cls.fill = fill

    @staticmethod
    def pixel(path, band, p):
        ds = kt.gdal().Open(path)  # kept alive while its band is read
        return float(ds.GetRasterBand(band).ReadAsArray()[p["row"], p["col"]])

    def survey_day(self, p):
        text = p["date"]
        return datetime.date.fromisoformat(text + "-15" if len(text) == 7 else text)

    def check(self, row, column, path, band, p, matched):
        self.assertEqual(row[column + ".matched"], matched, column)
        expected = self.pixel(path, band, p)
        # 9 significant digits in the table give back the float32 of the file exactly
        self.assertEqual(np.float32(row[column]), np.float32(expected), "%s of %s" % (column, p["id"]))

    def test_fill_dates_and_their_lags(self):
        for p in self.points[:9]:
            day = self.survey_day(p)
            own = max(i for i, d in enumerate(self.fill_dates) if d <= day)
            row = self.rows[p["id"]]
            for lag in (0,) + LAGS:
                column = "fill.ndvi" + (".lag%d" % lag if lag else "")
                if own - lag < 0:
                    self.assertEqual(row[column], "")
                    self.assertIn("before the layers", row[column + ".reason"])
                    continue
                d = self.fill_dates[own - lag]
                path = os.path.join(self.fill, "ndvi_%s.tif" % d.isoformat())
                self.check(row, column, path, 1, p, d.isoformat())
                self.assertEqual(np.float32(row[column + ".sd"]), np.float32(self.pixel(path, 2, p)))
                self.assertEqual(float(row[column + ".flag"]), self.pixel(path, 3, p))

    def test_monthly_means_year_layers_and_synoptic(self):
        seasons = os.path.join(self.out, "seasons")
        for p in self.points[:9]:
            day = self.survey_day(p)
            row = self.rows[p["id"]]
            for lag in (0,) + LAGS:
                suffix = ".lag%d" % lag if lag else ""
                months = day.year * 12 + day.month - 1 - lag
                year, month = months // 12, months % 12 + 1
                start = datetime.date(year, month, 1)
                monthly = os.path.join(self.fill, "calendar-1M", "ndvi_%s.tif" % start.isoformat())
                column = "fill.calendar-1M.ndvi" + suffix
                if year < 2021:
                    self.assertEqual(row[column], "")
                    self.assertNotEqual(row[column + ".reason"], "")
                    self.assertEqual(row["seasons.ndvi_year" + suffix], "")
                    self.assertIn("no layer for %d" % year, row["seasons.ndvi_year" + suffix + ".reason"])
                else:
                    self.check(row, column, monthly, 1, p, start.isoformat())
                    self.check(row, "seasons.ndvi_year" + suffix,
                               os.path.join(seasons, "ndvi_year_%d.tif" % year), month, p,
                               "%d month %02d" % (year, month))
                # The synoptic cycle wraps round the calendar year.
                self.check(row, "seasons.ndvi_synoptic_mean" + suffix,
                           os.path.join(seasons, "ndvi_synoptic_mean.tif"), month, p, "month %02d" % month)

    def test_dates_outside_the_stack_and_missing_dates_have_reasons(self):
        before, after, none = self.rows["e1"], self.rows["e2"], self.rows["e3"]
        self.assertEqual(before["fill.ndvi"], "")
        self.assertIn("survey date before the layers", before["fill.ndvi.reason"])
        self.assertEqual(after["fill.ndvi"], "")
        self.assertIn("survey date after the layers", after["fill.ndvi.reason"])
        self.assertEqual(after["seasons.ndvi_year"], "")
        self.assertIn("no layer for 2024", after["seasons.ndvi_year.reason"])
        # the synoptic value needs only the calendar month
        self.assertNotEqual(after["seasons.ndvi_synoptic_mean"], "")
        for column in ("fill.ndvi", "seasons.ndvi_synoptic_mean", "fill.calendar-1M.ndvi"):
            self.assertEqual(none[column], "")
            self.assertEqual(none[column + ".reason"], "no survey date")
        # never a silent zero: every empty value has a reason
        for r in self.rows.values():
            for key, v in r.items():
                if key.endswith((".matched", ".reason", ".sd", ".flag")) or key in ("id", "longitude", "latitude", "date"):
                    continue
                if v == "":
                    self.assertNotEqual(r[key + ".reason"], "", "%s of %s" % (key, r["id"]))

    def test_long_table_holds_the_same_values(self):
        out = os.path.join(self.tmp, "long.csv")
        done = kt.run_kalends(["-q", "extract", self.out, "--points", self.csv, "--out", out, "--long",
                               "--lags", "1", "--layers", "fill.ndvi,seasons.ndvi_synoptic_mean"])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = kt.read_table(out)
        self.assertEqual(len(rows), len(self.points) * 2 * 2)
        for r in rows:
            column = r["layer"] + (".lag%s" % r["lag"] if r["lag"] != "0" else "")
            self.assertEqual(r["value"], self.rows[r["id"]][column], column)
            self.assertEqual(r["matched"], self.rows[r["id"]][column + ".matched"])


if __name__ == "__main__":
    unittest.main(verbosity=2)
