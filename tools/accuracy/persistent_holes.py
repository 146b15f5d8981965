#!/usr/bin/env python3
"""Adds a persistent hole to a development stack: one date's missing-value mask, moved, laid
over every date, so that some pixels have no observation on any date (as in the masked Alaska
variants). For building development masks beside `kalends validate --keep-work`, whose
transplanted masks leave almost every pixel observed on some date; never for the masked files
that accuracy is claimed on.

Usage (the mask of the truth's 18th date, moved 30 rows down and 40 columns right, wrapping):
  python3 tools/accuracy/persistent_holes.py --masks ../shared/data/alaska-ndvi/observed \\
      --date 17 --shift 30 40 --input validation/work/input --out dev-holes
"""
import argparse
import glob
import os
import sys

import numpy as np
from osgeo import gdal

gdal.UseExceptions()


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--masks", required=True, help="folder whose date gives the hole's shape")
    parser.add_argument("--date", type=int, required=True, help="index of that date (0 = first)")
    parser.add_argument("--shift", type=int, nargs=2, default=(0, 0), metavar=("ROWS", "COLS"))
    parser.add_argument("--input", required=True, help="folder of the stack to punch")
    parser.add_argument("--out", required=True, help="folder for the punched copy")
    args = parser.parse_args()
    masks = sorted(glob.glob(os.path.join(args.masks, "*.tif")))
    inputs = sorted(glob.glob(os.path.join(args.input, "*.tif")))
    if not masks or not inputs:
        sys.exit("persistent_holes: %s: no .tif files" % (args.masks if not masks else args.input))
    if not 0 <= args.date < len(masks):
        sys.exit("persistent_holes: %s: --date %d, but it has %d dates" % (args.masks, args.date,
                                                                          len(masks)))
    try:
        ds = gdal.Open(masks[args.date])
        hole = ~np.isfinite(ds.GetRasterBand(1).ReadAsArray().astype(float))
        ds = None
    except RuntimeError as error:
        sys.exit("persistent_holes: %s: %s" % (masks[args.date], str(error).strip()))
    hole = np.roll(hole, tuple(args.shift), axis=(0, 1))
    os.makedirs(args.out, exist_ok=True)
    for path in inputs:
        try:
            ds = gdal.Open(path)
            band = ds.GetRasterBand(1)
            values = band.ReadAsArray().astype(np.float32)
            if values.shape != hole.shape:
                sys.exit("persistent_holes: %s: %d x %d px, the mask is %d x %d" % (
                    path, values.shape[1], values.shape[0], hole.shape[1], hole.shape[0]))
            nodata = band.GetNoDataValue()
            values[hole] = np.nan if nodata is None else nodata
            target = os.path.join(args.out, os.path.basename(path))
            copy = gdal.GetDriverByName("GTiff").CreateCopy(target + ".part", ds)
            copy.GetRasterBand(1).WriteArray(values)
            copy = None
            ds = None
            os.replace(target + ".part", target)
        except RuntimeError as error:
            sys.exit("persistent_holes: %s: %s" % (path, str(error).strip()))
    print("hole: %.1f %% of the pixels on every date" % (100 * hole.mean()))


if __name__ == "__main__":
    main()
