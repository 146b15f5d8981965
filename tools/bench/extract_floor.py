#!/usr/bin/python3
"""The I/O floor of `kalends extract FOLDER --points TABLE` for tools/bench/extract.sh: every band
of every raster below FOLDER read once with GDAL, and every point's cell looked up in it with
numpy (nearest cell; no date matching, no table written). Whatever kalends does beyond reading
its layers is measured against this.

usage: extract_floor.py FOLDER TABLE"""
import csv
import glob
import os
import sys

import numpy as np
from osgeo import gdal, osr

gdal.UseExceptions()


def main():
    folder, table = sys.argv[1], sys.argv[2]
    with open(table, newline="") as f:
        rows = list(csv.DictReader(f))
    lonlat = np.array([[float(r["longitude"]), float(r["latitude"])] for r in rows])
    files = sorted(glob.glob(os.path.join(folder, "**", "*.tif"), recursive=True))
    wgs84 = osr.SpatialReference()
    wgs84.ImportFromEPSG(4326)
    wgs84.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
    cells = {}
    total = 0.0
    for path in files:
        ds = gdal.Open(path)
        key = (ds.GetProjection(), ds.GetGeoTransform(), ds.RasterXSize, ds.RasterYSize)
        if key not in cells:
            layer = osr.SpatialReference(wkt=key[0])
            layer.SetAxisMappingStrategy(osr.OAMS_TRADITIONAL_GIS_ORDER)
            xy = np.array(osr.CoordinateTransformation(wgs84, layer).TransformPoints(lonlat))
            gt = key[1]
            col = np.floor((xy[:, 0] - gt[0]) / gt[1]).astype(int)
            row = np.floor((xy[:, 1] - gt[3]) / gt[5]).astype(int)
            inside = (col >= 0) & (col < ds.RasterXSize) & (row >= 0) & (row < ds.RasterYSize)
            cells[key] = (row[inside], col[inside])
        row, col = cells[key]
        for b in range(1, ds.RasterCount + 1):
            values = ds.GetRasterBand(b).ReadAsArray()
            total += float(np.nansum(values[row, col]))
    print("%d files, checksum %.6g" % (len(files), total))


if __name__ == "__main__":
    main()
