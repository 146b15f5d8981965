#!/usr/bin/env python3
"""How well could a neighbour-based filler do on the Alaska variants if it knew every neighbour?

An oracle, not a method: it predicts each withheld cell of the masked variants from the *observed*
stack, i.e. with the true values of all neighbours on the same date and the pixel's own true
values on every other date, information no filler has. Two parts, by the kind of cell:

- cells of pixels observed on some date: leave-one-out neighbour analogues (kalends's analogue
  stage in its simplest form, docs/methods.md): from each neighbour q within `radius` pixels,
  y(q, t) + mean over the other dates of (y(p, s) - y(q, s)), combined by inverse variance;
- cells of pixels never observed in the variant: normalised convolution of the true values of
  all other pixels on that date [KW93], Gaussian sd `--sd` pixels.

Knutsson & Westin (1993), Normalized and differential convolution, Proc. IEEE CVPR 515-523 (from
memory). The result is a reference point for the accuracy targets, not a bound: a filler could
use other information (the pixel's own seasonal model) and beat it.

Usage: python3 tools/accuracy/neighbour_oracle.py [--data ../shared/data/alaska-ndvi]
"""
import argparse
import glob
import os
import sys

import numpy as np
from scipy.ndimage import gaussian_filter

from error_anatomy import read_stack  # its neighbour in tools/accuracy: one-line errors


def shifted(stack, dy, dx):
    """stack moved so that out[:, r, c] = stack[:, r + dy, c + dx], NaN outside."""
    _, h, w = stack.shape
    out = np.full_like(stack, np.nan)
    out[:, max(0, -dy):h - max(0, dy), max(0, -dx):w - max(0, dx)] = \
        stack[:, max(0, dy):h - max(0, -dy), max(0, dx):w - max(0, -dx)]
    return out


def analogue_oracle(truth, radius):
    """Leave-one-out analogue prediction of every cell from the full truth."""
    num = np.zeros_like(truth)
    den = np.zeros_like(truth)
    for dy in range(-radius, radius + 1):
        for dx in range(-radius, radius + 1):
            if dy == 0 and dx == 0:
                continue
            q = shifted(truth, dy, dx)
            d = truth - q
            both = np.isfinite(d)
            dz = np.where(both, d, 0.0)
            # Sums over all dates, less the date being predicted.
            n = both.sum(0)[None] - both
            s1 = dz.sum(0)[None] - dz
            s2 = (dz ** 2).sum(0)[None] - dz ** 2
            ok = np.isfinite(q) & (n >= 3)
            safe_n = np.maximum(n, 1)
            mean = s1 / safe_n
            var = np.maximum(s2 / safe_n - mean ** 2, 1e-6) * (1 + 1 / safe_n)
            w = np.where(ok, 1 / var, 0.0)
            num += w * np.where(ok, q + mean, 0.0)
            den += w
    return num / np.where(den > 0, den, np.nan)


def convolution_oracle(truth, never, sd):
    """Normalised convolution of the truth of the other pixels, date by date."""
    out = np.full_like(truth, np.nan)
    for t in range(truth.shape[0]):
        known = np.isfinite(truth[t]) & ~never
        num = gaussian_filter(np.where(known, truth[t], 0.0), sd, mode="constant")
        den = gaussian_filter(known.astype(float), sd, mode="constant")
        out[t] = np.where(den > 1e-9, num / np.maximum(den, 1e-9), np.nan)
    return out


def rmse(e):
    e = e[np.isfinite(e)]
    return float(np.sqrt(np.mean(e ** 2))) if e.size else float("nan")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    here = os.path.dirname(os.path.abspath(__file__))
    parser.add_argument("--data", default=os.path.join(here, "..", "..", "..", "shared", "data", "alaska-ndvi"))
    parser.add_argument("--radius", type=int, default=2)
    parser.add_argument("--sd", type=float, default=3.0)
    args = parser.parse_args()
    names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(args.data, "observed", "*.tif")))
    if not names:
        sys.exit("neighbour_oracle: %s: no .tif files" % os.path.join(args.data, "observed"))
    truth = read_stack(os.path.join(args.data, "observed"), names)
    analogue = analogue_oracle(truth, args.radius)
    print("| variant | withheld cells | of pixels never observed | analogue oracle | convolution oracle "
          "(never observed) | both |")
    print("|---|---|---|---|---|---|")
    for variant in ("masked20", "masked30", "masked40", "masked50"):
        masked = read_stack(os.path.join(args.data, variant), names)
        never = (~np.isfinite(masked)).all(0)
        withheld = np.isfinite(truth) & ~np.isfinite(masked)
        of_never = withheld & never[None]
        of_seen = withheld & ~never[None]
        convolution = convolution_oracle(truth, never, args.sd)
        both = np.where(never[None], convolution, analogue)
        print(f"| {variant} | {withheld.sum()} | {of_never.sum() / withheld.sum():.0%} | "
              f"{rmse((analogue - truth)[of_seen]):.4f} | {rmse((convolution - truth)[of_never]):.4f} | "
              f"{rmse((both - truth)[withheld]):.4f} (coverage {np.isfinite(both[withheld]).mean():.1%}) |")


if __name__ == "__main__":
    main()
