#!/usr/bin/python3
"""Synthetic land-surface temperature (LST) stacks for the kalends demo: day and night
overpasses of the fictional Lower Tamsin district (the scene of synth_stack.py).

All data here is invented. The district rises from lowlands in the south (about 300 m) to
highlands in the north (up to about 2900 m); LST falls with height (6.5 K/km, common practice for
air; used here only to make a plausible gradient). By day bare ground is hottest and water
coolest; the warmest weeks come before the rains (October-November), the coolest in July.
Spatially correlated clouds hide about a quarter of the day values and a fifth of the night
values, more in the rainy months. It supports no claim of accuracy on real imagery.

Outputs, one file per 16-day composite (dates 1, 17, ... of each year):
  DIR/day/lst_day_YYYY-MM-DD.tif     uint16, kelvin x 50 (scale 0.02), nodata 0, unit K
  DIR/night/lst_night_YYYY-MM-DD.tif the same for the night overpass
  DIR/synth.json                     the parameters, written last (marks a complete stack)

usage: /usr/bin/python3 tools/synth_lst.py --out DIR [--width 512 --height 512]
         [--years 3] [--start-year 2021] [--seed 1]
"""

import argparse
import datetime as dt
import json
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import synth_stack as ss  # noqa: E402

SCALE = 0.02     # kelvin x 50, as LST products commonly store it
NODATA = 0
LAPSE_K_PER_KM = 6.5
# Day-time LST offset by land cover (K), classes of synth_stack.CLASSES.
DAY_COVER_OFFSET = np.array([2.0, 3.0, -3.0, 6.0, -6.0], np.float32)
NIGHT_COVER_OFFSET = np.array([0.0, 0.0, 1.0, -1.0, 3.0], np.float32)


def elevation_km(scene, rng):
    h, w = scene.height, scene.width
    north = 1.0 - np.arange(h, dtype=np.float32)[:, None] / max(h - 1, 1)  # 1 at the top row
    hills = 0.15 * np.clip(ss._standardise(ss._noise_field(rng, h, w, max(h, w) / 6)), -2, 2)
    return np.clip(0.3 + 2.6 * north ** 2 + hills, 0.1, 3.2).astype(np.float32)


def lst(scene, elev, day, passage, rng):
    """One composite's LST (kelvin, float32) and its cloud mask."""
    tau = scene.tau(day)
    season = np.cos(2 * np.pi * (tau - 0.85))  # warmest late October, coolest late April..July
    cover = scene.cls
    if passage == "day":
        k = 303.0 + 4.0 * season + DAY_COVER_OFFSET[cover] - LAPSE_K_PER_KM * elev
        cloud_share = 0.25
    else:
        k = 287.5 + 1.5 * season + NIGHT_COVER_OFFSET[cover] - LAPSE_K_PER_KM * elev
        cloud_share = 0.20
    k = k + rng.normal(0.0, 0.5, k.shape)
    rainy = ss._peak(np.array([tau % 1.0]), 0.33, 3.0)[0] + ss._peak(np.array([tau % 1.0]), 0.88, 6.0)[0]
    share = min(0.7, cloud_share * (0.6 + 0.6 * rainy))
    field = ss._to_uniform(ss._noise_field(rng, scene.height, scene.width, max(scene.width, scene.height) / 12))
    cloudy = field < share
    return k.astype(np.float32), cloudy


def write(path, kelvin, cloudy, day, passage):
    raw = np.where(cloudy, NODATA, np.clip(np.round(kelvin / SCALE), 1, 65535)).astype(np.uint16)
    h, w = raw.shape
    ds = ss._create(path, w, h, ss.gdal.GDT_UInt16, 2)
    ds.SetMetadataItem("COMPOSITE_DATE", day.isoformat())
    ds.SetMetadataItem("OVERPASS", "13:30 local solar time" if passage == "day" else "01:30 local solar time")
    band = ds.GetRasterBand(1)
    band.SetDescription("LST_%s" % passage)
    band.SetNoDataValue(NODATA)
    band.SetScale(SCALE)
    band.SetOffset(0.0)
    band.SetUnitType("K")
    band.WriteArray(raw)
    ds.FlushCache()
    ds = None


def make_lst(out_dir, width=512, height=512, years=3, start_year=2021, seed=1, quiet=False):
    scene = ss.Scene(width, height, seed=seed, scenario="demo", start_year=start_year, years=years)
    rng = np.random.default_rng([seed, 7])
    elev = elevation_km(scene, rng)
    dates = ss.composite_dates(start_year, years, 16)
    counts = {"day": [0, 0], "night": [0, 0]}
    for passage in ("day", "night"):
        os.makedirs(os.path.join(out_dir, passage), exist_ok=True)
    for day in dates:
        for passage in ("day", "night"):
            kelvin, cloudy = lst(scene, elev, day, passage, rng)
            write(os.path.join(out_dir, passage, "lst_%s_%s.tif" % (passage, day.isoformat())), kelvin, cloudy,
                  day, passage)
            counts[passage][0] += int(cloudy.sum())
            counts[passage][1] += cloudy.size
    manifest = {"scenario": "Lower Tamsin district (fictional), land-surface temperature",
                "invented": True, "width": width, "height": height, "start_year": start_year,
                "years": years, "seed": seed, "dates": len(dates), "scale": SCALE, "nodata": NODATA,
                "unit": "K", "lapse_k_per_km": LAPSE_K_PER_KM,
                "elevation_km": [float(elev.min()), float(elev.max())],
                "cloud_share": {p: c[0] / c[1] for p, c in counts.items()}}
    with open(os.path.join(out_dir, "synth.json"), "w") as f:
        json.dump(manifest, f, indent=2)
    if not quiet:
        print("synth_lst: %d dates x 2 overpasses of %d x %d px in %s (clouds: day %.0f %%, night %.0f %%)"
              % (len(dates), width, height, out_dir, 100 * manifest["cloud_share"]["day"],
                 100 * manifest["cloud_share"]["night"]), file=sys.stderr)
    return manifest


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--out", required=True)
    p.add_argument("--width", type=int, default=512)
    p.add_argument("--height", type=int, default=512)
    p.add_argument("--years", type=int, default=3)
    p.add_argument("--start-year", type=int, default=2021)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--quiet", action="store_true")
    a = p.parse_args(argv)
    make_lst(a.out, a.width, a.height, a.years, a.start_year, a.seed, a.quiet)


if __name__ == "__main__":
    main()
