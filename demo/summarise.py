#!/usr/bin/python3
"""Summary of a kalends demo run on the invented Lower Tamsin district stack.

Reads FILLED/fill-summary.json (counts written by `kalends fill`) and the
3-band outputs FILLED/ndvi_YYYY-MM-DD.tif (1 value, 2 sd, 3 flag: 0 observed
kept, 1 observed rejected as outlier, 2 filled, 3 could not be filled), and
compares the values with the synthetic truth. The truth is read from TRUTH
when a file of the same date exists, else recomputed from INPUT/synth.json
(outputs may fall on dates other than the composite dates). The errors check
mechanics on invented data; they are no accuracy claim for real imagery.

usage: /usr/bin/python3 demo/summarise.py --filled DIR --input DIR [--truth DIR]
"""

import argparse
import datetime as dt
import glob
import json
import os
import re
import sys

import numpy as np
from osgeo import gdal

sys.dont_write_bytecode = True   # no __pycache__ left in tools/
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tools"))
import synth_stack  # noqa: E402

gdal.UseExceptions()
FLAGS = {0: "observed, kept", 1: "observed, rejected as outlier", 2: "filled", 3: "not filled"}


def pct(a, b):
    return "n/a" if not b else f"{100.0 * a / b:.1f} %"


def gaps_total(s):
    # Output dates may differ from input dates (--every), so filled and unfilled
    # are shown as shares of their own sum, not of the input pixel-dates.
    return s.get("filled", 0) + s.get("unfilled", 0)


def summary_files(filled):
    """FILLED/fill-summary.json; for a tile set's mosaic folder, each tile's beside it."""
    own = os.path.join(filled, "fill-summary.json")
    if os.path.exists(own):
        return [own]
    return sorted(glob.glob(os.path.join(os.path.dirname(os.path.abspath(filled)), "*", "fill-summary.json")))


def print_counts(paths):
    if not paths:
        print("  (no fill-summary.json)")
        return
    parts = [json.load(open(p)) for p in paths]
    s = dict(parts[0])
    for key in ("pixel_dates", "observed", "missing", "rejected", "filled", "unfilled"):
        if all(key in part for part in parts):
            s[key] = sum(part[key] for part in parts)
    pdates = s.get("pixel_dates")
    dates = s.get("dates")
    ndates = len(dates) if isinstance(dates, list) else dates
    if len(parts) > 1:
        print(f"  {len(parts)} tiles, {ndates} dates, {pdates:,} pixel-dates")
    else:
        print(f"  {ndates} dates x {s.get('width')} x {s.get('height')} pixels = {pdates:,} pixel-dates")
    for key, base, what in (("observed", pdates, "of pixel-dates"),
                            ("missing", pdates, "of pixel-dates (nodata or removed by the QA rule)"),
                            ("rejected", s.get("observed"), "of observations (outliers, e.g. unmasked cloud)"),
                            ("filled", gaps_total(s), "of the cells to fill"),
                            ("unfilled", gaps_total(s), "of the cells to fill")):
        if key in s:
            print(f"  {key:<9} {s[key]:>12,}  {pct(s[key], base):>8} {what}")
    parameters = s.get("parameters")
    if isinstance(parameters, dict):  # an object since version 0.3.22, one text before
        parameters = " ".join(f"{k}={v}" for k, v in parameters.items())
    print(f"  method: {s.get('method')}  parameters: {parameters}")


def read_physical(band):
    a = band.ReadAsArray().astype(np.float64)
    nd = band.GetNoDataValue()
    if nd is not None:
        a[a == nd] = np.nan
    return a * (band.GetScale() or 1.0) + (band.GetOffset() or 0.0)


def main(argv=None):
    ap = argparse.ArgumentParser(description="Summarise a kalends demo run (synthetic data).")
    ap.add_argument("--filled", required=True)
    ap.add_argument("--input", required=True, help="the ndvi input folder (holds synth.json)")
    ap.add_argument("--truth", default=None)
    a = ap.parse_args(argv)

    print("kalends demo: Lower Tamsin district (fictional), synthetic NDVI")
    print("counts from fill-summary.json:")
    summaries = summary_files(a.filled)
    print_counts(summaries)

    manifest = os.path.join(a.input, "synth.json")
    m = json.load(open(manifest))
    scene = synth_stack.Scene(m["width"], m["height"], m["seed"], m["scenario"], m["start_year"], m["years"],
                              m.get("drought_year"))
    outs = sorted(glob.glob(os.path.join(a.filled, "ndvi_*.tif")) + glob.glob(os.path.join(a.filled, "ndvi_*.vrt")))
    if not outs:
        print(f"no outputs ndvi_*.tif in {a.filled}")
        return 1

    # Per flag: count, sum of errors, sum of squared errors; plus the year-long gap block.
    acc = {k: np.zeros(3) for k in list(FLAGS) + ["long_gap"]}
    within2sd = np.zeros(2)
    read_truth = recomputed = 0
    unscaled_note = False
    for path in outs:
        day = dt.date.fromisoformat(re.search(r"(\d{4}-\d{2}-\d{2})", os.path.basename(path)).group(1))
        ds = gdal.Open(path)
        if ds.RasterCount < 3:
            print(f"{path}: expected 3 bands (value, sd, flag), found {ds.RasterCount}")
            return 1
        value = read_physical(ds.GetRasterBand(1))
        sd = read_physical(ds.GetRasterBand(2))
        flag = ds.GetRasterBand(3).ReadAsArray()
        ds = None
        kept = flag == 0
        # Values in raw int16 units (no scale in the metadata) would show as |NDVI| >> 1.
        if kept.any() and np.nanmedian(np.abs(value[kept])) > 2.0:
            value, sd, unscaled_note = value * synth_stack.SCALE, sd * synth_stack.SCALE, True
        # The truth is written as GeoTIFFs; a tile set's mosaic names the same dates .vrt.
        tpath = os.path.join(a.truth, os.path.splitext(os.path.basename(path))[0] + ".tif") if a.truth else None
        if tpath and os.path.exists(tpath):
            truth = gdal.Open(tpath).ReadAsArray().astype(np.float64)
            read_truth += 1
        else:
            truth = scene.truth(day).astype(np.float64)
            recomputed += 1
        err = value - truth
        for k in FLAGS:
            sel = (flag == k) & np.isfinite(err)
            acc[k] += (sel.sum(), err[sel].sum(), (err[sel] ** 2).sum())
        in_gap = (day.year == m["start_year"] + 1) if m["years"] >= 2 else False
        if in_gap:
            sel = (flag == 2) & scene.hills & np.isfinite(err)
            acc["long_gap"] += (sel.sum(), err[sel].sum(), (err[sel] ** 2).sum())
        sel = (flag == 2) & np.isfinite(err) & np.isfinite(sd)
        within2sd += ((np.abs(err[sel]) <= 2 * sd[sel]).sum(), sel.sum())

    print(f"\nerror against the synthetic truth ({len(outs)} output dates; truth read for {read_truth},"
          f" recomputed for {recomputed}):")
    print(f"  {'cells':<40} {'count':>12} {'RMSE':>8} {'bias':>8}")
    labels = dict(FLAGS, long_gap="filled, inside the year-long cloud block")
    for k in (2, "long_gap", 0, 1):
        n, s, ss = acc[k]
        if n:
            print(f"  {labels[k]:<40} {int(n):>12,} {np.sqrt(ss / n):>8.4f} {s / n:>+8.4f}")
    if acc[3][0]:
        print(f"  {'not filled':<40} {int(acc[3][0]):>12,}")
    if within2sd[1]:
        print(f"  filled cells with |error| <= 2 sd: {pct(within2sd[0], within2sd[1])}")
    print("  (NDVI units; invented data: a check of the mechanics, not an accuracy claim)")
    if unscaled_note:
        print("  note: output values looked unscaled (raw int16 units) and were multiplied by 0.0001")
    print(f"\noutputs: {os.path.abspath(a.filled)}/ndvi_YYYY-MM-DD{os.path.splitext(outs[0])[1]} (bands: value, sd, flag)")
    for path in summaries:
        print(f"summary: {os.path.abspath(path)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
