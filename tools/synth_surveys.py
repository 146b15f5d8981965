#!/usr/bin/python3
"""Invented household-survey clusters in the fictional Lower Tamsin district, for the demo's
`extract` step: a CSV of id, longitude, latitude (WGS 84) and survey date. The district grid
is read from one demo raster; clusters are drawn inside it, with dates in the demo's years,
a few given only as year-month, one cluster outside the district and one surveyed before the
stack begins (both must come out missing, with a reason). No real place or survey.

With --uniform FIRST,LAST: as many households spread evenly over the whole grid, dated evenly
between the two days and listed in random date order, as a table ordered by household is (the
extract benchmark, tools/bench/extract.sh)."""
import argparse
import datetime
import glob
import os

import numpy as np
from osgeo import gdal, osr


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--grid", required=True, help="a demo raster (its grid and CRS)")
    ap.add_argument("--out", required=True, help="CSV to write")
    ap.add_argument("--count", type=int, default=40)
    ap.add_argument("--seed", type=int, default=2023)
    ap.add_argument("--uniform", metavar="FIRST,LAST",
                    help="households over the whole grid, dated evenly between these days (YYYY-MM-DD)")
    a = ap.parse_args()
    ds = gdal.Open(sorted(glob.glob(a.grid))[0])
    gt = ds.GetGeoTransform()
    layer = osr.SpatialReference(wkt=ds.GetProjection())
    layer.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    wgs84 = osr.SpatialReference()
    wgs84.ImportFromEPSG(4326)
    wgs84.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    to_wgs84 = osr.CoordinateTransformation(layer, wgs84)
    rng = np.random.default_rng(a.seed)
    rows = uniform_households(ds, to_wgs84, rng, a.count, a.uniform) if a.uniform else \
        clusters(ds, to_wgs84, rng, a.count)
    os.makedirs(os.path.dirname(os.path.abspath(a.out)), exist_ok=True)
    with open(a.out + ".tmp", "w") as f:
        f.write("id,longitude,latitude,date\n")
        for pid, lon, lat, date in rows:
            f.write("%s,%.6f,%.6f,%s\n" % (pid, lon, lat, date))
    os.replace(a.out + ".tmp", a.out)
    print("synth_surveys: %d invented survey %s in %s" % (len(rows), "households" if a.uniform else "clusters", a.out))


def uniform_households(ds, to_wgs84, rng, count, span):
    first, last = (datetime.date.fromisoformat(d) for d in span.split(","))
    gt = ds.GetGeoTransform()
    cols = rng.uniform(0, ds.RasterXSize, count)
    rows = rng.uniform(0, ds.RasterYSize, count)
    lonlat = np.array(to_wgs84.TransformPoints(np.c_[gt[0] + cols * gt[1], gt[3] + rows * gt[5]]))
    days = rng.integers(0, (last - first).days + 1, count)
    return [("hh%06d" % i, lonlat[i, 0], lonlat[i, 1], (first + datetime.timedelta(int(days[i]))).isoformat())
            for i in range(count)]


def clusters(ds, to_wgs84, rng, count):
    gt = ds.GetGeoTransform()
    rows = []
    for i in range(count):
        c, r = rng.uniform(5, ds.RasterXSize - 5), rng.uniform(5, ds.RasterYSize - 5)
        lon, lat, _ = to_wgs84.TransformPoint(gt[0] + c * gt[1], gt[3] + r * gt[5])
        year, month, day = int(rng.integers(2021, 2024)), int(rng.integers(1, 13)), int(rng.integers(1, 29))
        date = "%d-%02d" % (year, month) if i % 8 == 7 else "%d-%02d-%02d" % (year, month, day)
        rows.append(("LT-%03d" % (i + 1), lon, lat, date))
    lon, lat, _ = to_wgs84.TransformPoint(gt[0] - 20 * gt[1], gt[3])  # west of the district
    rows.append(("LT-OUTSIDE", lon, lat, "2022-05-10"))
    rows.append(("LT-EARLY",) + rows[0][1:3] + ("2019-11-20",))
    return rows


if __name__ == "__main__":
    main()
