#!/usr/bin/python3
"""Synthetic NDVI composite stacks for the kalends demo, tests and benchmarks.

All data here is invented. The `demo` scenario is the fictional Lower Tamsin
district: its south has two rainy seasons a year (NDVI peaks around April and
November), its north one (peak around August), with a smooth transition in
between. Land-cover patches set the NDVI level and amplitude; spatially
correlated clouds hide ~30 % of the values, and a few % more are cloud
contaminated but NOT masked, so an upper-envelope fit has something to do.
A hill block stays cloudy for a whole year (a long gap) and a lake is always
water. The data serves mechanics and the demo only; it supports no claim of
accuracy on real imagery.

Outputs (one file per composite date, dates 1, 1+step, ... restarting every
1 January, as 16-day composites do):
  DIR/ndvi_YYYY-MM-DD.tif   int16, scale 0.0001, nodata -3000 (cloudy/missing)
  QA/qa_YYYY-MM-DD.tif      (--qa) uint16; bits 0-1: 0 clear, 1 marginal,
                            2 cloudy, 3 other (no data); bits 2-3: 1 = water.
                            With --qa, cloudy pixels keep contaminated NDVI
                            values instead of nodata: the QA rule must drop them.
  TRUTH/ndvi_YYYY-MM-DD.tif (--truth) float32 noise- and cloud-free NDVI.
  DIR/synth.json            the parameters, written last (marks a complete
                            stack; lets truth_at() recompute the truth at any date).

usage: /usr/bin/python3 tools/synth_stack.py --out DIR [--width 512 --height 512]
         [--years 3 | --dates N] [--start-year 2021] [--step 16] [--seed 1]
         [--scenario demo|bench] [--qa [--qa-out QA]] [--truth TRUTH] [--quiet]
Use Debian's /usr/bin/python3 (numpy + osgeo.gdal). Importable: make_stack(),
composite_dates(), truth_at(), Scene.
"""

import argparse
import datetime as dt
import json
import math
import os
import sys
import time

import numpy as np
from osgeo import gdal, osr

gdal.UseExceptions()

SCALE = 0.0001
NODATA = -3000
# A real projected CRS (UTM 27S). The district is invented, and so is its place: open ocean in
# the equatorial Atlantic (about 21 W, 3-4 S), so that the demo's maps and survey coordinates
# name no real place (it lay on land in East Africa before version 0.3.18).
EPSG = 32727
PIXEL = 250.0         # metres
ORIGIN = (420000.0, 9650000.0)  # arbitrary upper-left corner
QA_CLEAR, QA_MARGINAL, QA_CLOUDY, QA_OTHER = 0, 1, 2, 3
QA_WATER_BIT = 1 << 2

# Land-cover classes: (name, NDVI base level, seasonal amplitude).
CLASSES = [
    ("cropland", 0.18, 0.55),
    ("savanna", 0.28, 0.38),
    ("forest", 0.62, 0.18),
    ("bare", 0.10, 0.06),
    ("water", -0.05, 0.0),
]


# ---------------------------------------------------------------- dates

def composite_dates(start_year=2021, years=3, step=16, count=None):
    """Composite dates: day-of-year 1, 1+step, ... per year. With `count`,
    as many years as needed are generated and the list is cut to `count`."""
    out = []
    y = start_year
    while True:
        if count is None and y >= start_year + years:
            break
        first = dt.date(y, 1, 1)
        ndays = (dt.date(y + 1, 1, 1) - first).days
        for doy in range(1, ndays + 1, step):
            out.append(first + dt.timedelta(days=doy - 1))
            if count is not None and len(out) == count:
                return out
        y += 1
    return out


# ---------------------------------------------------------------- fields

def _upsample(low, height, width, cell, off_y=0.0, off_x=0.0):
    """Smooth 'value noise': separable interpolation of a coarse grid with a
    smoothstep weight (C1, avoids the diamond artefacts of plain bilinear)."""
    def axis(n, off):
        pos = (np.arange(n, dtype=np.float64) + 0.5) / cell + off
        i0 = np.floor(pos).astype(np.int64)
        f = pos - i0
        f = (f * f * (3.0 - 2.0 * f)).astype(np.float32)
        return i0, f
    iy, fy = axis(height, off_y)
    ix, fx = axis(width, off_x)
    rows = low[iy] * (1.0 - fy)[:, None] + low[iy + 1] * fy[:, None]
    return rows[:, ix] * (1.0 - fx) + rows[:, ix + 1] * fx


def _noise_field(rng, height, width, cell):
    """Correlated field with unit-ish spread; `cell` sets the blob size in pixels."""
    cell = max(1.0, float(cell))
    gh = int(math.ceil(height / cell)) + 3
    gw = int(math.ceil(width / cell)) + 3
    low = rng.standard_normal((gh, gw)).astype(np.float32)
    oy, ox = rng.uniform(0.0, 1.0, 2)
    return _upsample(low, height, width, cell, oy, ox)


def _standardise(f):
    # Spread from a strided subsample: cheap at 2048^2, exact enough for thresholds.
    sub = f[::4, ::4]
    return (f - sub.mean()) / max(float(sub.std()), 1e-6)


def _to_uniform(f):
    """Rank-transform to (0,1) so class shares are set by thresholds."""
    sub = np.sort(f[::4, ::4].ravel())
    return np.interp(f, sub, np.linspace(0.0, 1.0, sub.size)).astype(np.float32)


def _norm_quantile(p):
    # Tukey-lambda approximation of the normal quantile (error ~1e-2): no scipy needed.
    p = np.clip(p, 1e-4, 1.0 - 1e-4)
    return 4.91 * (p ** 0.14 - (1.0 - p) ** 0.14)


# ---------------------------------------------------------------- seasonal shapes

def _peak(tau, centre, k):
    """Periodic bump in (0,1], maximal at fraction-of-year `centre`."""
    return np.exp(k * (np.cos(2.0 * np.pi * (tau - centre)) - 1.0))


_TAU_GRID = np.linspace(0.0, 1.0, 1001)


def _uni(tau):
    return _peak(tau, 0.60, 2.0)                       # one peak, early August


_BI_NORM = float((0.55 * _peak(_TAU_GRID, 0.285, 5.0)
                  + 0.45 * _peak(_TAU_GRID, 0.86, 5.0)).max())


def _bi(tau):
    # peaks mid-April and mid-November
    return (0.55 * _peak(tau, 0.285, 5.0) + 0.45 * _peak(tau, 0.86, 5.0)) / _BI_NORM


def _rain_uni(tau):
    return _peak(tau, 0.52, 3.0)                       # rains lead the greenness by ~1 month


def _rain_bi(tau):
    return np.maximum(_peak(tau, 0.21, 7.0), _peak(tau, 0.78, 7.0))


# ---------------------------------------------------------------- the scene

class Scene:
    """Static per-pixel fields, deterministic in (seed, size, scenario)."""

    def __init__(self, width, height, seed=1, scenario="demo", start_year=2021, years=3,
                 drought_year=None):
        self.width, self.height = width, height
        self.seed, self.scenario = seed, scenario
        self.start_year, self.years = start_year, years
        rng = np.random.default_rng([seed, 0])
        h, w = height, width
        scale = max(w, h)

        # Regime: w_bi = 0 in the north (unimodal), 1 in the south (bimodal);
        # the boundary wiggles so the transition is not a straight line.
        s = (np.arange(h, dtype=np.float32) / max(h - 1, 1))[:, None]
        s = s + 0.08 * _standardise(_noise_field(rng, h, w, scale / 4))
        x = np.clip((s - 0.35) / 0.30, 0.0, 1.0)
        self.w_bi = (x * x * (3.0 - 2.0 * x)).astype(np.float32)

        # Land cover from two smooth fields: patches of ~scale/16 pixels.
        a = _to_uniform(_noise_field(rng, h, w, scale / 16) + 0.4 * _noise_field(rng, h, w, scale / 48))
        b = _to_uniform(_noise_field(rng, h, w, scale / 24))
        cls = np.where(a < 0.40, 0, np.where(a < 0.75, 1, 2)).astype(np.uint8)
        cls[b > 0.94] = 3
        yy, xx = np.ogrid[0:h, 0:w]
        lake = ((yy - 0.25 * h) / (0.05 * h)) ** 2 + ((xx - 0.30 * w) / (0.08 * w)) ** 2 < 1.0
        cls[lake] = 4
        self.cls = cls
        self.water = lake

        base = np.array([c[1] for c in CLASSES], np.float32)[cls]
        amp = np.array([c[2] for c in CLASSES], np.float32)[cls]
        # Within-class variation: pixels of a class are alike, not identical.
        base = base + 0.04 * (_to_uniform(_noise_field(rng, h, w, scale / 64)) - 0.5)
        amp = amp * (0.85 + 0.30 * _to_uniform(_noise_field(rng, h, w, scale / 32)))
        self.base = base.astype(np.float32)
        self.amp = amp.astype(np.float32)

        # Per-pixel timing offsets (fraction of a year, +-9 days); skipped for
        # the bench so each date costs a handful of array operations.
        if scenario == "demo":
            self.shift = (0.025 * np.clip(_standardise(_noise_field(rng, h, w, scale / 8)), -2, 2)
                          / 2).astype(np.float32)
        else:
            self.shift = None

        # A hill block that stays cloudy for one whole year (a long gap).
        self.hills = ((yy - 0.55 * h) / (0.07 * h)) ** 2 + ((xx - 0.70 * w) / (0.07 * w)) ** 2 < 1.0

        # Inter-annual variation of amplitude per regime, interpolated between
        # mid-year nodes so nothing jumps on 1 January.
        yrng = np.random.default_rng([seed, 2])
        self._year_nodes = np.arange(-1, years + 2, dtype=np.float64) + 0.5
        self._f_uni = 1.0 + 0.10 * yrng.standard_normal(self._year_nodes.size)
        self._f_bi = 1.0 + 0.10 * yrng.standard_normal(self._year_nodes.size)
        # An invented drought: both rainy seasons of the south fail in that year, so its
        # vegetation reaches a third of the usual seasonal amplitude.
        self.drought_year = drought_year
        if drought_year is not None:
            k = drought_year - start_year + 1      # node at mid-year of drought_year
            if 0 <= k < self._f_bi.size:
                self._f_bi[k] = 0.35

    def tau(self, day):
        """Time in years since 1 January of start_year (continuous)."""
        return (day - dt.date(self.start_year, 1, 1)).days / 365.25

    def truth(self, day):
        """Noise- and cloud-free NDVI on `day` (float32 array)."""
        t = self.tau(day)
        f_uni = float(np.interp(t, self._year_nodes, self._f_uni))
        f_bi = float(np.interp(t, self._year_nodes, self._f_bi))
        tt = t if self.shift is None else (t - self.shift)
        season = (1.0 - self.w_bi) * (f_uni * _uni(tt)) + self.w_bi * (f_bi * _bi(tt))
        return (self.base + self.amp * season).astype(np.float32)

    def observe(self, day):
        """One composite: (ndvi float32, masked bool, contaminated bool, qa uint16, dropout bool).
        `masked` pixels are cloudy (QA 2); `contaminated` ones are cloud-affected
        but pass as clear/marginal; `dropout` pixels have no data at all (QA 3)."""
        h, w = self.height, self.width
        rng = np.random.default_rng([self.seed, 1, day.toordinal()])
        truth = self.truth(day)
        obs = truth + rng.normal(0.0, 0.012, (h, w)).astype(np.float32)

        t = self.tau(day)
        rain = (1.0 - self.w_bi) * float(_rain_uni(t)) + self.w_bi * float(_rain_bi(t))
        # Some dates are nearly clear, some heavily clouded, everywhere at once.
        date_factor = float(np.clip(rng.lognormal(0.0, 0.45), 0.15, 2.5))
        p = np.clip((0.11 + 0.62 * rain) * date_factor, 0.01, 0.97)
        scale = max(w, h)
        cell = scale / (12 if self.scenario == "demo" else 8)
        clouds = _standardise(_noise_field(rng, h, w, cell) + 0.35 * _noise_field(rng, h, w, cell / 4))
        thr = -_norm_quantile(p)                          # P(field > thr) ~= p
        masked = clouds > thr
        # Thin cloud / shadow rim around detected clouds, and small haze patches:
        # both lower NDVI and both escape the mask.
        rim = (~masked) & (clouds > thr - 0.12)
        haze = _standardise(_noise_field(rng, h, w, cell / 3)) > 2.1
        contaminated = (rim | haze) & ~masked
        if self.years >= 2:
            long_gap = day.year == self.start_year + 1
        else:
            long_gap = 90 <= day.timetuple().tm_yday <= 180
        if long_gap:
            masked |= self.hills
            contaminated &= ~self.hills

        # Mix towards a cloud's NDVI: partly for contamination, mostly for cloud
        # (cloudy values only survive in QA mode, where QA must remove them).
        u = rng.uniform(0.0, 1.0, (h, w)).astype(np.float32)
        cloud_ndvi = 0.02
        mix = np.where(masked, 0.75 + 0.25 * u, np.where(contaminated, 0.25 + 0.45 * u, 0.0))
        obs = obs + (cloud_ndvi - obs) * mix

        # Rare sensor dropout: a diagonal stripe without data.
        dropout = np.zeros((h, w), bool)
        if rng.uniform() < 0.04:
            yy, xx = np.ogrid[0:h, 0:w]
            c = rng.uniform(0.2, 0.8) * (h + w)
            dropout = np.abs((yy + xx) - c) < 0.05 * (h + w)

        qa = np.where(masked, QA_CLOUDY, np.where(rim, QA_MARGINAL, QA_CLEAR)).astype(np.uint16)
        qa[dropout] = QA_OTHER
        qa[self.water] |= QA_WATER_BIT
        obs = np.clip(obs, -0.2, 1.0)
        return obs, masked, contaminated & ~dropout, qa, dropout


# ---------------------------------------------------------------- writing

def _srs_wkt():
    srs = osr.SpatialReference()
    srs.ImportFromEPSG(EPSG)
    return srs.ExportToWkt()


def _create(path, width, height, dtype, predictor):
    opts = ["TILED=YES", "BLOCKXSIZE=256", "BLOCKYSIZE=256", "COMPRESS=DEFLATE",
            f"PREDICTOR={predictor}"]
    ds = gdal.GetDriverByName("GTiff").Create(path, width, height, 1, dtype, options=opts)
    ds.SetGeoTransform((ORIGIN[0], PIXEL, 0.0, ORIGIN[1], 0.0, -PIXEL))
    ds.SetProjection(_srs_wkt())
    ds.SetMetadataItem("SYNTHETIC", "invented data (kalends synth_stack); no real place")
    return ds


def _write(path, array, dtype, predictor, day, nodata=None, scale=None, desc="NDVI"):
    h, w = array.shape
    ds = _create(path, w, h, dtype, predictor)
    ds.SetMetadataItem("COMPOSITE_DATE", day.isoformat())
    band = ds.GetRasterBand(1)
    band.SetDescription(desc)
    if nodata is not None:
        band.SetNoDataValue(nodata)
    if scale is not None:
        band.SetScale(scale)
        band.SetOffset(0.0)
    band.WriteArray(array)
    ds.FlushCache()
    ds = None


def make_stack(out_dir, width=512, height=512, years=3, start_year=2021, step=16, seed=1,
               scenario="demo", qa_dir=None, truth_dir=None, dates=None, verbose=False,
               drought_year=None):
    """Write a synthetic stack; returns a dict of counts and the file list.
    `dates` (an int) overrides `years`: that many composites from start_year."""
    if scenario not in ("demo", "bench"):
        raise ValueError(f"unknown scenario {scenario!r}")
    days = composite_dates(start_year, years, step, count=dates)
    n_years = days[-1].year - start_year + 1
    for d in (out_dir, qa_dir, truth_dir):
        if d:
            os.makedirs(d, exist_ok=True)
    manifest = os.path.join(out_dir, "synth.json")
    if os.path.exists(manifest):
        os.remove(manifest)          # rewritten last: its presence means complete

    scene = Scene(width, height, seed, scenario, start_year, n_years, drought_year)
    counts = dict(pixel_dates=0, masked=0, contaminated=0, dropout=0)
    files = []
    t0 = time.time()
    for i, day in enumerate(days):
        obs, masked, contam, qa, dropout = scene.observe(day)
        raw = np.rint(obs / SCALE).astype(np.int16)
        raw[dropout] = NODATA
        if not qa_dir:
            raw[masked] = NODATA     # without QA the cloud mask is the nodata value
        name = f"ndvi_{day.isoformat()}.tif"
        path = os.path.join(out_dir, name)
        _write(path, raw, gdal.GDT_Int16, 2, day, nodata=NODATA, scale=SCALE)
        files.append(path)
        if qa_dir:
            _write(os.path.join(qa_dir, f"qa_{day.isoformat()}.tif"), qa, gdal.GDT_UInt16, 2, day,
                   desc="QA")
        if truth_dir:
            _write(os.path.join(truth_dir, name), scene.truth(day), gdal.GDT_Float32, 3, day,
                   desc="NDVI truth (synthetic)")
        counts["pixel_dates"] += raw.size
        counts["masked"] += int((masked & ~dropout).sum())
        counts["contaminated"] += int(contam.sum())
        counts["dropout"] += int(dropout.sum())
        if verbose and (i + 1) % 23 == 0:
            print(f"synth: {i + 1}/{len(days)} dates, {time.time() - t0:.1f} s", file=sys.stderr)

    info = dict(generator="kalends tools/synth_stack.py", synthetic=True,
                district="Lower Tamsin district (fictional)" if scenario == "demo" else None,
                width=width, height=height, start_year=start_year, years=n_years, step=step,
                seed=seed, scenario=scenario, drought_year=drought_year, dates=[d.isoformat() for d in days],
                scale=SCALE, nodata=NODATA, epsg=EPSG, pixel_m=PIXEL,
                qa=bool(qa_dir), counts=counts, seconds=round(time.time() - t0, 2))
    with open(manifest, "w") as f:
        json.dump(info, f, indent=1)
    info["files"] = files
    return info


def truth_at(manifest_path, days):
    """Recompute the synthetic truth on arbitrary dates from a stack's synth.json
    (for outputs on dates other than the composite dates). Yields float32 arrays."""
    with open(manifest_path) as f:
        m = json.load(f)
    scene = Scene(m["width"], m["height"], m["seed"], m["scenario"], m["start_year"], m["years"],
                  m.get("drought_year"))
    for day in days:
        yield scene.truth(day)


def main(argv=None):
    ap = argparse.ArgumentParser(description="Write a synthetic (invented) NDVI composite stack.")
    ap.add_argument("--out", required=True, help="folder for ndvi_YYYY-MM-DD.tif")
    ap.add_argument("--width", type=int, default=512)
    ap.add_argument("--height", type=int, default=512)
    ap.add_argument("--years", type=int, default=3)
    ap.add_argument("--dates", type=int, default=None, help="number of composites (overrides --years)")
    ap.add_argument("--start-year", type=int, default=2021)
    ap.add_argument("--step", type=int, default=16, help="days between composites")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--scenario", choices=("demo", "bench"), default="demo")
    ap.add_argument("--qa", action="store_true", help="also write a QA stack; clouds stay as values")
    ap.add_argument("--qa-out", default=None, help="QA folder (default OUT/../qa)")
    ap.add_argument("--truth", default=None, help="folder for the float32 cloud-free truth")
    ap.add_argument("--drought-year", type=int, default=None,
                    help="an invented drought year: the south's rainy seasons fail")
    ap.add_argument("--quiet", action="store_true")
    a = ap.parse_args(argv)
    qa_dir = (a.qa_out or os.path.join(os.path.dirname(os.path.abspath(a.out)), "qa")) if a.qa else None
    info = make_stack(a.out, a.width, a.height, a.years, a.start_year, a.step, a.seed, a.scenario,
                      qa_dir, a.truth, a.dates, verbose=not a.quiet, drought_year=a.drought_year)
    c = info["counts"]
    n = c["pixel_dates"]
    if not a.quiet:
        print(f"synth: {len(info['dates'])} dates {a.width}x{a.height} in {info['seconds']} s; "
              f"cloudy {100 * c['masked'] / n:.1f} %, dropout {100 * c['dropout'] / n:.1f} %, "
              f"unmasked contamination {100 * c['contaminated'] / n:.1f} %", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
