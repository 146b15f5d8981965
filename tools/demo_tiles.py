#!/usr/bin/env python3
"""Deliver the invented Lower Tamsin demo as a tile set and draw the district's outline.

Splits every single-date raster of the given folders into 2 x 2 tiles, written as
TILES/hXXvYY/<name> (the tile layout satellite products use: one folder per tile), and writes
the invented district outline as GeoJSON in the stack's CRS. Invented data only.
"""

import argparse
import glob
import json
import math
import os

from osgeo import gdal, osr

gdal.UseExceptions()


def split(files, tiles_dir, columns, rows):
    for path in files:
        ds = gdal.Open(path)
        width, height = ds.RasterXSize, ds.RasterYSize
        xs = [round(width * k / columns) for k in range(columns + 1)]
        ys = [round(height * k / rows) for k in range(rows + 1)]
        for h in range(columns):
            for v in range(rows):
                folder = os.path.join(tiles_dir, "h%02dv%02d" % (h, v))
                os.makedirs(folder, exist_ok=True)
                target = os.path.join(folder, os.path.basename(path))
                partial = os.path.join(folder, "." + os.path.basename(path) + ".partial")
                gdal.Translate(partial, ds, format="GTiff", srcWin=[xs[h], ys[v], xs[h + 1] - xs[h], ys[v + 1] - ys[v]],
                               creationOptions=["COMPRESS=DEFLATE", "TILED=YES"])
                os.replace(partial, target)
        ds = None


def outline(reference, path):
    """An invented, irregular district boundary inside the stack's extent."""
    ds = gdal.Open(reference)
    gt = ds.GetGeoTransform()
    cx = gt[0] + gt[1] * ds.RasterXSize / 2
    cy = gt[3] + gt[5] * ds.RasterYSize / 2
    radius = 0.42 * gt[1] * min(ds.RasterXSize, ds.RasterYSize)
    ring = []
    for k in range(72):
        a = 2 * math.pi * k / 72
        r = radius * (1 + 0.12 * math.sin(3 * a) + 0.06 * math.cos(5 * a + 1))
        ring.append([cx + r * math.cos(a), cy + r * math.sin(a)])
    ring.append(ring[0])
    srs = osr.SpatialReference(wkt=ds.GetProjectionRef())
    srs.AutoIdentifyEPSG()
    epsg = srs.GetAuthorityCode(None)
    feature = {"type": "Feature", "properties": {"name": "Lower Tamsin (invented)"},
               "geometry": {"type": "Polygon", "coordinates": [ring]}}
    collection = {"type": "FeatureCollection",
                  "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::%s" % epsg}},
                  "features": [feature]}
    with open(path + ".partial", "w") as f:
        json.dump(collection, f)
    os.replace(path + ".partial", path)


def main():
    p = argparse.ArgumentParser(description=__doc__)
    p.add_argument("--tiles", required=True, help="folder for hXXvYY/ tile folders")
    p.add_argument("--outline", help="GeoJSON file for the district outline")
    p.add_argument("folders", nargs="+", help="folders of single-date rasters to split")
    a = p.parse_args()
    files = []
    for folder in a.folders:
        files += sorted(glob.glob(os.path.join(folder, "*.tif")))
    split(files, a.tiles, 2, 2)
    if a.outline:
        outline(files[0], a.outline)


if __name__ == "__main__":
    main()
