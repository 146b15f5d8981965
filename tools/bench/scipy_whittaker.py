#!/usr/bin/python3
"""Reference throughput for the kalends benchmark: an order-2 Whittaker smoother
solved per pixel with scipy.linalg.solveh_banded, (W + lambda D'D) z = W y with
D the second differences and W the 0/1 weights of valid values. One core only.

Reads a window of about --pixels pixels from the stack, times only the solves
(building the banded matrix of each pixel included, reading excluded) and
prints one JSON object: pixel-dates per second of the solves.

Usage: /usr/bin/python3 tools/bench/scipy_whittaker.py 'DIR/ndvi_*.tif' [--pixels 2000] [--lambda 1000]
"""

import os

# Pin BLAS/LAPACK to one thread before numpy loads: this is a per-core figure.
for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[var] = "1"

import argparse  # noqa: E402
import glob  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from osgeo import gdal  # noqa: E402
from scipy.linalg import solveh_banded  # noqa: E402

gdal.UseExceptions()


def dtd_bands(n):
    """Upper banded form (3, n) of D'D for second differences (n >= 3)."""
    d = np.zeros((n - 2, n))
    for k, c in enumerate((1.0, -2.0, 1.0)):
        d[np.arange(n - 2), np.arange(n - 2) + k] = c
    m = d.T @ d
    ab = np.zeros((3, n))
    ab[2] = np.diag(m)
    ab[1, 1:] = np.diag(m, 1)
    ab[0, 2:] = np.diag(m, 2)
    return ab


def read_window(files, pixels):
    """A centred square window of about `pixels` pixels: values (n, p) and 0/1 weights."""
    ds = gdal.Open(files[0])
    w, h = ds.RasterXSize, ds.RasterYSize
    side = max(1, int(math.ceil(math.sqrt(pixels))))
    sx, sy = min(side, w), min(int(math.ceil(pixels / min(side, w))), h)
    x0, y0 = (w - sx) // 2, (h - sy) // 2
    ys, ws = [], []
    for f in files:
        ds = gdal.Open(f)             # keep the dataset alive while its band is used
        band = ds.GetRasterBand(1)
        a = band.ReadAsArray(x0, y0, sx, sy).astype(np.float64).ravel()
        nd = band.GetNoDataValue()
        valid = np.isfinite(a) if nd is None else (a != nd) & np.isfinite(a)
        scale = band.GetScale() or 1.0
        offset = band.GetOffset() or 0.0
        ys.append(np.where(valid, a * scale + offset, 0.0))
        ws.append(valid.astype(np.float64))
    return np.array(ys), np.array(ws)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("pattern", help="glob of the input GeoTIFFs, in date order by name")
    ap.add_argument("--pixels", type=int, default=2000)
    ap.add_argument("--lambda", dest="lam", type=float, default=1000.0)
    ap.add_argument("--repeats", type=int, default=5, help="passes over the window (median)")
    ap.add_argument("--with-sd", action="store_true",
                    help="also the sd kalends writes: sigma * sqrt(diag((W + lambda D'D)^-1)), "
                         "the diagonal from solveh_banded on the identity")
    a = ap.parse_args(argv)
    files = sorted(glob.glob(a.pattern))
    if len(files) < 3:
        sys.exit(f"scipy_whittaker: need >= 3 files matching {a.pattern}")
    y, w = read_window(files, a.pixels)
    n, p = y.shape
    base = a.lam * dtd_bands(n)
    wy = w * y

    ab = np.empty_like(base)
    z = np.empty_like(y)
    sd = np.empty_like(y)
    eye = np.eye(n)
    runs = []
    for _ in range(max(1, a.repeats)):      # median of passes: a pass takes only ms
        t0 = time.perf_counter()
        for j in range(p):
            ab[:] = base
            ab[2] += w[:, j]
            # Fewer than 2 valid values leave the system singular; a tiny ridge
            # keeps the solve defined and costs the same.
            if w[:, j].sum() < 2:
                ab[2] += 1e-9
            if a.with_sd:
                sol = solveh_banded(ab, np.column_stack([wy[:, j], eye]), check_finite=False)
                z[:, j] = sol[:, 0]
                diag = np.diagonal(sol[:, 1:])
                m = w[:, j].sum()
                trace = float(w[:, j] @ diag)
                rss = float(w[:, j] @ (y[:, j] - z[:, j]) ** 2)
                sd[:, j] = math.sqrt(max(rss, 0.0) / max(m - trace, 1e-9)) * np.sqrt(diag)
            else:
                z[:, j] = solveh_banded(ab, wy[:, j], check_finite=False)
        runs.append(time.perf_counter() - t0)
    secs = float(np.median(runs))
    print(json.dumps(dict(method="scipy.linalg.solveh_banded per pixel, order 2" + (", z and sd" if a.with_sd else ", z only"),
                          pixels=int(p), dates=int(n), lam=a.lam, passes=len(runs), solve_seconds=secs,
                          pixel_dates_per_s=p * n / secs, valid_fraction=float(w.mean()))))
    return 0


if __name__ == "__main__":
    sys.exit(main())
