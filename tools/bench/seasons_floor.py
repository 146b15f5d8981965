#!/usr/bin/python3
"""The GDAL I/O floor of `kalends seasons`: read every input and write the outputs a kalends run
left in LAYOUT_DIR again with GDAL alone (same files, bands, pixels, tiling and compression), no
computation. Writing the very same pixels matters: compression time depends on the content, and
derived layers (means, anomalies) compress worse than raw composites. Reading LAYOUT_DIR adds
decompression time to the floor; `--read-layout-only` measures that part alone. Run --of N processes with --share 0..N-1 to
split inputs and outputs between them (tools/bench/seasons.sh does).
usage: seasons_floor.py 'STACK/ndvi_*.tif' LAYOUT_DIR OUT_DIR [--share 0 --of 1]
"""
import argparse
import glob
import os
import sys

import numpy as np
from osgeo import gdal

gdal.UseExceptions()
OPTIONS = ["TILED=YES", "BLOCKXSIZE=256", "BLOCKYSIZE=256", "INTERLEAVE=BAND", "COMPRESS=DEFLATE",
           "PREDICTOR=3", "BIGTIFF=IF_SAFER"]


def read_inputs(files, share, workers):
    """Reads this worker's share of the inputs, whole, as float32; returns one plane."""
    plane = None
    for f in files[share::workers]:
        ds = gdal.Open(f)          # the dataset must outlive its band
        plane = ds.GetRasterBand(1).ReadAsArray().astype(np.float32)
    return plane


def work(args):
    files, layout_dir, layout, out_dir, share, workers, read_only = args
    gdal.SetCacheMax(64 << 20)
    if not read_only:
        read_inputs(files, share, workers)
    for name, bands in layout[share::workers]:
        source = gdal.Open(os.path.join(layout_dir, name))
        if read_only:
            for b in range(1, bands + 1):
                source.GetRasterBand(b).ReadAsArray()
            continue
        ds = gdal.GetDriverByName("GTiff").Create(os.path.join(out_dir, name), source.RasterXSize,
                                                  source.RasterYSize, bands, gdal.GDT_Float32, OPTIONS)
        ds.SetGeoTransform(source.GetGeoTransform())
        ds.SetProjection(source.GetProjection())
        for b in range(1, bands + 1):
            ds.GetRasterBand(b).WriteArray(source.GetRasterBand(b).ReadAsArray())
        ds = None
    return 0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("pattern")
    ap.add_argument("layout_dir")
    ap.add_argument("out_dir")
    ap.add_argument("--share", type=int, default=0)
    ap.add_argument("--of", type=int, default=1)
    ap.add_argument("--read-layout-only", action="store_true")
    a = ap.parse_args()
    files = sorted(glob.glob(a.pattern))
    layout = []
    for p in sorted(glob.glob(os.path.join(a.layout_dir, "*.tif"))):
        ds = gdal.Open(p)
        layout.append((os.path.basename(p), ds.RasterCount))
    os.makedirs(a.out_dir, exist_ok=True)
    return work((files, a.layout_dir, layout, a.out_dir, a.share, a.of, a.read_layout_only))


if __name__ == "__main__":
    sys.exit(main())
