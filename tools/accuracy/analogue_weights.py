#!/usr/bin/env python3
"""Compares ways of combining the neighbour analogues of spacetime's first round (stage 2 of
docs/methods.md) on a development stack: the inverse-variance mean that kalends uses, over all
neighbours or the best K, against a generalised-least-squares mean whose weights come from the
covariance of the pairs' residuals (pairs of one gap share the pixel's own deviation, and
neighbours next to each other share theirs, so their errors are correlated; Aitken 1935, Proc.
R. Soc. Edinb. 55:42-48, the GLS estimator of a common mean, from memory). The covariance
is estimated on the dates where the pixel and both neighbours were observed, weighed by the
same day-of-year kernel, and shrunk toward its diagonal by a share gamma (gamma = 1: the
inverse-variance mean of the best K).

Analysis only, nothing in kalends reads it; run it on development masks
(`kalends validate --keep-work`), never to choose anything on the masked files.

Usage:
  python3 tools/accuracy/analogue_weights.py --truth ../shared/data/alaska-ndvi/observed \\
      --input validation/work/input [--best 12]
"""
import argparse
import datetime
import glob
import os
import sys

import numpy as np
from osgeo import gdal

gdal.UseExceptions()

RADIUS = 6  # AnalogueSettings' defaults (src/fill/analogue.hpp)
SEASON_DAYS = 20.0
GAMMAS = (0.5, 0.8, 1.0)


def read_stack(folder):
    files = sorted(glob.glob(os.path.join(folder, "*.tif")))
    if not files:
        sys.exit(f"{folder}: no .tif files")
    planes = []
    for name in files:
        dataset = gdal.Open(name)
        band = dataset.GetRasterBand(1)
        plane = band.ReadAsArray().astype(float)
        nodata = band.GetNoDataValue()
        if nodata is not None and np.isfinite(nodata):
            plane[plane == nodata] = np.nan
        planes.append(plane)
        dataset = None
    day_of_year = []
    for name in files:
        stem = os.path.basename(name)[:-4]
        day_of_year.append(datetime.date.fromisoformat(stem[-10:]).timetuple().tm_yday)
    return np.stack(planes), np.array(day_of_year)


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--truth", required=True, help="folder of the complete stack")
    parser.add_argument("--input", required=True, help="folder of the stack with withheld cells")
    parser.add_argument("--best", type=int, default=12, help="neighbours K kept by variance")
    args = parser.parse_args()
    truth, day_of_year = read_stack(args.truth)
    values, _ = read_stack(args.input)
    if values.shape != truth.shape:
        sys.exit(f"{args.input}: shape {values.shape} differs from the truth's {truth.shape}")
    dates, rows, cols = values.shape
    observed = np.isfinite(values)
    apart = np.abs(day_of_year[:, None] - day_of_year[None, :])
    apart = np.minimum(apart, 365 - apart)
    kernel = np.exp(-0.5 * (apart / SEASON_DAYS) ** 2)
    errors = {"inverse variance, all": [], f"inverse variance, best {args.best}": []}
    for gamma in GAMMAS:
        errors[f"GLS, best {args.best}, gamma {gamma}"] = []
    for r in range(rows):
        for c in range(cols):
            own, own_observed = values[:, r, c], observed[:, r, c]
            gaps = np.where(~own_observed & np.isfinite(truth[:, r, c]))[0]
            if not own_observed.any() or len(gaps) == 0:
                continue
            neighbours = [(rr, cc) for rr in range(max(0, r - RADIUS), min(rows, r + RADIUS + 1))
                          for cc in range(max(0, c - RADIUS), min(cols, c + RADIUS + 1)) if (rr, cc) != (r, c)]
            other = np.stack([values[:, rr, cc] for rr, cc in neighbours])
            other_observed = np.isfinite(other)
            both = other_observed & own_observed[None]
            difference = np.where(both, own[None] - np.where(other_observed, other, 0.0), 0.0)
            for t in gaps:
                weights = kernel[t][None] * both
                s0, k2 = weights.sum(1), (weights ** 2).sum(1)
                usable = other_observed[:, t] & (s0 > 0) & (s0 ** 2 >= 2 * k2) & (both.sum(1) >= 3)
                if not usable.any():
                    continue
                idx = np.where(usable)[0]
                w, d, shared = weights[idx], difference[idx], both[idx]
                mean = (w * d).sum(1) / s0[idx]
                spread = np.maximum((w * d ** 2).sum(1) / s0[idx] - mean ** 2, 0)
                n_eff = s0[idx] ** 2 / k2[idx]
                n_all = shared.sum(1)
                prior = np.maximum((d ** 2 * shared).sum(1) / n_all - ((d * shared).sum(1) / n_all) ** 2, 1e-12)
                variance = (spread * n_eff + 2 * prior) / (n_eff + 2) * (1 + 1 / n_eff)
                prediction = other[idx, t] + mean
                true_value = truth[t, r, c]
                inverse = 1 / variance
                errors["inverse variance, all"].append(np.sum(inverse * prediction) / inverse.sum() - true_value)
                best = np.argsort(variance)[: args.best]
                inverse = 1 / variance[best]
                errors[f"inverse variance, best {args.best}"].append(
                    np.sum(inverse * prediction[best]) / inverse.sum() - true_value)
                residual = np.where(shared[best], d[best] - mean[best][:, None], 0.0)
                dated = shared[best] * kernel[t][None]
                numerator = (residual * dated) @ (residual * shared[best]).T
                denominator = dated @ shared[best].T.astype(float)
                covariance = np.where(denominator > 1e-9, numerator / np.maximum(denominator, 1e-9), 0.0)
                scale = np.sqrt(np.maximum(np.diag(covariance), 1e-12))
                correlation = np.clip(covariance / np.outer(scale, scale), -0.99, 0.99)
                np.fill_diagonal(correlation, 1.0)
                sd = np.sqrt(variance[best])
                for gamma in GAMMAS:
                    matrix = ((1 - gamma) * correlation + gamma * np.eye(len(best))) * np.outer(sd, sd)
                    try:
                        a = np.linalg.solve(matrix, np.ones(len(best)))
                    except np.linalg.LinAlgError:
                        a = inverse.copy()
                    a /= a.sum()
                    errors[f"GLS, best {args.best}, gamma {gamma}"].append(np.sum(a * prediction[best]) - true_value)
    for name, e in errors.items():
        e = np.asarray(e)
        print(f"{name:32s} cells {len(e):7d}  RMSE {np.sqrt(np.mean(e ** 2)):.5f}")


if __name__ == "__main__":
    main()
