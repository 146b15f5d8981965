#!/usr/bin/env python3
"""Reference timing for the spacetime method's penalised least squares (not a test).

Solves one problem (W + P) z = W y on a stack, with P = s_space (L_row + L_col)^2 + s_time L_t^2,
twice, to the same relative residual:
  - numpy/scipy: conjugate gradients preconditioned by (I + P)^-1, P applied and inverted with
    scipy.fft.dctn/idctn (norm='ortho'). This is the published method (Garcia 2010, Comput. Stat.
    Data Anal. 54:1167-1178: the DCT diagonalises P; his iteration operator used as the
    preconditioner), written independently of kalends;
  - kalends: detail::solve_pls through build/tests/kalends_probe ("pls_timed"), plans made
    before the clock starts; in single precision (as `kalends fill --method spacetime` solves at
    tolerances of 1e-5 and coarser) and in double.
Prints the medians of --repeats solves and their ratio, and the largest difference between the
two solutions; --json writes them.

usage: tools/bench/pls_reference.py STACK_GLOB [--tolerance 1e-4] [--space 3] [--time 0.3]
                                    [--repeats 3] [--json FILE]
"""
import argparse
import glob
import json
import os
import statistics
import subprocess
import sys
import time

import numpy as np
import scipy.fft
from osgeo import gdal

ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))
PROBE = os.environ.get("KALENDS_PROBE", os.path.join(ROOT, "build", "tests", "kalends_probe"))


def read_stack(pattern):
    paths = sorted(glob.glob(pattern))
    if not paths:
        sys.exit("pls_reference.py: no file matches %s" % pattern)
    planes = []
    for p in paths:
        ds = gdal.Open(p)
        if ds is None:
            sys.exit("pls_reference.py: %s: GDAL cannot open it" % p)
        band = ds.GetRasterBand(1)
        a = band.ReadAsArray().astype(np.float64)
        nodata = band.GetNoDataValue()
        if nodata is not None and not np.isnan(nodata):
            a[a == nodata] = np.nan
        planes.append(a)
        ds = None
    y = np.stack(planes, axis=-1)  # rows, cols, dates: time fastest, as kalends stores it
    w = np.isfinite(y).astype(np.float64)
    y = np.where(w > 0, y, 0.0)
    y[w > 0] -= y[w > 0].mean()  # the constant is free in P: remove it for both solvers
    return y, w


def penalty(shape, s_space, s_time):
    lam = [-2.0 + 2.0 * np.cos(np.pi * np.arange(n) / n) for n in shape]
    space = lam[0][:, None, None] + lam[1][None, :, None]
    return s_space * space ** 2 + s_time * lam[2][None, None, :] ** 2


def solve_numpy(y, w, s_space, s_time, tolerance, max_iterations=5000):
    p = penalty(y.shape, s_space, s_time)
    dct = lambda x: scipy.fft.dctn(x, norm="ortho", workers=1)
    idct = lambda x: scipy.fft.idctn(x, norm="ortho", workers=1)
    apply = lambda x: w * x + idct(p * dct(x))
    precondition = lambda r: idct(dct(r) / (1.0 + p))
    b = w * y
    b_norm = np.linalg.norm(b) or 1.0
    z = np.zeros_like(y)
    r = b.copy()
    q = precondition(r)
    d = q.copy()
    rq = np.vdot(r, q)
    iterations = 0
    while np.linalg.norm(r) / b_norm > tolerance and iterations < max_iterations:
        ad = apply(d)
        alpha = rq / np.vdot(d, ad)
        z += alpha * d
        r -= alpha * ad
        q = precondition(r)
        rq_next = np.vdot(r, q)
        d = q + (rq_next / rq) * d
        rq = rq_next
        iterations += 1
    return z, iterations


def solve_kalends(y, w, s_space, s_time, tolerance, single):
    header = "pls_timed %r %r %r %d %d %d %d" % ((s_space, s_time, tolerance) + y.shape +
                                                 (1 if single else 0,))
    text = "\n".join([header, " ".join("%.9g" % v for v in y.ravel()),
                      " ".join("%g" % v for v in w.ravel())]) + "\n"
    done = subprocess.run([PROBE], input=text, capture_output=True, text=True)
    if done.returncode != 0:
        sys.exit("pls_reference.py: probe failed: " + done.stderr.strip())
    out = json.loads(done.stdout)
    return np.array(out["z"]).reshape(y.shape), out["iterations"], out["seconds"]


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("stack")
    ap.add_argument("--tolerance", type=float, default=1e-4)
    ap.add_argument("--space", type=float, default=3.0)
    ap.add_argument("--time", type=float, default=0.3)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--json")
    a = ap.parse_args()
    if not os.access(PROBE, os.X_OK):
        sys.exit("pls_reference.py: %s not found (tools/build.sh)" % PROBE)
    y, w = read_stack(a.stack)
    numpy_s, kalends_s, double_s = [], [], []
    for _ in range(a.repeats):
        t0 = time.perf_counter()
        z_numpy, it_numpy = solve_numpy(y, w, a.space, a.time, a.tolerance)
        numpy_s.append(time.perf_counter() - t0)
        z_kalends, it_kalends, s = solve_kalends(y, w, a.space, a.time, a.tolerance, True)
        kalends_s.append(s)
        z_double, it_double, s = solve_kalends(y, w, a.space, a.time, a.tolerance, False)
        double_s.append(s)
    result = dict(shape=list(y.shape), observed_share=float(w.mean()), tolerance=a.tolerance,
                  s_space=a.space, s_time=a.time, repeats=a.repeats,
                  numpy_median_s=statistics.median(numpy_s), numpy_iterations=it_numpy,
                  kalends_median_s=statistics.median(kalends_s), kalends_iterations=it_kalends,
                  numpy_over_kalends=statistics.median(numpy_s) / statistics.median(kalends_s),
                  max_abs_difference=float(np.max(np.abs(z_numpy - z_kalends))),
                  kalends_double_median_s=statistics.median(double_s),
                  kalends_double_iterations=it_double,
                  numpy_over_kalends_double=statistics.median(numpy_s) / statistics.median(double_s),
                  double_max_abs_difference=float(np.max(np.abs(z_numpy - z_double))),
                  data_sd=float(np.std(y[w > 0])))
    print("PLS solve %s, %.0f %% observed, tolerance %g: numpy/scipy %.2f s (%d iterations), "
          "kalends single precision %.2f s (%d iterations), numpy / kalends = %.1f, largest "
          "difference %.2g (%.2g data sd); kalends double precision %.2f s (%d iterations), "
          "numpy / kalends = %.1f"
          % ("x".join(map(str, y.shape)), 100 * result["observed_share"], a.tolerance,
             result["numpy_median_s"], it_numpy, result["kalends_median_s"], it_kalends,
             result["numpy_over_kalends"], result["max_abs_difference"],
             result["max_abs_difference"] / result["data_sd"], result["kalends_double_median_s"],
             it_double, result["numpy_over_kalends_double"]))
    if a.json:
        with open(a.json, "w") as f:
            json.dump(result, f, indent=1)


if __name__ == "__main__":
    main()
