#!/usr/bin/env python3
"""Where a fill's error comes from: the tail of the squared error, and which cells carry it.

Compares a fill with the truth on the withheld cells (the truth stack has a value, the filler's
input had none), and breaks the error down:

- how much of the squared error the worst 0.1, 1 and 5 % of cells carry;
- by the pixel's *excess missingness* in the input: the share of the dates on which the pixel
  was missing although at least 75 % of its 5 x 5 neighbours were observed (common practice
  for telling a pixel's own trouble, such as water, snow or flagged surfaces, from a passing
  cloud, which hides the neighbours too; no single source);
- by the distance, on the same date, to the nearest observed cell (Euclidean, scipy's
  distance_transform_edt): how deep inside the date's cloud a cell lies;
- by the distance, on the same date, to the nearest cell the truth itself lacks (a real cloud
  or a QA-flagged cell): near those the reference may carry what the QA flags missed;
- for each group, the RMS of error / sd (1 for a calibrated sd) when the fill has an sd band.

For development and for reading accuracy figures; it is not a test. Files are matched by name
(the fill's GeoTIFFs: band 1 value, band 2 sd). Fills of the masked Alaska variants can be read
with it, but choose settings on transplanted masks (kalends validate --keep-work), not on them.

Usage:
  python3 tools/accuracy/error_anatomy.py --truth ../shared/data/alaska-ndvi/observed \\
      --input validation/work/input --fill validation/work/spacetime
"""
import argparse
import glob
import os
import sys

import numpy as np
from osgeo import gdal
from scipy.ndimage import distance_transform_edt, uniform_filter

gdal.UseExceptions()


def read_stack(folder, names, band=1):
    planes = []
    for name in names:
        path = os.path.join(folder, name)
        try:
            ds = gdal.Open(path)
            if band > ds.RasterCount:
                return None
            planes.append(ds.GetRasterBand(band).ReadAsArray().astype(float))
            ds = None
        except RuntimeError as error:
            sys.exit("error_anatomy: %s: %s" % (path, str(error).strip()))
    return np.stack(planes)


def excess_missingness(values, radius=2, clear_share=0.75):
    """Per pixel: share of the dates with a clear neighbourhood on which the pixel is missing."""
    missing = ~np.isfinite(values)
    size = 2 * radius + 1
    observed = (~missing).astype(float)
    # Observed neighbours, the pixel itself left out; cells beyond the edge count as missing.
    neighbours = uniform_filter(observed, size=(1, size, size), mode="constant") * size * size
    share = (neighbours - observed) / (size * size - 1)
    clear = share >= clear_share
    dates = clear.sum(0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(dates > 0, (missing & clear).sum(0) / dates, np.nan)


def depth_in_cloud(values):
    """Per cell: distance (pixels) to the nearest observed cell of the same date."""
    out = np.full(values.shape, np.inf)
    for t, plane in enumerate(values):
        known = np.isfinite(plane)
        if known.any():
            out[t] = distance_transform_edt(~known)
    return out


def line(label, err, z, total_se):
    se = err ** 2
    text = "  %-30s %8d cells  RMSE %.4f  bias %+.4f  share of squared error %5.1f %%" % (
        label, err.size, np.sqrt(se.mean()), err.mean(), 100 * se.sum() / total_se)
    if z is not None:
        text += "  RMS error/sd %.2f" % np.sqrt(np.mean(z ** 2))
    return text


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--truth", required=True, help="folder of the complete (observed) stack")
    parser.add_argument("--input", required=True, help="folder of the stack the filler was given")
    parser.add_argument("--fill", required=True, help="folder of the fill's GeoTIFFs")
    args = parser.parse_args()
    names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(args.truth, "*.tif")))
    if not names:
        sys.exit("error_anatomy: %s: no .tif files" % args.truth)
    truth = read_stack(args.truth, names)
    given = read_stack(args.input, names)
    value = read_stack(args.fill, names)
    sd = read_stack(args.fill, names, band=2)

    held = np.isfinite(truth) & ~np.isfinite(given)
    filled = held & np.isfinite(value)
    print("%d withheld cells, %d with a value (%.1f %%)" % (held.sum(), filled.sum(),
                                                            100 * filled.sum() / max(1, held.sum())))
    err_all = (value - truth)
    z_all = err_all / sd if sd is not None else None
    err = err_all[filled]
    total_se = float((err ** 2).sum())
    print("RMSE %.4f, MAE %.4f, bias %+.4f" % (np.sqrt(np.mean(err ** 2)), np.mean(np.abs(err)),
                                             np.mean(err)))

    print("\nThe tail:")
    ordered = np.sort(err ** 2)[::-1]
    for share in (0.001, 0.01, 0.05):
        k = max(1, int(share * ordered.size))
        print("  worst %4.1f %% of cells carry %5.1f %% of the squared error; RMSE without them %.4f"
              % (100 * share, 100 * ordered[:k].sum() / total_se, np.sqrt(ordered[k:].mean())))

    groups = []
    excess = np.broadcast_to(excess_missingness(given), truth.shape)
    never = np.broadcast_to(~np.isfinite(given).any(0), truth.shape)
    groups.append(("By the pixel's excess missingness in the input:", [
        ("pixel never observed", never),
        ("excess < 0.1", ~never & (excess < 0.1)),
        ("excess 0.1-0.3", ~never & (excess >= 0.1) & (excess < 0.3)),
        ("excess 0.3-0.6", ~never & (excess >= 0.3) & (excess < 0.6)),
        ("excess >= 0.6", ~never & (excess >= 0.6)),
        ("no clear neighbourhood", ~never & np.isnan(excess)),
    ]))
    depth = depth_in_cloud(given)
    groups.append(("By the distance to the nearest observed cell of the date:", [
        ("1-2 px", depth <= 2),
        ("2-6 px", (depth > 2) & (depth <= 6)),
        ("6-18 px", (depth > 6) & (depth <= 18)),
        ("over 18 px", depth > 18),
    ]))
    # Cells next to what the truth itself lacks on that date (real cloud, QA-flagged cells):
    # cloud edges, thin cloud and shadows that the QA flags missed lower the reference values
    # there (common practice to buffer cloud masks by a pixel or two for this reason; no single
    # source), so a part of the error there is the reference's, not the filler's.
    lacking = depth_in_cloud(np.where(np.isfinite(truth), np.nan, 1.0))
    groups.append(("By the distance to the nearest cell the truth itself lacks on that date:", [
        ("up to 1.5 px", lacking <= 1.5),
        ("1.5-3 px", (lacking > 1.5) & (lacking <= 3)),
        ("3-6 px", (lacking > 3) & (lacking <= 6)),
        ("6-12 px", (lacking > 6) & (lacking <= 12)),
        ("over 12 px, or none lacking", lacking > 12),
    ]))
    for title, rows in groups:
        print("\n" + title)
        for label, mask in rows:
            cells = filled & mask
            if cells.any():
                print(line(label, err_all[cells], None if z_all is None else z_all[cells], total_se))


if __name__ == "__main__":
    main()
