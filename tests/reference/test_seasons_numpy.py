#!/usr/bin/python3
"""Seasonal kernels and `kalends seasons` / `kalends index` checked against numpy and scipy.

References:
- peaks and prominences: scipy.signal.find_peaks / peak_prominences (SciPy 1.10), the
  definition kalends implements (src/season/peaks.cpp);
- harmonics: numpy.fft.rfft, X_k = sum_n x_n exp(-2 pi i k n / N); amplitude 2|X_k|/N; as
  A cos(2 pi k (n - n0) / N) has X_k = (N A / 2) exp(-2 pi i k n0 / N) (the DFT definition of
  the numpy.fft documentation), the first peak of harmonic k is at
  n* = (-arg X_k / (2 pi) mod 1) N / k; positions become days through the periods' middle days
  (January: day 16), computed here with datetime;
- period means and synoptic statistics: a direct numpy computation of the same day-weighted
  means (each composite stands for the 16 days from its date, cut at the next composite);
- NDVI = (NIR - red)/(NIR + red); EVI = 2.5 (NIR - red)/(NIR + 6 red - 7.5 blue + 1)
  (Huete et al. 2002, Remote Sens. Environ. 83:195) on ../shared/data/landsat7-bands;
- the real NetCDF stack ../shared/data/monthly-temperature (Maurer et al. 2002): amplitude and
  month of maximum per cell.
"""
import datetime as dt
import glob
import json
import os
import shutil
import subprocess
import sys
import unittest

import numpy as np
from scipy.signal import find_peaks

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

SEASON_PROBE = os.environ.get("KALENDS_SEASON_PROBE",
                              os.path.join(kt.REPO_ROOT, "build", "tests", "kalends_season_probe"))
YEAR = 365.25


def season_probe(text):
    kt.require_binary(SEASON_PROBE)
    done = subprocess.run([SEASON_PROBE], input=text, capture_output=True, text=True, timeout=60)
    if done.returncode != 0:
        raise AssertionError("season probe failed: " + done.stderr)
    return json.loads(done.stdout)


def series_text(x):
    return " ".join("nan" if not np.isfinite(v) else repr(float(v)) for v in x)


class Peaks(unittest.TestCase):
    def test_peaks_and_prominences_equal_scipy(self):
        rng = np.random.default_rng(5)
        checked = 0
        for case in range(400):
            n = int(rng.integers(3, 60))
            x = rng.standard_normal(n)
            if case % 3 == 0:
                x = np.round(x * 2) / 2          # plateaus: many equal neighbours
            if case % 5 == 0:
                x[0] = x.max() + 1               # a maximum on the series edge (never a peak)
            if case % 7 == 0:
                x[-1] = x.max() + 1
            prominence = float(rng.choice([0.0, 0.3, 1.0, 2.0]))
            ours = season_probe("peaks %r %d\n%s\n" % (prominence, n, series_text(x)))
            idx, props = find_peaks(x, prominence=prominence)
            self.assertEqual(ours["index"], idx.tolist(), "series %s" % x.tolist())
            np.testing.assert_allclose(ours["prominence"], props["prominences"], rtol=0, atol=1e-12)
            checked += len(idx)
        self.assertGreater(checked, 300)

    def test_seasons_count_the_peaks_of_the_middle_of_three_cycles(self):
        # Wrap-around rule (docs/methods.md): a cycle's seasons are the scipy peaks of
        # [cycle, cycle, cycle] that fall in the middle copy, with prominence >= 20 % of the
        # cycle's amplitude.
        rng = np.random.default_rng(9)
        for case in range(200):
            p = int(rng.choice([12, 23]))
            t = np.arange(p) / p
            x = (rng.uniform(0.2, 1) * np.cos(2 * np.pi * (t - rng.uniform()))
                 + rng.uniform(0, 1) * np.cos(4 * np.pi * (t - rng.uniform()))
                 + 0.1 * rng.standard_normal(p))
            tiled = np.tile(x, 3)
            ours = season_probe("cycle 0.2 0.5 %d\n%s\n" % (p, series_text(tiled)))
            idx, _ = find_peaks(tiled, prominence=0.2 * (x.max() - x.min()))
            expected = int(np.sum((idx >= p) & (idx < 2 * p)))
            self.assertEqual(ours["seasons"], expected, "series %s" % x.tolist())
            self.assertAlmostEqual(ours["amplitude"], x.max() - x.min(), places=12)

    def test_a_season_across_new_year_is_not_cut(self):
        # A southern-summer season peaking on 1 January: start in the previous December-ish,
        # end in February; the length runs across the turn of the year.
        p = 12
        months = np.arange(p)
        x = np.cos(2 * np.pi * (months + 0.5) / p)     # peak between December and January
        out = season_probe("cycle 0.2 0.5 %d\n%s\n" % (p, series_text(np.tile(x, 3))))
        self.assertEqual(out["seasons"], 1)
        start, end, length, _ = out["season1"]
        self.assertGreater(start, end)                   # starts late in the year, ends early
        self.assertAlmostEqual(length, 0.5 * YEAR, delta=YEAR / p)  # above half-amplitude half the year


class Harmonics(unittest.TestCase):
    def test_amplitude_and_peak_day_equal_numpy_rfft(self):
        rng = np.random.default_rng(2)
        for n in (12, 23, 46):
            for _ in range(30):
                x = rng.standard_normal(n)
                ours = season_probe("harmonics %d\n%s\n" % (n, series_text(x)))
                spectrum = np.fft.rfft(x)
                for k, key in ((1, "annual"), (2, "semiannual")):
                    amplitude = 2 * np.abs(spectrum[k]) / n
                    turn = (-np.angle(spectrum[k]) / (2 * np.pi)) % 1.0
                    # n equal periods of 365 / n days: period j's middle day is
                    # 1 + j 365/n + (365/n - 1)/2, and days run linearly between middles.
                    peak_doy = (0.5 + (turn * n / k + 0.5) * 365 / n - 1) % 365 + 1
                    self.assertLess(abs(ours[key + "_amplitude"] - amplitude), 1e-9 * max(1, amplitude))
                    self.assertLess(abs(ours[key + "_peak_doy"] - peak_doy), 1e-6 * peak_doy)

    def test_a_pure_cosine_peaks_where_it_should(self):
        n = 12
        x = 3.0 * np.cos(2 * np.pi * (np.arange(n) - 5) / n)   # maximum in period 5 (June)
        ours = season_probe("harmonics %d\n%s\n" % (n, series_text(x)))
        self.assertAlmostEqual(ours["annual_amplitude"], 3.0, places=9)
        self.assertAlmostEqual(ours["annual_peak_doy"], 0.5 + 5.5 * 365 / 12, places=6)  # period 5's middle
        # Two peaks a year, in periods 2 and 8: the first is period 2's middle. (Before 0.3.13 the
        # phase was divided by k twice, putting it in period 1.)
        x = 2.0 * np.cos(2 * np.pi * 2 * (np.arange(n) - 2) / n)
        ours = season_probe("harmonics %d\n%s\n" % (n, series_text(x)))
        self.assertAlmostEqual(ours["semiannual_amplitude"], 2.0, places=9)
        self.assertAlmostEqual(ours["semiannual_peak_doy"], 0.5 + 2.5 * 365 / 12, places=6)
        # A flat series has no harmonic peak (its phase would be rounding noise).
        ours = season_probe("harmonics %d\n%s\n" % (n, series_text(np.full(n, 0.3))))
        self.assertTrue(np.isnan(ours["annual_peak_doy"]) and np.isnan(ours["semiannual_peak_doy"]), ours)
        for level in (0.0, 1e-15):
            ours = season_probe("harmonics %d\n%s\n" % (n, series_text(np.full(n, level))))
            self.assertTrue(np.isnan(ours["annual_peak_doy"]), (level, ours))
        # A cycle in small units peaks where it peaks in large ones (below amplitude 1e-12 it
        # had no peak day).
        x = 3e-15 * np.cos(2 * np.pi * (np.arange(n) - 5) / n)
        ours = season_probe("harmonics %d\n%s\n" % (n, series_text(x)))
        self.assertAlmostEqual(ours["annual_peak_doy"], 0.5 + 5.5 * 365 / 12, places=6)


def modis_dates(years, start=2010):
    return [dt.date(y, 1, 1) + dt.timedelta(days=d) for y in range(start, start + years)
            for d in range(0, 365, 16)]


def write_dated_ndvi(folder, dates, seed, values_on):
    """One invented float32 raster per date, ndvi_YYYY-MM-DD.tif in `folder`: values_on(day of
    year, rng) with one generator seeded `seed` for the whole stack."""
    os.makedirs(folder)
    rng = np.random.default_rng(seed)
    for date in dates:
        values = values_on(date.timetuple().tm_yday, rng)
        kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date.isoformat()), values.astype(np.float32))


def seasons_then_compare(test, folder):
    """`kalends seasons` of the stack in `folder` (monthly), then `kalends compare` of its layers;
    returns the two output folders and compare's completed process."""
    seasons, out = folder + "-seasons", folder + "-compare"
    done = kt.run_kalends(["-q", "seasons", os.path.join(folder, "*.tif"), "--out", seasons])
    test.assertEqual(done.returncode, 0, done.stderr)
    done = kt.run_kalends(["compare", seasons, "--out", out])
    test.assertEqual(done.returncode, 0, done.stderr)
    return seasons, out, done


def month_means(dates, values):
    """Numpy reference: day-weighted mean of the composites overlapping each month.
    values: (dates, ...) -> dict (year, month) -> array."""
    days = np.array([(d - dt.date(1970, 1, 1)).days for d in dates])
    step = int(np.median(np.diff(days)))
    first = days
    last = np.append(np.minimum(days[:-1] + step, days[1:]), days[-1] + step)
    out = {}
    for year in range(dates[0].year, dates[-1].year + 1):
        for month in range(1, 13):
            m0 = (dt.date(year, month, 1) - dt.date(1970, 1, 1)).days
            m1 = ((dt.date(year + (month == 12), month % 12 + 1, 1)) - dt.date(1970, 1, 1)).days
            overlap = np.clip(np.minimum(last, m1) - np.maximum(first, m0), 0, None).astype(float)
            w = overlap[:, None, None] * np.isfinite(values)
            v = np.where(np.isfinite(values), values, 0.0)
            with np.errstate(invalid="ignore"):
                out[(year, month)] = (w * v).sum(0) / w.sum(0)
    return out


class SeasonsCommand(kt.TempDirTestCase):
    def read(self, name):
        g = kt.gdal()
        ds = g.Open(os.path.join(self.out, name))
        data = ds.ReadAsArray().astype(np.float64)
        return data if data.ndim == 3 else data[None]

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        rng = np.random.default_rng(4)
        cls.dates = modis_dates(3)
        h, w = 20, 30
        t = np.array([(d - cls.dates[0]).days for d in cls.dates], float)[:, None, None]
        phase = rng.uniform(0, 1, (h, w))
        values = (0.4 + 0.3 * np.cos(2 * np.pi * (t / YEAR - phase))
                  + 0.02 * rng.standard_normal((len(cls.dates), h, w)))
        values[5, 3, 4] = np.nan                       # one unfilled value
        cls.values = values
        folder = os.path.join(cls.tmp, "filled")
        os.makedirs(folder)
        for d, v in zip(cls.dates, values):
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % d.isoformat()), v.astype(np.float32),
                            geotransform=(500000, 250, 0, 9000000, 0, -250), epsg=32736, nodata=float("nan"))
        cls.out = os.path.join(cls.tmp, "seasons")
        done = kt.run_kalends(["-q", "seasons", folder, "--out", cls.out])
        assert done.returncode == 0, done.stderr
        cls.reference = month_means(cls.dates, values.astype(np.float32).astype(np.float64))

    def test_year_specific_synoptic_and_anomalies_equal_numpy(self):
        years = [2010, 2011, 2012]
        ref = np.array([[self.reference[(y, m)] for m in range(1, 13)] for y in years])  # (3, 12, h, w)
        for i, y in enumerate(years):
            np.testing.assert_allclose(self.read("ndvi_year_%d.tif" % y), ref[i], rtol=1e-5, atol=1e-6)
        mean = np.nanmean(ref, axis=0)
        sd = np.nanstd(ref, axis=0, ddof=1)
        count = np.isfinite(ref).sum(0)
        np.testing.assert_allclose(self.read("ndvi_synoptic_mean.tif"), mean, rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(self.read("ndvi_synoptic_sd.tif"), sd, rtol=1e-4, atol=1e-6)
        np.testing.assert_array_equal(self.read("ndvi_synoptic_years.tif"), count)
        for i, y in enumerate(years):
            np.testing.assert_allclose(self.read("ndvi_anomaly_%d.tif" % y), ref[i] - mean, atol=1e-6)
            np.testing.assert_allclose(self.read("ndvi_anomaly_standardised_%d.tif" % y),
                                       (ref[i] - mean) / sd, rtol=1e-4, atol=1e-5)
        res = np.nansum((ref - mean) ** 2, axis=(0, 1))
        tot = np.nansum((ref - np.nanmean(ref, axis=(0, 1))) ** 2, axis=(0, 1))
        miss = self.read("ndvi_synoptic_miss.tif")
        np.testing.assert_allclose(miss[0], np.sqrt(res / np.isfinite(ref).sum((0, 1))), rtol=1e-4)
        np.testing.assert_allclose(miss[1], 1 - res / tot, rtol=1e-4, atol=1e-5)

    def test_cycle_descriptors_equal_numpy(self):
        g = kt.gdal()
        ds = g.Open(os.path.join(self.out, "ndvi_cycle_2011.tif"))
        names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
        data = ds.ReadAsArray().astype(np.float64)
        year = np.array([self.reference[(2011, m)] for m in range(1, 13)])
        np.testing.assert_allclose(data[names.index("mean")], year.mean(0), rtol=1e-5)
        np.testing.assert_allclose(data[names.index("amplitude")], year.max(0) - year.min(0), rtol=1e-4, atol=1e-6)
        spectrum = np.fft.rfft(year, axis=0)
        np.testing.assert_allclose(data[names.index("annual_amplitude")], 2 * np.abs(spectrum[1]) / 12, rtol=1e-4)
        # An integral of a stack without a unit is a sum of values over days, not a duration:
        # its unit had read "days", like the season lengths beside it.
        units = {n: ds.GetRasterBand(b + 1).GetUnitType() for b, n in enumerate(names)}
        if ds.GetRasterBand(names.index("mean") + 1).GetUnitType() == "":
            self.assertEqual(units["season1_integral"], "value-days")
        # One cosine a year: one season per pixel.
        self.assertGreater(np.mean(data[names.index("seasons")] == 1), 0.95)

    def test_compare_quantiles_and_zones_equal_numpy(self):
        g = kt.gdal()
        miss = self.read("ndvi_synoptic_miss.tif")
        zones = np.zeros(miss.shape[1:], np.int16)
        zones[:, 15:] = 2                               # two invented zones: west 0, east 2
        zone_path = os.path.join(self.tmp, "zones.tif")
        kt.write_raster(zone_path, zones, geotransform=(500000, 250, 0, 9000000, 0, -250), epsg=32736)
        out = os.path.join(self.tmp, "compare")
        done = kt.run_kalends(["-q", "compare", self.out, "--out", out, "--zones", zone_path])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(out, "compare.json")) as f:
            report = json.load(f)
        rmse = miss[0][np.isfinite(miss[0])]
        for key, q in (("p05", 0.05), ("p50", 0.5), ("p95", 0.95)):
            self.assertAlmostEqual(report["synoptic_rmse"][key], float(np.quantile(rmse, q)), places=5)
        self.assertEqual(sum(report["rmse_histogram"]["counts"]), rmse.size)
        # The class raster records its command line, as every other raster does (it had none).
        ds = g.Open(os.path.join(out, "ndvi_year_specific_class.tif"))
        command = ds.GetMetadataItem("KALENDS_COMMAND")
        ds = None
        self.assertIsNotNone(command)
        self.assertIn("compare", command)
        # --top beyond what anyone reads (2e9 had taken 10 s on a tiny layer) is refused.
        done = kt.run_kalends(["compare", self.out, "--out", os.path.join(self.tmp, "compare-top"), "--top", "2000000000"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--top: must be 0..10000", done.stderr)
        by_zone = {z["zone"]: z for z in report["zones"]}
        self.assertEqual(sorted(by_zone), [0, 2])
        for zone in (0, 2):
            values = miss[0][(zones == zone) & np.isfinite(miss[0])]
            self.assertAlmostEqual(by_zone[zone]["synoptic_rmse"]["p50"], float(np.median(values)), places=5)
            self.assertEqual(by_zone[zone]["synoptic_rmse"]["count"], values.size)
        # Zones of the same size elsewhere, in another CRS, or without georeferencing are refused,
        # naming the file (they had been summarised as if they lay on the layers' pixels).
        for name, geotransform, epsg in (("shifted", (700000, 250, 0, 9000000, 0, -250), 32736),
                                         ("other-crs", (500000, 250, 0, 9000000, 0, -250), 32636),
                                         ("plain", None, None)):
            path = os.path.join(self.tmp, name + ".tif")
            kt.write_raster(path, zones, geotransform=geotransform, epsg=epsg)
            done = kt.run_kalends(["-q", "compare", self.out, "--out", out + "-" + name, "--zones", path])
            self.assertEqual(done.returncode, 2, (name, done.stderr))
            self.assertRegex(done.stderr.strip(), r"^kalends: .*%s\.tif: zone raster is (not on the grid|not georef)" % name)
            self.assertFalse(os.path.exists(out + "-" + name))
        # The report's table holds the histogram too (docs/outputs.md), its counts as in the JSON.
        with open(os.path.join(out, "compare.md")) as f:
            rows = [line for line in f if line.startswith("| ") and line.count("|") == 4 and "from" not in line]
        self.assertEqual([int(r.split("|")[3]) for r in rows], report["rmse_histogram"]["counts"])
        # A zone raster of fractions (a share, not zones) is refused, not rounded into zones.
        fractions = os.path.join(self.tmp, "fractions.tif")
        kt.write_raster(fractions, np.full(miss.shape[1:], 0.37, np.float32),
                        geotransform=(500000, 250, 0, 9000000, 0, -250), epsg=32736)
        done = kt.run_kalends(["-q", "compare", self.out, "--out", out + "-f", "--zones", fractions])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("fractions.tif: zones are whole numbers; found 0.37", done.stderr)
        classes = g.Open(os.path.join(out, report["class_raster"])).ReadAsArray()
        share = miss[2]
        expected = np.where(share < 0.25, 0, np.where(share < 0.5, 1, np.where(share < 0.75, 2, 3)))
        ok = np.isfinite(share)
        np.testing.assert_array_equal(classes[ok], expected[ok])
        # The report draws the class raster a colour per class, with the classes' meanings: one
        # colour for each class present, the same for all its cells (it had been a continuous
        # ramp between percentiles, whose in-between colours are no class).
        page = os.path.join(self.tmp, "compare-report.html")
        done = kt.run_kalends(["-q", "report", out, "--html", page])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page) as f:
            html = f.read()
        card = html[html.index("<b>ndvi_year_specific_class</b>"):]
        card = html[html.rindex("<figure", 0, html.index("<b>ndvi_year_specific_class</b>")):][:len(card) + 2000]
        self.assertIn("a colour per class", card)
        self.assertIn("0 under 25 % of the variance is year-specific", card)
        self.assertIn("3 75 % or more", card)
        import base64
        png = base64.b64decode(card.split('src="data:image/png;base64,')[1].split('"')[0])
        g.FileFromMemBuffer("/vsimem/classes.png", png)
        rgba = g.Open("/vsimem/classes.png").ReadAsArray()
        g.Unlink("/vsimem/classes.png")
        colours = {}
        for cls in np.unique(classes[ok]):
            cells = rgba[:3, (classes == cls) & ok].T
            self.assertEqual(len({tuple(c) for c in cells}), 1, cls)
            colours[int(cls)] = tuple(cells[0])
        self.assertEqual(len(set(colours.values())), len(colours))

    def test_a_fills_layers_say_what_each_value_rests_on(self):
        # A fill's flag band says which composites were observed: the observed_YYYY layers give
        # the share of each period's covered days that rests on one, synoptic_observed_years how
        # many years have one (a year filled from nothing had counted as a year like any other).
        # The stack starts on 17 January 2010: January 2010 rests on 15 of its 31 days.
        g = kt.gdal()
        rng = np.random.default_rng(11)
        raw = os.path.join(self.tmp, "gappy")
        os.makedirs(raw)
        dates, values = self.dates[1:], self.values[1:].copy()
        values[rng.uniform(size=values.shape) < 0.4] = np.nan
        for d, v in zip(dates, values):
            kt.write_raster(os.path.join(raw, "ndvi_%s.tif" % d.isoformat()), v.astype(np.float32),
                            geotransform=(500000, 250, 0, 9000000, 0, -250), epsg=32736, nodata=float("nan"))
        filled = os.path.join(self.tmp, "gappy-filled")
        out = os.path.join(self.tmp, "gappy-seasons")
        self.assertEqual(kt.run_kalends(["-q", "fill", os.path.join(raw, "*.tif"), "--out", filled]).returncode, 0)
        done = kt.run_kalends(["seasons", filled, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        value, flag = [], []
        for d in dates:
            ds = g.Open(os.path.join(filled, "ndvi_%s.tif" % d.isoformat()))
            value.append(ds.GetRasterBand(1).ReadAsArray().astype(np.float64))
            flag.append(ds.GetRasterBand(3).ReadAsArray())
            ds = None
        value, flag = np.array(value), np.array(flag)
        # The same day weights as the year layers, on 1 where the value was observed, else 0.
        share = month_means(dates, np.where(np.isfinite(value), (flag == 0).astype(np.float64), np.nan))
        years = [2010, 2011, 2012]
        expected = np.array([[share[(y, m)] for m in range(1, 13)] for y in years])
        for i, y in enumerate(years):
            np.testing.assert_allclose(kt.gdal().Open(os.path.join(out, "ndvi_observed_%d.tif" % y)).ReadAsArray(),
                                       expected[i], atol=1e-6, equal_nan=True)
        observed_years = g.Open(os.path.join(out, "ndvi_synoptic_observed_years.tif")).ReadAsArray()
        np.testing.assert_array_equal(observed_years, (expected > 0).sum(0))
        # The sd band (--band 2) rests on the same composites: the same layers (they had been
        # taken for unfilled input, 1 everywhere).
        sd_out = os.path.join(self.tmp, "gappy-sd-seasons")
        done_sd = kt.run_kalends(["-q", "seasons", filled, "--out", sd_out, "--band", "2"])
        self.assertEqual(done_sd.returncode, 0, done_sd.stderr)
        for i, y in enumerate(years):
            layer = g.Open(os.path.join(sd_out, "ndvi_sd_observed_%d.tif" % y))
            self.assertIn("fill flag 0", layer.GetMetadataItem("KALENDS_LAYER"))
            np.testing.assert_allclose(layer.ReadAsArray(), expected[i], atol=1e-6, equal_nan=True)
        # The days each period rests on, per band; and a note.
        year = g.Open(os.path.join(out, "ndvi_year_2010.tif"))
        self.assertEqual(year.GetRasterBand(1).GetMetadata(), {"KALENDS_DAYS_COVERED": "15", "KALENDS_PERIOD_DAYS": "31"})
        self.assertEqual(year.GetRasterBand(2).GetMetadataItem("KALENDS_DAYS_COVERED"), "28")
        year = None
        self.assertIn("rests on only part of its days (first: 2010 month 01, 15 of 31 days", done.stderr)
        # Layers not made by a fill have no flags: observed_YYYY is the share of the period's days
        # that have a value (of those the composites stand for), and there is no count of years.
        self.assertFalse(glob.glob(os.path.join(self.out, "ndvi_synoptic_observed_years.tif")))
        out = os.path.join(self.tmp, "gappy-raw-seasons")
        done = kt.run_kalends(["-q", "seasons", raw, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        share = month_means(dates, np.isfinite(values).astype(np.float64))
        for y in years:
            layer = g.Open(os.path.join(out, "ndvi_observed_%d.tif" % y))
            self.assertIn("with a value (unfilled input)", layer.GetMetadataItem("KALENDS_LAYER"))
            np.testing.assert_allclose(layer.ReadAsArray(), np.array([share[(y, m)] for m in range(1, 13)]),
                                       atol=1e-6, equal_nan=True)
        self.assertFalse(glob.glob(os.path.join(out, "ndvi_synoptic_observed_years.tif")))

    def test_noise_is_no_season_below_the_minimum_amplitude(self):
        # A fictional district's bare-rock pixel (NDVI 0.05 with sd 0.001 noise) beside one with
        # a real season (amplitude 0.6): by the share-of-amplitude rule alone the noise makes
        # seasons; with --min-amplitude 0.01 it has none, and the real one keeps its own.
        rng = np.random.default_rng(1)
        folder = os.path.join(self.tmp, "rock")
        os.makedirs(folder)
        for d in self.dates:
            day = d.timetuple().tm_yday + 7.5
            v = np.array([[0.05 + 0.001 * rng.standard_normal(),
                           0.2 + 0.6 * np.exp(-0.5 * ((day - 200) / 35) ** 2)]], np.float32)
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % d.isoformat()), v)
        seasons = {}
        for extra in ([], ["--min-amplitude", "0.01"]):
            out = os.path.join(self.tmp, "rock-" + "-".join(extra or ["default"]))
            done = kt.run_kalends(["-q", "seasons", folder, "--out", out, "--period", "16d"] + extra)
            self.assertEqual(done.returncode, 0, done.stderr)
            ds = kt.gdal().Open(os.path.join(out, "ndvi_cycle_2011.tif"))
            names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
            data = ds.ReadAsArray()[:, 0, :]
            seasons[bool(extra)] = (data[names.index("seasons")], data[names.index("season1_start_doy")])
            self.assertEqual(ds.GetMetadataItem("KALENDS_MIN_AMPLITUDE"), extra[1] if extra else "0")
            ds = None
        self.assertGreaterEqual(seasons[False][0][0], 1)          # noise taken for seasons
        self.assertEqual(seasons[True][0][0], 0)
        self.assertTrue(np.isnan(seasons[True][1][0]))
        self.assertEqual(seasons[True][0][1], 1)
        self.assertEqual(seasons[True][1][1], seasons[False][1][1])
        done = kt.run_kalends(["seasons", folder, "--out", os.path.join(self.tmp, "rock-bad"), "--min-amplitude", "-1"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--min-amplitude", done.stderr)

    def test_anomalies_name_their_synoptic_years(self):
        # An anomaly depends on every year through the synoptic: its file says which years.
        g = kt.gdal()
        for name in ("ndvi_anomaly_2011.tif", "ndvi_anomaly_standardised_2011.tif"):
            ds = g.Open(os.path.join(self.out, name))
            self.assertEqual(ds.GetMetadataItem("KALENDS_YEARS"), "2010-2012", name)
            self.assertEqual(ds.GetMetadataItem("KALENDS_YEAR"), "2011", name)
        year = g.Open(os.path.join(self.out, "ndvi_year_2011.tif"))
        self.assertIsNone(year.GetMetadataItem("KALENDS_YEARS"))


    def test_another_band_gets_its_own_names_and_the_input_folder_is_not_an_output(self):
        # Two bands as a fill writes them (value, sd): --band 2 had written its layers under the
        # values' names, replacing them without a word.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "two-bands")
        os.makedirs(folder)
        for d, v in zip(self.dates, self.values):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "ndvi_%s.tif" % d.isoformat()),
                                                   v.shape[1], v.shape[0], 2, g.GDT_Float32)
            ds.SetGeoTransform((500000, 250, 0, 9000000, 0, -250))
            for b, (data, description) in enumerate(((v, "value"), (0.1 * v, "sd")), start=1):
                band = ds.GetRasterBand(b)
                band.SetDescription(description)
                band.SetUnitType("NDVI")
                band.SetNoDataValue(float("nan"))
                band.WriteArray(data.astype(np.float32))
            ds = None
        out = os.path.join(self.tmp, "two-bands-seasons")
        for extra in ([], ["--band", "2"]):
            done = kt.run_kalends(["-q", "seasons", folder, "--out", out] + extra)
            self.assertEqual(done.returncode, 0, done.stderr)
        values = g.Open(os.path.join(out, "ndvi_synoptic_mean.tif"))
        sds = g.Open(os.path.join(out, "ndvi_sd_synoptic_mean.tif"))
        self.assertIsNone(values.GetMetadataItem("KALENDS_BAND"))
        self.assertEqual(sds.GetMetadataItem("KALENDS_BAND"), "2")
        np.testing.assert_allclose(values.ReadAsArray(), self.read("ndvi_synoptic_mean.tif"), rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(sds.ReadAsArray(), 0.1 * values.ReadAsArray(), rtol=1e-4, atol=1e-6)
        # Anomalies and the synoptic RMSE are in the input's unit (they had none); shares have none.
        anomaly = g.Open(os.path.join(out, "ndvi_anomaly_2011.tif"))
        miss = g.Open(os.path.join(out, "ndvi_synoptic_miss.tif"))
        self.assertEqual([anomaly.GetRasterBand(1).GetUnitType(), miss.GetRasterBand(1).GetUnitType(),
                          miss.GetRasterBand(2).GetUnitType()], ["NDVI", "NDVI", ""])
        # compare on a folder of two sets names them (it had said only "several").
        done = kt.run_kalends(["compare", out, "--out", os.path.join(self.tmp, "two-sets-compare")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("the folder holds several layer sets (ndvi, ndvi_sd); choose one with --name", done.stderr)
        # A run of the values over fewer years removes its own year layers outside them, not the
        # sd set's (whose names begin with the values' name): they had gone too.
        done = kt.run_kalends(["-q", "seasons", folder, "--out", out, "--years", "2011-2012"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertFalse(os.path.exists(os.path.join(out, "ndvi_year_2010.tif")))
        for kind in ("year", "anomaly", "anomaly_standardised", "cycle"):
            self.assertTrue(os.path.exists(os.path.join(out, "ndvi_sd_%s_2010.tif" % kind)), kind)
        # The stack's own folder as --out: refused before anything is written there.
        before = sorted(os.listdir(folder))
        done = kt.run_kalends(["-q", "seasons", folder, "--out", folder])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("holds the input files themselves", done.stderr)
        self.assertEqual(sorted(os.listdir(folder)), before)

    def test_outputs_keep_the_grid(self):
        g = kt.gdal()
        ds = g.Open(os.path.join(self.out, "ndvi_synoptic_mean.tif"))
        self.assertEqual(ds.GetGeoTransform(), (500000, 250, 0, 9000000, 0, -250))
        self.assertEqual([ds.GetRasterBand(b).GetDescription() for b in (1, 12)], ["month 01", "month 12"])


class PeakDays(kt.TempDirTestCase):
    """Harmonic and season peak days of `kalends seasons --period 16d` on composites that are the
    periods themselves (dated 1 January + 16 k): a pure semi-annual wave, a pure annual wave
    peaking just after 1 January, a flat series, and a single bump in period 'doy 193'."""

    def test_peak_days_equal_numpy_on_the_periods_middle_days(self):
        firsts = list(range(1, 366, 16))                        # 23 periods of a 365-day year
        lengths = [min(16, 366 - f) for f in firsts]            # the last one 13 days
        middles = np.array([f + (n - 1) / 2 for f, n in zip(firsts, lengths)])

        def day_of_year(position):
            # linear between the middles, around the year (numpy's interp with period)
            x = np.append(np.arange(23), 23)
            y = np.append(middles, middles[0] + 365)
            return (np.interp(position % 23, x, y) - 1) % 365 + 1

        folder = os.path.join(self.tmp, "stack")
        os.makedirs(folder)
        for year in (2019, 2020, 2021):
            for j, first in enumerate(firsts):
                day = middles[j]
                v = [0.5 + 0.2 * np.cos(2 * np.pi * 2 * (day - 100) / 365),
                     0.5 + 0.2 * np.cos(2 * np.pi * (day - 5) / 365),
                     0.3,
                     0.2 + (0.6 if j == 12 else 0.0)]
                date = dt.date(year, 1, 1) + dt.timedelta(days=first - 1)
                kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date.isoformat()),
                                np.array([v], np.float32), geotransform=(0, 250, 0, 0, 0, -250), epsg=32736,
                                nodata=float("nan"))
        out = os.path.join(self.tmp, "seasons")
        done = kt.run_kalends(["-q", "seasons", folder, "--out", out, "--period", "16d"])
        self.assertEqual(done.returncode, 0, done.stderr)
        ds = kt.gdal().Open(os.path.join(out, "ndvi_cycle_2020.tif"))
        names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
        data = ds.ReadAsArray().astype(np.float64)[:, 0, :]
        year = np.array([[float(np.float32(0.5 + 0.2 * np.cos(2 * np.pi * k * (d - p) / 365)))
                          for d in middles] for k, p in ((2, 100), (1, 5))])
        for pixel, k, key in ((0, 2, "semiannual_peak_doy"), (1, 1, "annual_peak_doy")):
            spectrum = np.fft.rfft(year[pixel])
            turn = (-np.angle(spectrum[k]) / (2 * np.pi)) % 1.0
            expected = day_of_year(turn * 23 / k)
            self.assertAlmostEqual(data[names.index(key)][pixel], expected, places=3, msg=key)
        # The semi-annual wave peaks near day 100 (its first peak), the annual one near day 5:
        # within the spacing of the periods of the true days, and a day of year in [1, 366).
        self.assertLess(abs(data[names.index("semiannual_peak_doy")][0] - 100), 8)
        self.assertLess(abs(data[names.index("annual_peak_doy")][1] - 5), 8)
        peaks = data[[names.index("annual_peak_doy"), names.index("semiannual_peak_doy")]]
        self.assertTrue(np.all((peaks[np.isfinite(peaks)] >= 1) & (peaks[np.isfinite(peaks)] < 366)), peaks)
        # A flat series: amplitudes 0 and no peak day.
        self.assertLess(data[names.index("annual_amplitude")][2], 1e-9)
        self.assertTrue(np.isnan(data[names.index("annual_peak_doy")][2]))
        self.assertTrue(np.isnan(data[names.index("semiannual_peak_doy")][2]))
        # The bump in the period from day 193 (to 208) peaks on its middle day.
        self.assertEqual(data[names.index("main_peak_doy")][3], 200.5)


class CycleYearsAlone(kt.TempDirTestCase):
    def test_a_years_cycle_layer_does_not_depend_on_the_years_asked_for(self):
        # cycle_YYYY searches its peaks on [year before | year | year after]. With --years the
        # neighbours outside the range had not been read: the first and last years' cycles then
        # differed from a run over all years (a helper's 2016 season count on 46 px), under the
        # same name and metadata. Invented data: a peak near 1 January, noise, four years.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "years-alone")

        def near_new_year(doy, rng):
            shift = rng.normal(0, 12, (6, 8))   # each pixel's peak a little off 1 January
            return 0.45 + 0.25 * np.cos(2 * np.pi * (doy - 3 - shift) / 365) + rng.normal(0, 0.03, (6, 8))

        write_dated_ndvi(folder, modis_dates(4, start=2019), 12, near_new_year)
        runs = {}
        for label, extra in (("all", []), ("some", ["--years", "2020-2021"])):
            out = os.path.join(self.tmp, "years-alone-" + label)
            done = kt.run_kalends(["-q", "seasons", os.path.join(folder, "*.tif"), "--out", out, "--period", "16d"] + extra)
            self.assertEqual(done.returncode, 0, done.stderr)
            runs[label] = out
        for year in (2020, 2021):
            name = "ndvi_cycle_%d.tif" % year
            a = g.Open(os.path.join(runs["all"], name))
            b = g.Open(os.path.join(runs["some"], name))
            np.testing.assert_array_equal(a.ReadAsArray(), b.ReadAsArray(), name)
            a = b = None


class ValuesNearFloatsLimit(kt.TempDirTestCase):
    def test_a_layer_past_floats_range_is_empty_not_infinite(self):
        # A season's integral (value x days) of values near 3e38 had been written +inf; the
        # other layers are values of the input's own range. Invented data, one peak a year.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "near-limit")

        def peak(doy, rng):
            return np.full((4, 5), 3e38 * np.exp(-0.5 * ((doy - 200) / 30.0) ** 2))

        write_dated_ndvi(folder, modis_dates(3), 1, peak)
        out = os.path.join(self.tmp, "near-limit-seasons")
        done = kt.run_kalends(["-q", "seasons", os.path.join(folder, "*.tif"), "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        ds = g.Open(os.path.join(out, "ndvi_cycle_synoptic.tif"))
        values = ds.ReadAsArray()
        names = [ds.GetRasterBand(b + 1).GetDescription() for b in range(ds.RasterCount)]
        ds = None
        self.assertFalse(np.isinf(values).any(), [n for n, v in zip(names, values) if np.isinf(v).any()])
        self.assertTrue(np.isnan(values[names.index("season1_integral")]).all())
        self.assertTrue(np.isfinite(values[names.index("max")]).all())


class SeasonsAcrossTheRecordsEdges(kt.TempDirTestCase):
    def test_a_season_edge_beyond_the_record_is_left_empty_and_said(self):
        # A season peaking in January or February starts in the November before: in the
        # record's first year that November is not in the record, and the year's own November
        # (which belongs to the next season) had stood in for it: with peaks on 5 February in odd
        # years and 15 January in even ones, 2015's start came out about 20 days early, with its
        # length and integral, and nothing said so (a helper's southern-hemisphere stack). The
        # start is now empty, and a note counts it; the interior years keep theirs, which agree
        # with the generating curve's. Invented 8-day composites 2015-2018 (the mean of a daily
        # curve over each composite's days); the truth is the curve's own half-amplitude
        # crossings, found with numpy on the daily curve.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "edges")
        os.makedirs(folder)
        origin = dt.date(2013, 1, 1)
        sigma = 75 / np.sqrt(2 * np.log(2))          # half maximum 75 days from the peak
        peak_of = {y: dt.date(y, 1, 15) if y % 2 == 0 else dt.date(y, 2, 5) for y in range(2012, 2022)}
        peaks = [(d - origin).days for d in peak_of.values()]

        def curve(t):
            return 0.2 + 0.5 * np.max([np.exp(-0.5 * ((t - p) / sigma) ** 2) for p in peaks], axis=0)

        def truth(year):
            """Start and end day of year of the season peaking in `year`, on the daily curve."""
            before, peak, after = ((peak_of[y] - origin).days for y in (year - 1, year, year + 1))
            t = np.arange(before, after + 1, dtype=float)
            c = curve(t)
            left, right = c[(t < peak)], c[(t > peak)]
            top = curve(np.array([float(peak)]))[0]
            start = t[t < peak][np.nonzero(left < left.min() + 0.5 * (top - left.min()))[0][-1]]
            stop = t[t > peak][np.nonzero(right < right.min() + 0.5 * (top - right.min()))[0][0]]
            return [(origin + dt.timedelta(days=int(d))).timetuple().tm_yday for d in (start, stop)]

        for year in range(2015, 2019):
            for doy in range(1, 366, 8):
                date = dt.date(year, 1, 1) + dt.timedelta(days=doy - 1)
                first = (date - origin).days
                end = min(first + 8, (dt.date(year + 1, 1, 1) - origin).days)
                value = curve(np.arange(first, end) + 0.5).mean()
                kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date.isoformat()),
                                np.full((1, 2), value, np.float32))
        out = os.path.join(self.tmp, "edges-out")
        done = kt.run_kalends(["seasons", os.path.join(folder, "*.tif"), "--out", out, "--period", "8d"])
        self.assertEqual(done.returncode, 0, done.stderr)
        bands = {}
        for year in (2015, 2016, 2017, 2018):
            ds = g.Open(os.path.join(out, "ndvi_cycle_%d.tif" % year))
            bands[year] = {ds.GetRasterBand(b).GetDescription(): ds.GetRasterBand(b).ReadAsArray()[0, 0]
                           for b in range(1, ds.RasterCount + 1)}
            ds = None
        for year in (2016, 2017, 2018):
            start, end = truth(year)
            self.assertLess(abs(bands[year]["season1_start_doy"] - start), 3, (year, start, bands[year]))
            self.assertLess(abs(bands[year]["season1_end_doy"] - end), 3, (year, end, bands[year]))
        first = bands[2015]
        self.assertTrue(np.isnan(first["season1_start_doy"]), (truth(2015), first))
        self.assertTrue(np.isnan(first["season1_length_days"]) and np.isnan(first["season1_integral"]), first)
        self.assertLess(abs(first["season1_end_doy"] - truth(2015)[1]), 3)
        self.assertEqual(first["seasons"], 1)
        self.assertIn("the 2015 cycle layer leaves the season start of 2 pixels empty", done.stderr)
        self.assertNotIn("2016 cycle layer", done.stderr)

    def test_a_season_inside_the_record_keeps_its_edges_whatever_lies_beyond(self):
        # A July season on a stack of whole years (ending on 31 December): its end in October is
        # inside the record, though the lowest value after it (the base) lies in the January
        # after the last composite. A first version of the rule above had emptied every last
        # year's end for that (a helper's 100 of 100 pixels). Invented 8-day composites with
        # noise; each year's start and end against the numpy crossing of the noise-free curve.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "inside")

        def july(doy, rng):
            return 0.45 + 0.25 * np.cos(2 * np.pi * (doy - 190) / 365) + rng.normal(0, 0.003, (3, 4))

        dates = [dt.date(y, 1, 1) + dt.timedelta(days=d) for y in (2019, 2020, 2021) for d in range(0, 365, 8)]
        write_dated_ndvi(folder, dates, 5, july)
        out = os.path.join(self.tmp, "inside-out")
        done = kt.run_kalends(["seasons", os.path.join(folder, "*.tif"), "--out", out, "--period", "8d"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("leaves the season", done.stderr)
        # cos crosses its half-amplitude a quarter year either side of day 190.
        for year in (2019, 2020, 2021):
            ds = g.Open(os.path.join(out, "ndvi_cycle_%d.tif" % year))
            bands = {ds.GetRasterBand(b).GetDescription(): ds.GetRasterBand(b).ReadAsArray() for b in range(1, 19)}
            ds = None
            self.assertLess(np.abs(bands["season1_start_doy"] - (190 - 365 / 4)).max(), 6, year)
            self.assertLess(np.abs(bands["season1_end_doy"] - (190 + 365 / 4)).max(), 6, year)
            self.assertTrue(np.isfinite(bands["season1_integral"]).all(), year)


class CompareYearsOnFewPeriods(kt.TempDirTestCase):
    def test_a_year_of_one_month_is_listed_but_not_ranked(self):
        # Three whole years (2019-2021) of 16-day composites and the January of 2022, higher than
        # every other January: 2022's one month had made it the year with most pixel-periods
        # above +1 sd, which nothing in compare.md or compare.json let the reader see. Its count
        # of periods is now listed, and a year with values in fewer than half the fullest year's
        # periods is not ranked. The shares are checked with numpy on the seasons layers.
        # Invented data.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "few")
        dates = modis_dates(3, start=2019) + [dt.date(2022, 1, 1), dt.date(2022, 1, 17)]

        def values_on(doy, rng, dates=iter(dates)):
            date = next(dates)
            bump = 0.15 if date.year == 2022 else 0.0
            return 0.45 + 0.2 * np.cos(2 * np.pi * (doy - 200) / 365) + bump + rng.normal(0, 0.02, (5, 6))

        write_dated_ndvi(folder, dates, 21, values_on)
        seasons, out, done = seasons_then_compare(self, folder)
        with open(os.path.join(out, "compare.json")) as f:
            report = json.load(f)
        years = {y["year"]: y for y in report["years"]}
        # January 2022 alone has a standardised anomaly in 2022 (February rests on 1 day).
        z = g.Open(os.path.join(seasons, "ndvi_anomaly_standardised_2022.tif")).ReadAsArray()
        self.assertEqual(years[2022]["periods"], 1)
        self.assertEqual(int(np.isfinite(z[0]).sum()), years[2022]["pixel_periods"])
        self.assertAlmostEqual(years[2022]["share_above_1_sd"], float((z[0] > 1).mean()), places=6)
        self.assertGreater(years[2022]["share_above_1_sd"], max(years[y]["share_above_1_sd"] for y in (2019, 2020, 2021)))
        self.assertFalse(years[2022]["ranked"])
        self.assertTrue(all(years[y]["ranked"] and years[y]["periods"] == 12 for y in (2019, 2020, 2021)))
        self.assertNotEqual(report["year_most_above"], 2022)
        self.assertIn("not ranked for the year most beyond 1 sd: 2022 (1 of 12 periods)", done.stderr)
        with open(os.path.join(out, "compare.md")) as f:
            self.assertIn("| 2022 (not ranked) | 1 | %d |" % years[2022]["pixel_periods"], f.read())


class CompareOnPartOfAPeriod(kt.TempDirTestCase):
    def test_periods_on_part_of_their_days_are_left_out_and_said(self):
        # A cycle identical every year, the stack starting on 10 June 2015: June 2015 rests on 21
        # of its 30 days, and its anomaly is the seasonal change within June (standardised +1.9
        # on a helper's stack), which compare had counted as an unusual year. Checked against
        # numpy on the seasons layers. Invented data.
        import datetime as dt
        g = kt.gdal()
        folder = os.path.join(self.tmp, "part")
        dates = [d for d in modis_dates(3, start=2015) if d >= dt.date(2015, 6, 10)]
        write_dated_ndvi(folder, dates, 3,
                         lambda doy, rng: 0.4 + 0.3 * np.sin(2 * np.pi * (doy - 80) / 365) + rng.normal(0, 0.005, (4, 5)))
        seasons, out, done = seasons_then_compare(self, folder)
        self.assertIn("left out 1 year-period(s) resting on fewer days than in other years (first: 2015 ", done.stderr)
        with open(os.path.join(out, "compare.json")) as f:
            report = json.load(f)
        self.assertEqual(len(report["partial_periods_left_out"]), 1)
        self.assertIn("(21 days, against 30 in other years)", report["partial_periods_left_out"][0])
        # The shares of 2015 over its whole periods alone, from the layers with numpy.
        year = g.Open(os.path.join(seasons, "ndvi_year_2015.tif"))
        whole = [b for b in range(1, year.RasterCount + 1)
                 if year.GetRasterBand(b).GetMetadataItem("KALENDS_DAYS_COVERED")
                 == year.GetRasterBand(b).GetMetadataItem("KALENDS_PERIOD_DAYS")]
        year = None
        z = g.Open(os.path.join(seasons, "ndvi_anomaly_standardised_2015.tif")).ReadAsArray()[np.array(whole) - 1]
        z = z[np.isfinite(z)]
        got = [y for y in report["years"] if y["year"] == 2015][0]
        self.assertAlmostEqual(got["share_above_1_sd"], float(np.mean(z > 1)), places=9)
        self.assertAlmostEqual(got["share_below_minus_1_sd"], float(np.mean(z < -1)), places=9)
        for anomaly in report["largest_anomalies"]:
            self.assertFalse(anomaly["year"] == 2015 and anomaly["period"] == "month 06", anomaly)
        # A period every year covers alike is compared like with like and kept: the Alaska
        # stack's May (7 or 8 of 31 days, every summer) and September (28 or 29 of 30).
        alaska = os.path.join(self.tmp, "alaska-seasons")
        done = kt.run_kalends(["-q", "seasons", os.path.join(kt.shared_path("alaska-ndvi", "observed"), "ndvi_*.tif"),
                               "--out", alaska])
        self.assertEqual(done.returncode, 0, done.stderr)
        done = kt.run_kalends(["-q", "compare", alaska, "--out", alaska + "-compare"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(alaska + "-compare", "compare.json")) as f:
            self.assertEqual(json.load(f)["partial_periods_left_out"], [])
        # Two years: no standardised anomaly can pass 1 sd, and the console says why rather than
        # "no year has a pixel-period beyond 1 sd".
        two = os.path.join(self.tmp, "part-two")
        done = kt.run_kalends(["-q", "seasons", os.path.join(folder, "*.tif"), "--out", two, "--years", "2016-2017"])
        self.assertEqual(done.returncode, 0, done.stderr)
        done = kt.run_kalends(["compare", two, "--out", two + "-compare"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("with 2 years no standardised anomaly can pass 1 sd", done.stdout)


class ShortAndGappyStacks(kt.TempDirTestCase):
    """What seasons and compare say where the data cannot give a synoptic miss or a year's cycle:
    one year (a synoptic of one year is that year), and a date without data inside a year."""

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.folder = os.path.join(cls.tmp, "stack")
        os.makedirs(cls.folder)
        rng = np.random.default_rng(3)
        for year in (2019, 2020, 2021):
            for first in range(1, 366, 16):
                date = dt.date(year, 1, 1) + dt.timedelta(days=first - 1)
                v = 0.5 + 0.3 * np.cos(2 * np.pi * (first - 180) / 365) + 0.05 * rng.standard_normal((2, 3))
                if date == dt.date(2020, 6, 9):
                    v[:] = np.nan                                  # a date without data
                kt.write_raster(os.path.join(cls.folder, "ndvi_%s.tif" % date.isoformat()), v.astype(np.float32),
                                geotransform=(0, 250, 0, 0, 0, -250), epsg=32736, nodata=float("nan"))

    def test_one_year_has_no_synoptic_miss_and_compare_says_so(self):
        one = os.path.join(self.tmp, "one")
        os.makedirs(one)
        for path in glob.glob(os.path.join(self.folder, "ndvi_2019-*.tif")):
            shutil.copy(path, one)
        out = os.path.join(self.tmp, "s-one")
        done = kt.run_kalends(["seasons", one, "--out", out, "--period", "16d"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("one year (2019): the synoptic layers are that year's own values", done.stderr)
        miss = kt.gdal().Open(os.path.join(out, "ndvi_synoptic_miss.tif")).ReadAsArray()
        self.assertTrue(np.all(np.isnan(miss)), miss)        # had been RMSE 0, explained share 1
        done = kt.run_kalends(["compare", out, "--out", os.path.join(self.tmp, "c-one")])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("no pixel has a synoptic miss", done.stderr)
        with open(os.path.join(self.tmp, "c-one", "compare.json")) as f:
            report = json.load(f)
        year = report["years"][0]
        self.assertIsNone(year["share_below_minus_1_sd"])    # no standardised anomaly is defined
        self.assertIsNone(year["share_above_1_sd"])
        # Nor a mean anomaly (0 by construction: the synoptic is the year), nor an invented bin width.
        self.assertIsNone(year["mean_anomaly"])
        self.assertIsNone(report["rmse_histogram"]["bin_width"])

    def test_compare_refuses_layers_of_two_periods_and_a_users_report(self):
        # A folder holding seasons layers of two --period runs (one year's anomalies monthly, the
        # rest 16-day): compare had crashed (segfault) or read wrong bands. It names the file.
        # And a compare.md of the user's in the output folder is kept, as rasters are.
        out16 = os.path.join(self.tmp, "two-periods")
        out1m = os.path.join(self.tmp, "two-periods-1M")
        for out, period in ((out16, "16d"), (out1m, "1M")):
            done = kt.run_kalends(["-q", "seasons", self.folder, "--out", out, "--period", period])
            self.assertEqual(done.returncode, 0, done.stderr)
        mixed_miss = out1m + "-miss"
        shutil.copytree(out1m, mixed_miss)
        shutil.copy(os.path.join(out1m, "ndvi_anomaly_2020.tif"), out16)
        done = kt.run_kalends(["compare", out16, "--out", os.path.join(self.tmp, "c-two")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("ndvi_anomaly_2020.tif: holds 12 periods (1M)", done.stderr)
        # The synoptic miss of the other run: its statistics would have been compare's.
        shutil.copy(os.path.join(out16, "ndvi_synoptic_miss.tif"), mixed_miss)
        done = kt.run_kalends(["compare", mixed_miss, "--out", os.path.join(self.tmp, "c-miss")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("ndvi_synoptic_miss.tif: is of period 16d", done.stderr)
        mine = os.path.join(self.tmp, "c-mine")
        os.makedirs(mine)
        with open(os.path.join(mine, "compare.md"), "w") as f:
            f.write("notes\n")
        done = kt.run_kalends(["compare", out1m, "--out", mine])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("compare.md: exists and was not written by kalends", done.stderr)
        with open(os.path.join(mine, "compare.md")) as f:
            self.assertEqual(f.read(), "notes\n")

    def test_a_single_date_is_refused(self):
        # One date has no spacing to say how many days its composite stands for; it had been
        # put into one period as if it covered an unstated span.
        one = os.path.join(self.tmp, "single")
        os.makedirs(one)
        shutil.copy(sorted(glob.glob(os.path.join(self.folder, "ndvi_2020-*.tif")))[3], one)
        done = kt.run_kalends(["seasons", one, "--out", os.path.join(self.tmp, "s-single")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("holds a single date (2020-02-18)", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "s-single")))

    def test_a_date_without_data_is_named_and_top_0_lists_none(self):
        out = os.path.join(self.tmp, "s-gap")
        done = kt.run_kalends(["seasons", self.folder, "--out", out, "--period", "16d"])
        self.assertEqual(done.returncode, 0, done.stderr)
        cycle = kt.gdal().Open(os.path.join(out, "ndvi_cycle_2020.tif")).ReadAsArray()
        self.assertTrue(np.all(np.isnan(cycle[0])))          # the 2020 cycle needs every period
        self.assertIn("the 2020 cycle layer is empty at 6 of the 6 pixels", done.stderr)
        self.assertNotIn("2019 cycle layer is empty", done.stderr)
        # --top 0: no largest anomalies (it had crashed).
        done = kt.run_kalends(["compare", out, "--out", os.path.join(self.tmp, "c-gap"), "--top", "0"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(os.path.join(self.tmp, "c-gap", "compare.json")) as f:
            report = json.load(f)
        self.assertEqual(report["largest_anomalies"], [])
        # Shares beyond 1 sd count the pixel-periods with a standardised anomaly (numpy).
        g = kt.gdal()
        for year in report["years"]:
            z = g.Open(os.path.join(out, "ndvi_anomaly_standardised_%d.tif" % year["year"])).ReadAsArray()
            defined = z[np.isfinite(z)]
            self.assertAlmostEqual(year["share_below_minus_1_sd"], float(np.mean(defined < -1)), places=12)
            self.assertAlmostEqual(year["share_above_1_sd"], float(np.mean(defined > 1)), places=12)


class RealData(kt.TempDirTestCase):
    def test_netcdf_amplitude_and_month_of_maximum(self):
        path = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        g = kt.gdal()
        source = 'NETCDF:"%s":tas' % path
        ds = g.Open(source)
        tas = ds.ReadAsArray().astype(np.float64)
        tas[tas > 1e19] = np.nan                       # _FillValue 1e20 (ocean)
        out = os.path.join(self.tmp, "tas")
        # The file's time values fall on the last day of each month.
        done = kt.run_kalends(["-q", "seasons", source, "--out", out, "--date-marks", "end"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("last days of their months", done.stderr)
        # The default reads them as ends too, and says so (version 0.3.19; read as starts, the
        # year layers had been a month late, with a note the user could miss).
        default = os.path.join(self.tmp, "tas-default")
        as_default = kt.run_kalends(["-q", "seasons", source, "--out", default])
        self.assertEqual(as_default.returncode, 0, as_default.stderr)
        # "note:" as every other note (it had begun "Note:", missed by a script looking for "^note:").
        self.assertIn("note: the input dates are the last days of their months: read as month ends", as_default.stderr)
        self.assertIn("--date-marks start", as_default.stderr)
        for name in os.listdir(out):
            if name.endswith(".tif"):
                np.testing.assert_array_equal(g.Open(os.path.join(out, name)).ReadAsArray(),
                                              g.Open(os.path.join(default, name)).ReadAsArray(), err_msg=name)
        # Read as starts, the year layer is about a month late: 'end' gives June's own mean, 'start'
        # lets the mean stamped 31 May stand for 31 May - 29 June (30 days, its gap to the next
        # date) and the one stamped 30 June for 30 June on, so June is 29 days of May's mean and
        # one of June's.
        starts = os.path.join(self.tmp, "tas-starts")
        as_starts = kt.run_kalends(["-q", "seasons", source, "--out", starts, "--date-marks", "start"])
        self.assertEqual(as_starts.returncode, 0, as_starts.stderr)
        self.assertNotIn("last days of their months", as_starts.stderr)
        year_end = g.Open(os.path.join(out, "tas_year_1999.tif")).ReadAsArray().astype(np.float64)
        year_start = g.Open(os.path.join(starts, "tas_year_1999.tif")).ReadAsArray().astype(np.float64)
        land_cells = np.all(np.isfinite(tas), axis=0)
        np.testing.assert_allclose(year_end[5][land_cells], tas[5][land_cells], rtol=1e-6)
        np.testing.assert_allclose(year_start[5][land_cells], ((29 * tas[4] + tas[5]) / 30)[land_cells], rtol=1e-5)
        cycle = g.Open(os.path.join(out, "tas_cycle_1999.tif"))
        names = [cycle.GetRasterBand(b).GetDescription() for b in range(1, cycle.RasterCount + 1)]
        data = cycle.ReadAsArray().astype(np.float64)
        land = np.all(np.isfinite(tas), axis=0)
        self.assertGreater(land.sum(), 1000)
        np.testing.assert_allclose(data[names.index("amplitude")][land],
                                   (tas.max(0) - tas.min(0))[land], rtol=1e-5)
        # Cycle bands carry units: the variable's for values, days of year, days, unit x days.
        year_layer = g.Open(os.path.join(out, "tas_year_1999.tif"))   # held: a band needs its dataset
        unit = year_layer.GetRasterBand(1).GetUnitType()
        self.assertNotEqual(unit, "")
        units = {n: cycle.GetRasterBand(b + 1).GetUnitType() for b, n in enumerate(names)}
        self.assertEqual((units["mean"], units["amplitude"], units["annual_amplitude"]), (unit, unit, unit))
        self.assertEqual((units["main_peak_doy"], units["season1_start_doy"]), ("day of year", "day of year"))
        self.assertEqual((units["season1_length_days"], units["season1_integral"], units["seasons"]),
                         ("days", unit + " days", ""))
        # The main peak is the middle day of the warmest month (January: day 16, on a 365-day year).
        middles = np.array([(dt.date(2001, m, 1).timetuple().tm_yday
                             + (dt.date(2001 + (m == 12), m % 12 + 1, 1) - dt.timedelta(1)).timetuple().tm_yday) / 2
                            for m in range(1, 13)])
        peak_doy = data[names.index("main_peak_doy")][land]
        np.testing.assert_array_equal(peak_doy, middles[np.argmax(tas[:, land], axis=0)])
        self.assertTrue(np.all(np.isnan(data[names.index("amplitude")][~land])))

    def test_the_report_names_the_empty_descriptor_layers_instead_of_drawing_them(self):
        # Summers alone (alaska-ndvi/observed, real MODIS NDVI) have no whole synoptic cycle: its
        # 18 descriptor layers hold no value anywhere (numpy below), and the report had drawn
        # each as a blank map with a 0 to 0 legend.
        g = kt.gdal()
        stack = os.path.join(kt.shared_path("alaska-ndvi", "observed"), "*.tif")
        out = os.path.join(self.tmp, "summers", "seasons")
        done = kt.run_kalends(["-q", "seasons", stack, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        cycle = g.Open(os.path.join(out, "ndvi_cycle_synoptic.tif")).ReadAsArray()
        self.assertFalse(np.isfinite(cycle).any())
        html = os.path.join(self.tmp, "summers", "report.html")
        done = kt.run_kalends(["report", os.path.dirname(out), "--html", html])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(html) as f:
            page = f.read()
        self.assertIn("No value anywhere in what the map would show, so not drawn (%d layers): seasons.ndvi_cycle_synoptic." % cycle.shape[0], page)
        self.assertNotIn("<b>seasons.ndvi_cycle_synoptic.", page)
        # A dated series whose last date has no value is named too, not drawn blank.
        blank = os.path.join(self.tmp, "blank-last", "layers")
        os.makedirs(blank)
        for k, day in enumerate(("2020-01-01", "2020-02-01", "2020-03-01")):
            kt.write_raster(os.path.join(blank, "v_%s.tif" % day),
                            np.full((4, 4), np.nan if k == 2 else 0.5, np.float32),
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        html = os.path.join(self.tmp, "blank-last", "report.html")
        done = kt.run_kalends(["report", os.path.dirname(blank), "--html", html])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(html) as f:
            self.assertIn("so not drawn (1 layer): layers.v (its last date, 2020-03-01)", f.read())
        self.assertIn("<b>seasons.ndvi_year</b>", page)

    def test_compare_leaves_out_year_files_of_an_earlier_run(self):
        # Real MODIS NDVI (alaska-ndvi/observed, 2004-2009). A second `seasons` run into the same
        # folder with --years 2006-2007 removes the first run's 2004, 2005, 2008 and 2009 year
        # layers (made against another synoptic) and says so. Year files of another run copied
        # in by hand are still there for compare to meet: it must use 2006 and 2007 only, and
        # with two years no standardised anomaly can pass 1 sd ((n - 1)/sqrt(n) = 0.71), so no
        # year is named as most below or above.
        g = kt.gdal()
        stack = os.path.join(kt.shared_path("alaska-ndvi", "observed"), "*.tif")
        out = os.path.join(self.tmp, "ak")
        for extra in ([], ["--years", "2006-2007"]):
            done = kt.run_kalends(["seasons", stack, "--out", out, "--period", "16d"] + extra)
            self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("removed the layers of 2004, 2005, 2008, 2009 from an earlier run", done.stdout + done.stderr)
        self.assertEqual(sorted(glob.glob(os.path.join(out, "*_2004.tif"))), [])
        self.assertTrue(os.path.exists(os.path.join(out, "ndvi_anomaly_standardised_2006.tif")))
        whole = os.path.join(self.tmp, "ak-whole")
        done = kt.run_kalends(["-q", "seasons", stack, "--out", whole, "--period", "16d"])
        self.assertEqual(done.returncode, 0, done.stderr)
        for year in (2004, 2005, 2008, 2009):
            for layer in ("anomaly", "anomaly_standardised"):
                shutil.copy(os.path.join(whole, "ndvi_%s_%d.tif" % (layer, year)), out)
        compare = os.path.join(self.tmp, "akc")
        done = kt.run_kalends(["compare", out, "--out", compare])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("2004, 2005, 2008, 2009", done.stderr)
        with open(os.path.join(compare, "compare.json")) as f:
            report = json.load(f)
        self.assertEqual(report["synoptic_years"], "2006-2007")
        self.assertEqual(report["stale_years_left_out"], [2004, 2005, 2008, 2009])
        self.assertEqual([y["year"] for y in report["years"]], [2006, 2007])
        for entry in report["years"]:
            raw = g.Open(os.path.join(out, "ndvi_anomaly_%d.tif" % entry["year"])).ReadAsArray().astype(np.float64)
            self.assertAlmostEqual(entry["mean_anomaly"], float(np.nanmean(raw)), places=6)
            self.assertEqual(entry["share_below_minus_1_sd"], 0)
        self.assertIsNone(report["year_most_below"])
        # A year of the synoptic whose standardised layer is gone: refused naming it (the year
        # had been left out of the Years table and the largest anomalies without a word).
        os.remove(os.path.join(out, "ndvi_anomaly_standardised_2007.tif"))
        done = kt.run_kalends(["compare", out, "--out", compare])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip().splitlines()[-1],
                         "kalends: %s: missing: the synoptic layers cover 2006-2007; run kalends seasons into this "
                         "folder again" % os.path.join(out, "ndvi_anomaly_standardised_2007.tif"))
        # A --name the folder does not hold: the sets it holds are named (it had named a missing
        # file of the asked-for set).
        done = kt.run_kalends(["compare", out, "--out", compare, "--name", "evi"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: --name 'evi': the folder holds no such layer set; it holds ndvi")
        self.assertIsNone(report["year_most_above"])
        # A negative --top is refused.
        done = kt.run_kalends(["compare", out, "--out", compare, "--top", "-3"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--top", done.stderr)

    def test_hourly_grib_month_is_the_mean_of_every_hour(self):
        # ERA5 2 m temperature, 744 hourly records of March 2019 (Hersbach et al. 2020; the
        # shared data README): each record is an instant and counts once, so March is the
        # plain mean of all 744 hours (numpy). Before version 0.3.10 a day stood for its last
        # record alone (23 UTC), up to 1.49 K away.
        path = kt.shared_path("hourly-temperature", "era5-2mt-2019-03-uk.grib")
        g = kt.gdal()
        g.SetConfigOption("GRIB_NORMALIZE_UNITS", "NO")   # kelvin as stored, as kalends reads it
        try:
            hours = g.Open(path).ReadAsArray().astype(np.float64)
        finally:
            g.SetConfigOption("GRIB_NORMALIZE_UNITS", None)
        self.assertEqual(hours.shape[0], 744)
        out = os.path.join(self.tmp, "hourly")
        done = kt.run_kalends(["-q", "seasons", path, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        year = g.Open(os.path.join(out, "era5-2mt-2019-03-uk_year_2019.tif")).ReadAsArray().astype(np.float64)
        np.testing.assert_allclose(year[2], hours.mean(axis=0), atol=1e-3)
        self.assertGreater(np.abs(year[2] - hours[23::24].mean(axis=0)).max(), 0.1)
        self.assertTrue(np.all(np.isnan(year[[0, 1, 3]])))   # no record in February or April
        # The same hours filled (the record is complete: each value is its own observation) and
        # read back from kalends' own outputs, named <name>_2019-03-01T0100.tif and so on. They
        # had been read as 24 'duplicate dates' a day, so no later step could use them.
        filled = os.path.join(self.tmp, "hourly-filled")
        done = kt.run_kalends(["-q", "fill", path, "--out", filled, "--lambda", "1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        again = os.path.join(self.tmp, "hourly-from-fill")
        done = kt.run_kalends(["-q", "seasons", filled, "--out", again])
        self.assertEqual(done.returncode, 0, done.stderr)
        year = g.Open(os.path.join(again, "era5-2mt-2019-03-uk_year_2019.tif")).ReadAsArray().astype(np.float64)
        np.testing.assert_allclose(year[2], hours.mean(axis=0), atol=1e-3)
        # A report of those fills reads the raw GRIB each names (KALENDS_SOURCE) as the commands
        # do, quietly and once: it had printed the GRIB driver's inventory warnings ("ERROR: Ran
        # out of file reading SECT0") once per fill output, 744 times. Given as "column row".
        done = kt.run_kalends(["report", filled, "--html", os.path.join(self.tmp, "hourly.html"),
                               "--pixels", "3 4;10,20"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(done.stderr, "")
        self.assertIn("2 time series", done.stdout)

    def test_ndvi_and_evi_from_landsat_equal_numpy(self):
        path = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        g = kt.gdal()
        bands = g.Open(path).ReadAsArray().astype(np.float64)   # DN of bands 1-5, 7
        blue, red, nir = bands[0], bands[2], bands[3]
        # EVI's constants are for reflectance in 0..1 (Huete et al. 2002), and kalends refuses
        # digital numbers for it; 0.004 maps DN 0..255 into 0..1.02. It is no radiometric
        # calibration, only a scale under which the formula can be checked.
        scale = 0.004
        with np.errstate(divide="ignore", invalid="ignore"):
            ndvi = (nir - red) / (nir + red)
            b, r, n = ((v * scale).astype(np.float32).astype(np.float64) for v in (blue, red, nir))
            evi = 2.5 * (n - r) / (n + 6 * r - 7.5 * b + 1)
        for kind, ref in (("ndvi", ndvi), ("evi", evi)):
            # Indices outside [-1, 1] are missing; within 1e-5 of it they are +-1 pushed over by the
            # float32 reflectances and count as +-1. At this scale 196 EVI cells of the scene are
            # exactly +-1 in real numbers (DN with 6 n - 34 r + 30 b = 1000, or 14 n + 14 r - 30 b
            # + 1000 = 0; integer arithmetic), and float32 puts 100 of them beyond.
            ref = np.where(np.isfinite(ref) & (np.abs(ref) <= 1 + 1e-5), np.clip(ref, -1, 1), np.nan)
            out = os.path.join(self.tmp, kind)
            args = (["-q"] if kind == "evi" else []) + ["index", "--red", path, "--red-band", "3", "--nir", path, "--nir-band", "4",
                    "--kind", kind, "--date", "2000-01-01", "--out", out]
            if kind == "evi":
                args += ["--blue", path, "--blue-band", "1"]
                refused = kt.run_kalends([a if a != out else out + "-dn" for a in args])
                self.assertEqual(refused.returncode, 2, refused.stderr)
                self.assertIn("not reflectances", refused.stderr)
                self.assertIn("L7_ETMs.tif", refused.stderr)
                # The offset too: a scale alone had been the advice, half a fix for Collection 2.
                self.assertIn("--offset -0.2", refused.stderr)
                args += ["--scale", str(scale)]
            done = kt.run_kalends(args)
            self.assertEqual(done.returncode, 0, done.stderr)
            if kind == "ndvi":
                self.assertIn("kalends index: 1 date -> ", done.stdout)  # had said "1 dates"
                # Digital numbers: NDVI is computed (a common scale cancels) but a note says that
                # an offset or a gain per band does not (it had said nothing).
                self.assertIn("note: the red and near-infrared values (medians 63 and", done.stderr)
            ds = g.Open(os.path.join(out, "%s_2000-01-01.tif" % kind))
            got = ds.ReadAsArray().astype(np.float64)
            np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
            np.testing.assert_allclose(got[np.isfinite(ref)], ref[np.isfinite(ref)], rtol=1e-6, atol=1e-7)
            self.assertGreater(np.isfinite(got).mean(), 0.5)
            self.assertEqual(ds.GetProjectionRef(), g.Open(path).GetProjectionRef())

    def test_index_refuses_unpaired_dates(self):
        folder = os.path.join(self.tmp, "bands")
        os.makedirs(folder)
        for band, dates in (("red", ["2020-01-01", "2020-01-17"]), ("nir", ["2020-01-01"])):
            for d in dates:
                kt.write_raster(os.path.join(folder, "%s_%s.tif" % (band, d)), np.ones((4, 4), np.float32))
        out = os.path.join(self.tmp, "index-out")
        done = kt.run_kalends(["index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--out", out])
        self.assertEqual(done.returncode, 2)
        self.assertIn("red_2020-01-17.tif", done.stderr)
        self.assertIn("no near-infrared layer", done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1)
        self.assertEqual(kt.final_outputs(out) if os.path.isdir(out) else [], [])

    def test_index_refuses_a_near_infrared_date_without_its_red(self):
        # The reverse of the case above had written the dates red has and dropped the other,
        # exit 0 and no word (methods.md: a date lacking a partner is an error naming the file).
        folder = os.path.join(self.tmp, "bands-extra-nir")
        os.makedirs(folder)
        for band, dates in (("red", ["2020-01-01"]), ("nir", ["2020-01-01", "2020-01-17"])):
            for d in dates:
                kt.write_raster(os.path.join(folder, "%s_%s.tif" % (band, d)), np.ones((4, 4), np.float32))
        out = os.path.join(self.tmp, "index-extra-nir")
        done = kt.run_kalends(["index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("nir_2020-01-17.tif: no red layer for 2020-01-17", done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1)

    def test_index_reads_a_netcdf_time_axis_date_by_date(self):
        # One NetCDF file per band, a time axis of four dates: index had read band 1 as one
        # scene, written the first date and dropped three without a word. Checked against numpy
        # (NDVI = (NIR - red) / (NIR + red)). Invented data, written with scipy's netcdf_file.
        from scipy.io import netcdf_file
        g = kt.gdal()
        folder = os.path.join(self.tmp, "bands-netcdf")
        os.makedirs(folder)
        rng = np.random.default_rng(7)
        frames = {"red": (0.05 + 0.1 * rng.random((4, 6, 8))).astype("f4"),
                  "nir": (0.2 + 0.3 * rng.random((4, 6, 8))).astype("f4")}
        for name, data in frames.items():
            f = netcdf_file(os.path.join(folder, name + ".nc"), "w")
            f.createDimension("time", 4)
            f.createDimension("y", 6)
            f.createDimension("x", 8)
            t = f.createVariable("time", "d", ("time",))
            t[:] = [0, 16, 32, 48]
            t.units = "days since 2021-01-01"
            t.calendar = "standard"
            t.standard_name = "time"
            x = f.createVariable("x", "d", ("x",))
            x[:] = 500000 + 30 * np.arange(8) + 15
            x.standard_name = "projection_x_coordinate"
            x.units = "m"
            y = f.createVariable("y", "d", ("y",))
            y[:] = 4000000 - 30 * np.arange(6) - 15
            y.standard_name = "projection_y_coordinate"
            y.units = "m"
            v = f.createVariable(name, "f4", ("time", "y", "x"))
            v[:] = data
            f.close()
        out = os.path.join(self.tmp, "index-netcdf")
        done = kt.run_kalends(["index", "--red", 'NETCDF:"%s":red' % os.path.join(folder, "red.nc"),
                               "--nir", 'NETCDF:"%s":nir' % os.path.join(folder, "nir.nc"), "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("kalends index: 4 dates", done.stdout)
        for k, date in enumerate(["2021-01-01", "2021-01-17", "2021-02-02", "2021-02-18"]):
            ds = g.Open(os.path.join(out, "ndvi_%s.tif" % date))
            red, nir = frames["red"][k].astype(np.float64), frames["nir"][k].astype(np.float64)
            np.testing.assert_allclose(ds.ReadAsArray(), (nir - red) / (nir + red), rtol=1e-6, err_msg=date)
            ds = None

    def test_index_takes_a_valid_range(self):
        # A job's index step took valid_range; the command had no --valid-range. A saturated
        # reflectance (1.45) is missing, and so is the index there. Invented data.
        folder = os.path.join(self.tmp, "bands-range")
        os.makedirs(folder)
        red = np.full((3, 3), 0.1, np.float32)
        red[1, 1] = 1.45
        kt.write_raster(os.path.join(folder, "red_2020-01-01.tif"), red)
        kt.write_raster(os.path.join(folder, "nir_2020-01-01.tif"), np.full((3, 3), 0.5, np.float32))
        out = os.path.join(self.tmp, "index-range")
        done = kt.run_kalends(["-q", "index", "--red", os.path.join(folder, "red_*.tif"), "--nir",
                               os.path.join(folder, "nir_*.tif"), "--valid-range", "0,1", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        ds = kt.gdal().Open(os.path.join(out, "ndvi_2020-01-01.tif"))
        got = ds.ReadAsArray()
        self.assertTrue(np.isnan(got[1, 1]))
        self.assertEqual(int(np.isnan(got).sum()), 1)
        np.testing.assert_allclose(got[0, 0], (0.5 - 0.1) / (0.5 + 0.1), rtol=1e-6)

    def test_index_passes_each_dates_own_qa_band_on(self):
        # A QA raster with a band per date (dated by band descriptions): the whole file had been
        # copied as each date's QA, and `fill --qa` then read its first band for every date, so
        # the later dates' clouds were kept as observed. Invented data.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "bands-qa")
        os.makedirs(folder)
        dates = ["2020-01-01", "2020-01-17", "2020-02-02"]
        for band in ("red", "nir"):
            for d in dates:
                kt.write_raster(os.path.join(folder, "%s_%s.tif" % (band, d)),
                                np.full((4, 6), 0.1 if band == "red" else 0.4, np.float32))
        qa = np.zeros((3, 4, 6), np.uint16)
        for k in range(3):
            qa[k, :, : 2 * (k + 1)] = 8  # bit 3: a cloud strip 2, 4 and 6 px wide
        qa_path = os.path.join(folder, "qa_all.tif")
        ds = g.GetDriverByName("GTiff").Create(qa_path, 6, 4, 3, g.GDT_UInt16)
        for k in range(3):
            ds.GetRasterBand(k + 1).WriteArray(qa[k])
            ds.GetRasterBand(k + 1).SetDescription(dates[k])
        ds = None
        out = os.path.join(self.tmp, "index-qa-bands")
        done = kt.run_kalends(["-q", "index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--qa", qa_path, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        for k, d in enumerate(dates):
            copy = g.Open(os.path.join(out, "qa", "qa_%s.tif" % d))
            self.assertEqual(copy.RasterCount, 1, d)
            np.testing.assert_array_equal(copy.GetRasterBand(1).ReadAsArray(), qa[k], d)
            copy = None
        # QA files that are VRTs pointing at their sources by relative path are written as
        # GeoTIFFs (a copy elsewhere had lost its sources, and fill then called it corrupt).
        vrts = os.path.join(folder, "vrt")
        os.makedirs(vrts)
        for k, d in enumerate(dates):
            kt.write_raster(os.path.join(vrts, "src_%s.tif" % d), qa[k])
            g.Translate(os.path.join(vrts, "qa_%s.vrt" % d), os.path.join(vrts, "src_%s.tif" % d), format="VRT")
        out = os.path.join(self.tmp, "index-qa-vrt")
        done = kt.run_kalends(["-q", "index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--qa", os.path.join(vrts, "qa_*.vrt"),
                               "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        for k, d in enumerate(dates):
            copy = g.Open(os.path.join(out, "qa", "qa_%s.tif" % d))
            np.testing.assert_array_equal(copy.GetRasterBand(1).ReadAsArray(), qa[k], d)
            copy = None

    def test_index_names_both_files_of_a_grid_mismatch(self):
        # The red side had been named by its glob ("that of bands/red_*.tif"): a file on each
        # side now, as for any other pair.
        folder = os.path.join(self.tmp, "mismatch")
        os.makedirs(folder)
        kt.write_raster(os.path.join(folder, "red_2020-01-01.tif"), np.ones((4, 4), np.float32))
        kt.write_raster(os.path.join(folder, "nir_2020-01-01.tif"), np.ones((5, 4), np.float32))
        done = kt.run_kalends(["index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--out", os.path.join(self.tmp, "mm-out")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: %s: grid is 4 x 5 px, that of %s is 4 x 4" % (
            os.path.join(folder, "nir_2020-01-01.tif"), os.path.join(folder, "red_2020-01-01.tif")))

    def test_ndvi_refuses_red_and_nir_on_different_scales(self):
        # Landsat 7 bands 3 and 4 (shared data), red with a scale factor of 0.004 and NIR
        # without: an NDVI of the two is nonsense (median 0.99 against -0.07 on one scale), and
        # had been written without a word. Refused, naming both bands' medians.
        g = kt.gdal()
        source = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        folder = os.path.join(self.tmp, "scales")
        os.makedirs(folder)
        g.Translate(os.path.join(folder, "red_2021-01-10.tif"), source, bandList=[3], scaleParams=None)
        ds = g.Open(os.path.join(folder, "red_2021-01-10.tif"), g.GA_Update)
        ds.GetRasterBand(1).SetScale(0.004)
        ds = None
        g.Translate(os.path.join(folder, "nir_2021-01-10.tif"), source, bandList=[4])
        out = os.path.join(self.tmp, "scales-out")
        done = kt.run_kalends(["index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("they are not on one scale", done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1)
        self.assertFalse(os.path.exists(out))
        # Water: red near 0.03 and NIR near 0 on one scale (reflectances): accepted, although the
        # medians differ far more than 100-fold.
        water = os.path.join(self.tmp, "water")
        os.makedirs(water)
        kt.write_raster(os.path.join(water, "red_2021-01-10.tif"), np.full((8, 8), 0.03, np.float32))
        kt.write_raster(os.path.join(water, "nir_2021-01-10.tif"), np.full((8, 8), 0.0002, np.float32))
        done = kt.run_kalends(["-q", "index", "--red", os.path.join(water, "red_*.tif"),
                               "--nir", os.path.join(water, "nir_*.tif"), "--out", os.path.join(self.tmp, "water-out")])
        self.assertEqual(done.returncode, 0, done.stderr)
        # Both on one scale: accepted.
        ds = g.Open(os.path.join(folder, "nir_2021-01-10.tif"), g.GA_Update)
        ds.GetRasterBand(1).SetScale(0.004)
        ds = None
        done = kt.run_kalends(["-q", "index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        # A later date whose NIR file lacks the scale factor the others state: only the first
        # date had been judged, and that date's NDVI was written near 1 without a word.
        for band in (3, 4):
            name = "%s_2021-01-26.tif" % ("red" if band == 3 else "nir")
            g.Translate(os.path.join(folder, name), source, bandList=[band])
            if band == 3:
                ds = g.Open(os.path.join(folder, name), g.GA_Update)
                ds.GetRasterBand(1).SetScale(0.004)
                ds = None
        later_out = os.path.join(self.tmp, "scales-later-out")
        done = kt.run_kalends(["index", "--red", os.path.join(folder, "red_*.tif"),
                               "--nir", os.path.join(folder, "nir_*.tif"), "--out", later_out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("they are not on one scale", done.stderr)
        self.assertIn("nir_2021-01-26.tif", done.stderr)
        self.assertFalse(os.path.exists(later_out))

    def test_index_refuses_an_out_among_its_band_files(self):
        # The index written among the red files would be read back as a red layer of the same
        # date by the next run (duplicate date), as a fill's --out among its inputs would.
        folder = os.path.join(self.tmp, "bands-here")
        for band in ("red", "nir"):
            os.makedirs(os.path.join(folder, band))
            kt.write_raster(os.path.join(folder, band, "%s_2020-01-01.tif" % band), np.full((4, 4), 0.2, np.float32))
        done = kt.run_kalends(["index", "--red", os.path.join(folder, "red", "*.tif"), "--nir",
                               os.path.join(folder, "nir", "*.tif"), "--out", os.path.join(folder, "red")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("holds the red files themselves", done.stderr)
        self.assertEqual(os.listdir(os.path.join(folder, "red")), ["red_2020-01-01.tif"])

    def test_index_refuses_one_band_read_twice(self):
        landsat = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        out = os.path.join(self.tmp, "same-band")
        for extra, option in ((["--nir-band", "3"], "--nir-band"),
                              (["--nir-band", "4", "--kind", "evi", "--blue", landsat, "--blue-band", "4"], "--blue-band")):
            done = kt.run_kalends(["index", "--red", landsat, "--red-band", "3", "--nir", landsat, "--date",
                                   "2000-07-01", "--out", out] + extra)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn(option + ": reads the same band", done.stderr)
            self.assertFalse(os.path.exists(out))


class LeapYears(kt.TempDirTestCase):
    def test_day_366_joins_the_last_period_of_its_year(self):
        # Daily values (invented, one pixel; each value its own day's) from 2015-12-22 to
        # 2017-01-09, across the leap year 2016. The reference here: N-day periods start on day of
        # year 1, 1 + N, ... (docs/methods.md), as many every year as a 365-day year has, the last
        # running to 31 December; a period's value is the mean of its days' values. With 5, 73 and
        # 1 days (365 a multiple of N) 31 December 2016 had been a period of its own, dropped from
        # the 2016 layer, and every period of 2017 had read the one before it.
        folder = os.path.join(self.tmp, "daily")
        os.makedirs(folder)
        first = dt.date(2015, 12, 22)
        days = [first + dt.timedelta(days=k) for k in range(385)]
        values = {d: 0.1 + 0.001 * k for k, d in enumerate(days)}
        for d in days:
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % d.isoformat()),
                            np.full((1, 1), values[d], np.float32), geotransform=(500000, 250, 0, 9000000, 0, -250),
                            epsg=32736, nodata=float("nan"))
        g = kt.gdal()
        for n in (5, 73, 1, 8):
            out = os.path.join(self.tmp, "seasons-%dd" % n)
            done = kt.run_kalends(["-q", "seasons", os.path.join(folder, "*.tif"), "--out", out, "--period", "%dd" % n])
            self.assertEqual(done.returncode, 0, done.stderr)
            count = -(-365 // n)
            for year in (2016, 2017):
                layer = g.Open(os.path.join(out, "ndvi_year_%d.tif" % year)).ReadAsArray().reshape(-1)
                self.assertEqual(layer.size, count, (n, year))
                jan1 = dt.date(year, 1, 1)
                end = dt.date(year + 1, 1, 1)
                for k in range(count):
                    start = jan1 + dt.timedelta(days=k * n)
                    stop = end if k == count - 1 else start + dt.timedelta(days=n)
                    inside = [values[d] for d in days if start <= d < stop]
                    if not inside:
                        self.assertTrue(np.isnan(layer[k]), (n, year, k))
                    else:
                        self.assertAlmostEqual(float(layer[k]), float(np.mean(np.float32(inside))), places=5,
                                               msg=(n, year, k, start, stop))
        # fill --every: the last 5-day calendar output of 2016 stands for 26-31 December, and there
        # is none for 31 December alone.
        out = os.path.join(self.tmp, "fill-5d")
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--out", out, "--every", "5d",
                               "--method", "whittaker", "--lambda", "1e-6"])
        self.assertEqual(done.returncode, 0, done.stderr)
        names = sorted(os.listdir(os.path.join(out, "calendar-5d")))
        self.assertIn("ndvi_2016-12-26.tif", names)
        self.assertNotIn("ndvi_2016-12-31.tif", names)
        ds = g.Open(os.path.join(out, "calendar-5d", "ndvi_2016-12-26.tif"))
        # Calendar means read the curve at each day's middle less half a step (a composite's value
        # stands for its middle; docs/methods.md): daily composites read at noon give each day's own
        # value (before version 0.3.24 days were read at 00:00, each value less 0.0005, half a day of
        # the 0.001 a day rise). The 5 days to 30 December alone would give 0.0005 less.
        inside = [values[d] for d in days if dt.date(2016, 12, 26) <= d <= dt.date(2016, 12, 31)]
        self.assertAlmostEqual(float(ds.GetRasterBand(1).ReadAsArray()[0, 0]), float(np.mean(inside)), places=4)


class DimensionlessUnit(kt.TempDirTestCase):
    def test_an_integral_of_a_stack_in_unit_1_is_value_days(self):
        # CF writes "1" for a dimensionless quantity; "1 days" reads as plain days in UDUNITS
        # (from memory), a duration. Invented NDVI-like cycle of two years, mechanics only.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "unit1")
        os.makedirs(folder)
        dates = modis_dates(2)
        for d in dates:
            t = (d - dates[0]).days
            path = os.path.join(folder, "ndvi_%s.tif" % d.isoformat())
            kt.write_raster(path, np.full((3, 3), 0.4 + 0.3 * np.cos(2 * np.pi * t / YEAR), np.float32),
                            geotransform=(400000, 250, 0, 7200000, 0, -250), epsg=32606)
            ds = g.Open(path, 1)
            ds.GetRasterBand(1).SetUnitType("1")
            ds = None
        filled = os.path.join(self.tmp, "unit1-fill")
        kt.run_fill_ok(self, [os.path.join(folder, "*.tif"), "--out", filled, "--lambda", "5"])
        out = os.path.join(self.tmp, "unit1-seasons")
        done = kt.run_kalends(["-q", "seasons", filled, "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        cycle = g.Open(sorted(glob.glob(os.path.join(out, "*_cycle_*.tif")))[0])
        units = {cycle.GetRasterBand(b).GetDescription(): cycle.GetRasterBand(b).GetUnitType()
                 for b in range(1, cycle.RasterCount + 1)}
        self.assertEqual(units["mean"], "1")
        self.assertEqual(units["season1_integral"], "value-days")


if __name__ == "__main__":
    unittest.main(verbosity=2)
