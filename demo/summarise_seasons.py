#!/usr/bin/python3
"""Summary of the demo's seasonal layers: how many growing seasons kalends finds in the
invented district's north (one rainy season) and south (two), and whether the invented
drought year stands out in the anomalies. Invented data: a check of the mechanics, not an
accuracy claim."""
import argparse
import json
import os
import sys

import numpy as np
from osgeo import gdal

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tools"))
import synth_stack  # noqa: E402

gdal.UseExceptions()


def regimes(manifest):
    """North (unimodal) and south (bimodal) vegetated pixels of the invented scene."""
    m = json.load(open(manifest))
    scene = synth_stack.Scene(m["width"], m["height"], m["seed"], m["scenario"], m["start_year"],
                              m["years"], m.get("drought_year"))
    vegetated = scene.cls <= 2          # cropland, savanna, forest
    return scene.w_bi < 0.05, scene.w_bi > 0.95, vegetated, m.get("drought_year")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seasons", required=True)
    ap.add_argument("--compare", required=True)
    ap.add_argument("--manifest", required=True)
    ap.add_argument("--name", default="ndvi")
    a = ap.parse_args()
    north, south, vegetated, drought = regimes(a.manifest)
    ds = gdal.Open(os.path.join(a.seasons, f"{a.name}_cycle_synoptic.tif"))
    names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
    seasons = ds.GetRasterBand(names.index("seasons") + 1).ReadAsArray()
    n_one = np.mean(seasons[north & vegetated] == 1)
    n_two = np.mean(seasons[south & vegetated] == 2)
    print("seasonal layers (synoptic cycle), vegetated pixels of the invented district:")
    print(f"  north (one rainy season):  {100 * n_one:5.1f} % of {int((north & vegetated).sum()):,} pixels show 1 season")
    print(f"  south (two rainy seasons): {100 * n_two:5.1f} % of {int((south & vegetated).sum()):,} pixels show 2 seasons")
    report = json.load(open(os.path.join(a.compare, "compare.json")))
    print("anomalies by year (mean over the raster; share of pixel-months below -1 sd):")
    for y in report["years"]:
        mark = "   <- the invented drought year" if drought and y["year"] == drought else ""
        print(f"  {y['year']}: {y['mean_anomaly']:+.4f}  {100 * y['share_below_minus_1_sd']:5.1f} %{mark}")
    if drought:
        anomaly = gdal.Open(os.path.join(a.seasons, f"{a.name}_anomaly_{drought}.tif")).ReadAsArray()
        south_mean = np.nanmean(anomaly[:, south & vegetated])
        north_mean = np.nanmean(anomaly[:, north & vegetated])
        print(f"  {drought} mean anomaly: south {south_mean:+.4f}, north {north_mean:+.4f} (NDVI)")
    print(f"outputs: {os.path.abspath(a.seasons)} and {os.path.abspath(a.compare)}/compare.md")
    return 0


if __name__ == "__main__":
    sys.exit(main())
