"""kalends fill on a small georeferenced stack, checked with Python GDAL and numpy.

The stack is invented (this file tests mechanics, not accuracy): 300 x 260 px, so that the
256 px tiles and the blocks have ragged edges; UTM zone 36S (EPSG:32736), 250 m pixels; int16
with scale 0.0001 and nodata -3000 (the MODIS MOD13 NDVI convention: Didan, K. (2015),
MOD13A1 V006 user guide -- cited from memory); 30 dates 16 days apart named the MODIS way
(`ndvi_A2020145.tif`, year and day of year), crossing a year boundary where the day of year
restarts at 001 (so one step is 14 days).

Expected values come from the input as read with GDAL and numpy, from Python's datetime for
the dates, from osr for the CRS, and from scipy for the Whittaker curve of a few pixels
[Eilers, P.H.C. (2003), Anal. Chem. 75:3631-3636].

Run: /usr/bin/python3 -m unittest -v tests/reference/test_outputs_gdal.py
"""

import datetime
import glob
import json
import os
import sys
import unittest

import numpy as np
import scipy.sparse
import scipy.sparse.linalg

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

WIDTH, HEIGHT = 300, 260
EPSG = 32736
GEOTRANSFORM = (300000.0, 250.0, 0.0, 8500000.0, 0.0, -250.0)
SCALE, NODATA = 0.0001, -3000
LAMBDA = 10.0


def modis_dates():
    """(year, day of year) of 30 MODIS 16-day composites from 2020-145 to 2021-241."""
    dates = [(2020, doy) for doy in range(145, 366, 16)]  # 145 .. 353
    dates += [(2021, doy) for doy in range(1, 366, 16)]
    return dates[:30]


def to_date(year, doy):
    return datetime.date(year, 1, 1) + datetime.timedelta(days=doy - 1)


def make_stack(folder, width=WIDTH, height=HEIGHT, seed=1):
    """Writes the stack; returns (raw int16 array [date, row, col], list of dates)."""
    rng = np.random.default_rng(seed)
    dates = [to_date(y, d) for y, d in modis_dates()]
    days = np.array([(d - dates[0]).days for d in dates], dtype=float)
    rows, cols = np.mgrid[0:height, 0:width]
    peak = 60.0 + 0.3 * cols + 0.2 * rows  # spatially varying timing of the green-up peak
    amplitude = 0.3 + 0.3 * rows / height
    raw = np.empty((len(dates), height, width), dtype=np.int16)
    for i, t in enumerate(days):
        season = np.exp(-(((t % 365.0) - peak) / 50.0) ** 2)
        ndvi = 0.15 + amplitude * season + 0.02 * rng.standard_normal((height, width))
        raw[i] = np.round(ndvi / SCALE).astype(np.int16)
    missing = rng.random(raw.shape) < 0.25          # scattered cloud
    missing[:, 100:110, 50:60] = True                # never observed
    missing[:5, 200:210, 280:290] = True             # first observation on the 6th date
    missing[5, 200:210, 280:290] = False
    missing[10:20, 30:40, 150:170] = True            # a long gap of 10 dates
    raw[missing] = NODATA
    for i, (year, doy) in enumerate(modis_dates()):
        kt.write_raster(os.path.join(folder, "ndvi_A%04d%03d.tif" % (year, doy)), raw[i],
                        geotransform=GEOTRANSFORM, epsg=EPSG, scale=SCALE, nodata=NODATA)
    return raw, dates


def whittaker_reference(y, lam, order=2):
    """scipy solve of (W + lambda D'D) z = W y on the regular slot grid; y NaN = missing."""
    n = len(y)
    w = np.isfinite(y).astype(float)
    d = scipy.sparse.csc_matrix(np.diff(np.eye(n), n=order, axis=0))
    a = (scipy.sparse.diags(w) + lam * (d.T @ d)).tocsc()
    return scipy.sparse.linalg.spsolve(a, w * np.where(np.isfinite(y), y, 0.0))


def read_all(out_dir, dates, name="ndvi"):
    outs = [kt.read_output(os.path.join(out_dir, "%s_%s.tif" % (name, d.isoformat())))
            for d in dates]
    return {key: np.stack([o[key] for o in outs]) for key in ("value", "sd", "flag")}, outs


class OutputsAgainstGdal(kt.TempDirTestCase):

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        cls.stack_dir = os.path.join(cls.tmp, "stack")
        os.makedirs(cls.stack_dir)
        cls.raw, cls.dates = make_stack(cls.stack_dir)
        cls.pattern = os.path.join(cls.stack_dir, "ndvi_A*.tif")
        cls.valid = cls.raw != NODATA
        # Reference physical values: raw * scale in double, then rounded once to float32.
        cls.physical = (cls.raw.astype(np.float64) * SCALE).astype(np.float32)

        # One default run (fixed lambda, 1 GiB, 2 threads, with a monthly calendar) ...
        cls.out_a = os.path.join(cls.tmp, "a")
        cls.done_a = kt.run_kalends(["-q", "fill", cls.pattern, "--out", cls.out_a, "--lambda",
                                     str(LAMBDA), "--memory", "1G", "--threads", "2",
                                     "--every", "1M"])
        cls.a = read_all(cls.out_a, cls.dates) if cls.done_a.returncode == 0 else None

    def setUp(self):
        self.assertEqual(self.done_a.returncode, 0, self.done_a.stderr)

    def test_every_date_has_an_output(self):
        expected = sorted("ndvi_%s.tif" % d.isoformat() for d in self.dates)
        self.assertEqual(kt.final_outputs(self.out_a), expected)
        self.assertEqual(len(expected), 30)
        # The year boundary: 2020 day 353 is 18 December, 2021 day 001 is 1 January.
        self.assertIn("ndvi_2020-12-18.tif", expected)
        self.assertIn("ndvi_2021-01-01.tif", expected)
        # No temporary left behind.
        self.assertEqual([f for f in os.listdir(self.out_a) if f.endswith(".partial")], [])

    def test_grid_crs_bands_and_layout(self):
        from osgeo import osr
        expected_srs = osr.SpatialReference()
        expected_srs.ImportFromEPSG(EPSG)
        gdal = kt.gdal()
        for out in self.a[1]:
            self.assertEqual(out["size"], (WIDTH, HEIGHT, 3))
            for got, want in zip(out["geotransform"], GEOTRANSFORM):
                self.assertAlmostEqual(got, want, delta=1e-9 * max(1.0, abs(want)))
            srs = osr.SpatialReference()
            srs.ImportFromWkt(out["wkt"])
            self.assertTrue(srs.IsSame(expected_srs), out["wkt"][:200])
            self.assertEqual(out["descriptions"], ["value", "sd", "flag"])
            self.assertEqual(out["types"], [gdal.GDT_Float32] * 3)
            self.assertTrue(np.isnan(out["nodata"][0]) and np.isnan(out["nodata"][1]))
            self.assertEqual(out["block"], [256, 256])
            self.assertEqual(out["compression"], "DEFLATE")

    def test_metadata_items(self):
        for date, out in zip(self.dates, self.a[1]):
            md = out["metadata"]
            self.assertEqual(md.get("KALENDS_METHOD"), "whittaker")
            self.assertIn("lambda=10", md.get("KALENDS_PARAMETERS", ""))
            # Every parameter that changes the values, the limits on gaps and extrapolation too
            # (the defaults: no gap limit, 32 days past the first and last observation).
            self.assertIn("max_gap_days=0", md.get("KALENDS_PARAMETERS", ""))
            self.assertIn("max_extrapolation_days=32", md.get("KALENDS_PARAMETERS", ""))
            self.assertTrue(md.get("KALENDS_DATE", "").startswith(date.isoformat()))
            doy = date.timetuple().tm_yday
            self.assertIn("ndvi_A%04d%03d.tif" % (date.year, doy), md.get("KALENDS_SOURCE", ""))
            self.assertTrue(md.get("KALENDS_VERSION"))

    def test_observed_values_equal_physical_input(self):
        arrays = self.a[0]
        flag0 = arrays["flag"] == 0
        # Flag 0 exactly where the input has a value (no outlier rejection in this run).
        np.testing.assert_array_equal(flag0, self.valid)
        got = arrays["value"][flag0]
        want = self.physical[flag0]
        differ = int(np.sum(got != want))
        self.assertEqual(differ, 0,
                         "%d of %d observed values differ from float32(raw * %g); largest "
                         "difference %.3g" % (differ, got.size, SCALE,
                                              float(np.max(np.abs(got.astype(float) - want)))))

    def test_flags_and_nan(self):
        arrays = self.a[0]
        flag, value, sd = arrays["flag"], arrays["value"], arrays["sd"]
        self.assertTrue(set(np.unique(flag)).issubset({0.0, 2.0, 3.0}), np.unique(flag))
        # NaN only with flag 3, and flag 3 always NaN.
        np.testing.assert_array_equal(np.isnan(value), flag == 3)
        np.testing.assert_array_equal(np.isnan(sd), flag == 3)
        # Missing input -> filled (2) or unfillable (3); the never-observed block is all 3.
        self.assertTrue(np.all(np.isin(flag[~self.valid], (2.0, 3.0))))
        self.assertTrue(np.all(flag[:, 100:110, 50:60] == 3))
        # Default --max-extrapolation 32 days: first observation on the 6th date (day 80), so
        # dates 0..2 (80, 64, 48 days before) stay unfilled, dates 3 and 4 (32, 16) are filled.
        block = flag[:, 200:210, 280:290]
        self.assertTrue(np.all(block[:3] == 3))
        self.assertTrue(np.all(block[3:5] == 2))
        # The 10-date gap is filled (no --max-gap by default).
        self.assertTrue(np.all(flag[10:20, 30:40, 150:170] == 2))

    def test_summary_counts(self):
        s = kt.read_summary(self.out_a)
        flag = self.a[0]["flag"]
        self.assertEqual((s["dates"], s["width"], s["height"]), (30, WIDTH, HEIGHT))
        self.assertEqual(s["pixel_dates"], self.raw.size)
        self.assertEqual(s["observed"], int(self.valid.sum()))
        self.assertEqual(s["missing"], int((~self.valid).sum()))
        self.assertEqual(s["filled"], int((flag == 2).sum()))
        self.assertEqual(s["unfilled"], int((flag == 3).sum()))
        self.assertEqual(s["rejected"], 0)
        self.assertEqual(s["masked_by_qa"], 0)
        self.assertEqual(s["pixels_never_observed"], int((~self.valid.any(axis=0)).sum()))

    def test_summary_counts_add_up_when_rejected_values_have_no_replacement(self):
        # --envelope upper rejects low values; where the first kept observation lies more than
        # --max-extrapolation (32 days) after them, nothing replaces them and they get flag 3.
        # They still count as rejected: observed = flag 0 + rejected, missing = filled + unfilled.
        out = os.path.join(self.tmp, "envelope")
        kt.run_fill_ok(self, [self.pattern, "--out", out, "--lambda", str(LAMBDA), "--envelope", "upper"])
        s = kt.read_summary(out)
        flag = read_all(out, self.dates)[0]["flag"]
        observed_flag3 = int(((flag == 3) & self.valid).sum())
        self.assertGreater(observed_flag3, 0)
        self.assertEqual(s["observed"], int((flag == 0).sum()) + s["rejected"])
        self.assertEqual(s["rejected"], int((flag == 1).sum()) + observed_flag3)
        self.assertEqual(s["missing"], s["filled"] + s["unfilled"])
        self.assertEqual(s["unfilled"], int(((flag == 3) & ~self.valid).sum()))

    def test_filled_values_follow_the_whittaker_solution(self):
        # A few pixels, including ones at tile/block edges: the filled values equal the scipy
        # solve on the regular 16-day slot grid (the 14-day step at the new year falls on the
        # next slot).
        arrays = self.a[0]
        for row, col in ((0, 0), (255, 255), (256, 256), (259, 299), (35, 160), (130, 17)):
            y = np.where(self.valid[:, row, col], self.physical[:, row, col].astype(float), np.nan)
            z = whittaker_reference(y, LAMBDA)
            flag = arrays["flag"][:, row, col]
            filled = flag == 2
            self.assertTrue(filled.any())
            got = arrays["value"][filled, row, col]
            self.assertLess(kt.rel_diff(got, z[filled]), 1e-5, "pixel %d,%d" % (row, col))

    def test_monthly_calendar(self):
        cal = os.path.join(self.out_a, "calendar-1M")
        # Dates mark their composites' first days (--date-marks start, the default here): the
        # calendar covers the days the first and last composites stand for, from the first's
        # date to the last's plus the 16-day step, less a day, cut at 31 December where the
        # composites restart every 1 January (docs/methods.md, Regular calendar and Seasonal
        # layers; before version 0.3.19 it ran from the first composite's middle to the last's).
        step = datetime.timedelta(days=16)
        first, last = self.dates[0], self.dates[-1] + step - datetime.timedelta(days=1)
        if all((d.timetuple().tm_yday - 1) % 16 == 0 for d in self.dates):
            last = min(last, datetime.date(self.dates[-1].year, 12, 31))
        months = []
        y, m = first.year, first.month
        while (y, m) <= (last.year, last.month):
            months.append("ndvi_%04d-%02d-01.tif" % (y, m))
            y, m = (y + 1, 1) if m == 12 else (y, m + 1)
        self.assertEqual(kt.final_outputs(cal), months)
        out = kt.read_output(os.path.join(cal, months[3]))
        self.assertEqual(out["size"], (WIDTH, HEIGHT, 3))
        np.testing.assert_array_equal(np.isnan(out["value"]), out["flag"] == 3)
        self.assertEqual(kt.read_summary(self.out_a)["calendar_outputs"], len(months))
        # A period's flags: 0, 2 or 3, never 1; the band's FLAG_MEANINGS had been the dates'
        # (naming "1=observed but rejected as an outlier").
        self.assertTrue(set(np.unique(out["flag"])) <= {0.0, 2.0, 3.0})
        ds = kt.gdal().Open(os.path.join(cal, months[3]))
        meanings = ds.GetRasterBand(3).GetMetadataItem("FLAG_MEANINGS")
        ds = None
        self.assertIn("0=an observation was kept inside the period", meanings)
        self.assertNotIn("1=", meanings)

    def test_block_size_and_threads_do_not_change_results(self):
        # The same fill in small blocks on one thread. kalends refuses a budget below its fixed
        # overheads or below one 256 x 256 block, and this raster is barely larger than one
        # block, so the smallest budget that runs is searched for (8 MiB steps, then 1 MiB;
        # refusals are quick): it gives the plan with the most blocks (asserted below).
        out_b = os.path.join(self.tmp, "b")
        refusals = {}

        def runs(mib):
            before = kt.final_outputs(out_b) if os.path.isdir(out_b) else []
            done = kt.run_kalends(["-q", "fill", self.pattern, "--out", out_b, "--lambda",
                                   str(LAMBDA), "--memory", "%dM" % mib, "--threads", "1",
                                   "--every", "1M"])
            if done.returncode != 0:
                self.assertEqual(done.returncode, 2, done.stderr)
                # A refused run writes nothing and leaves an earlier run's outputs as they were.
                self.assertEqual(kt.final_outputs(out_b) if os.path.isdir(out_b) else [], before)
                refusals.setdefault("".join(c for c in done.stderr if not c.isdigit()).strip(),
                                    mib)
            return done.returncode == 0

        coarse = next((mib for mib in range(64, 1025, 8) if runs(mib)), None)
        self.assertIsNotNone(coarse, "no budget up to 1 GiB ran on one thread: %s" % refusals)
        mib = next((m for m in range(max(64, coarse - 7), coarse) if runs(m)), coarse)
        if mib == coarse:
            self.assertTrue(runs(coarse))  # the outputs of the chosen budget
        print("\nsmallest budget that runs: %d MiB; refusals (first budget each): %s" % (
            mib, sorted(refusals.items(), key=lambda kv: kv[1])))
        sa, sb = kt.read_summary(self.out_a), kt.read_summary(out_b)
        print("blocks: %s of %s (1G, 2 threads) vs %s of %s (%d MiB, 1 thread)" % (
            sa["blocks"], sa["block_size"], sb["blocks"], sb["block_size"], mib))
        self.assertGreater(sb["blocks"], sa["blocks"], "the small budget did not split the work")
        gdal = kt.gdal()
        names = kt.final_outputs(self.out_a)
        self.assertEqual(kt.final_outputs(out_b), names)
        cal = "calendar-1M"
        self.assertEqual(kt.final_outputs(os.path.join(out_b, cal)),
                         kt.final_outputs(os.path.join(self.out_a, cal)))
        pairs = [(os.path.join(self.out_a, n), os.path.join(out_b, n)) for n in names]
        pairs += [(os.path.join(self.out_a, cal, n), os.path.join(out_b, cal, n))
                  for n in kt.final_outputs(os.path.join(self.out_a, cal))]
        for path_a, path_b in pairs:
            da, db = gdal.Open(path_a), gdal.Open(path_b)
            for b in (1, 2, 3):
                # Raw bytes of the decoded pixels: identical including NaN payloads.
                ba = da.GetRasterBand(b).ReadRaster()
                bb = db.GetRasterBand(b).ReadRaster()
                self.assertTrue(ba == bb, "%s band %d differs" % (os.path.basename(path_a), b))
            da = db = None

    def test_smooth_changes_only_values(self):
        out_s = os.path.join(self.tmp, "smooth")
        kt.run_fill_ok(self, [self.pattern, "--out", out_s, "--lambda", str(LAMBDA),
                              "--threads", "2", "--smooth"])
        smooth, _ = read_all(out_s, self.dates)
        plain = self.a[0]
        np.testing.assert_array_equal(smooth["flag"], plain["flag"])
        np.testing.assert_array_equal(smooth["sd"], plain["sd"])
        not_observed = plain["flag"] != 0
        np.testing.assert_array_equal(smooth["value"][not_observed], plain["value"][not_observed])
        observed = ~not_observed
        changed = smooth["value"][observed] != plain["value"][observed]
        self.assertGreater(changed.mean(), 0.9, "--smooth left observed values unchanged")
        # The smooth value at an observed cell is the curve: for a few pixels, the scipy solve.
        for row, col in ((0, 0), (259, 299), (128, 140)):
            y = np.where(self.valid[:, row, col], self.physical[:, row, col].astype(float), np.nan)
            z = whittaker_reference(y, LAMBDA)
            finite = smooth["flag"][:, row, col] != 3
            self.assertLess(kt.rel_diff(smooth["value"][finite, row, col], z[finite]), 1e-5)


class RecordedParameters(kt.TempDirTestCase):
    def test_parameters_are_recorded_whole(self):
        # Six digits (%g) had recorded --lambda 123.456789012 as 123.457, and harmonic had cut
        # its gap limits to whole days (40.7 as 40): a fill re-run from its record was another
        # fill. Each number now reads back (Python's float) as the one given. Invented stack.
        stack = os.path.join(self.tmp, "stack")
        kt.make_synthetic_stack(stack, 12, 10)
        pattern = os.path.join(stack, "ndvi_*.tif")
        cases = (("whittaker", {"lambda": "123.456789012", "max_gap_days": "20.5"}, ["--max-gap", "20.5"]),
                 ("harmonic", {"reject_below": "2.123456789", "max_gap_days": "20.5",
                               "max_extrapolation_days": "40.7"},
                  ["--reject-below", "2.123456789", "--max-gap", "20.5", "--max-extrapolation", "40.7"]),
                 ("spacetime", {"space_smoothing": "1.6870239755710472"}, ["--space-smoothing", "1.6870239755710472"]))
        for method, want, extra in cases:
            out = os.path.join(self.tmp, method)
            args = [pattern, "--out", out, "--method", method] + extra
            if method == "whittaker":
                args += ["--lambda", "123.456789012"]
            kt.run_fill_ok(self, args)
            first = sorted(glob.glob(os.path.join(out, "ndvi_*.tif")))[0]
            recorded = dict(item.split("=", 1) for item in
                            kt.gdal().Open(first).GetMetadataItem("KALENDS_PARAMETERS").split())
            for key, given in want.items():
                self.assertEqual(float(recorded[key]), float(given), (method, key, recorded[key]))
            # The summary names the version that made it (it had named none).
            version = kt.run_kalends(["--version"]).stdout.split()[-1]
            with open(os.path.join(out, "fill-summary.json")) as f:
                self.assertEqual(json.load(f)["kalends_version"], version)


class QaMask(kt.TempDirTestCase):
    """A QA stack with bit fields; --keep 'bits0-1 in 0,1' removes QA 2 and 3."""

    def test_qa_bits(self):
        kt.require_binary(kt.KALENDS_BIN)
        width, height = 70, 40
        data_dir = os.path.join(self.tmp, "data")
        qa_dir = os.path.join(self.tmp, "qa")
        os.makedirs(data_dir)
        os.makedirs(qa_dir)
        raw, dates = make_stack(data_dir, width, height, seed=9)
        rng = np.random.default_rng(10)
        # Bits 0-1: 0 good, 1 marginal, 2 snow, 3 cloud (the MOD13 "pixel reliability" codes,
        # cited from memory); higher bits carry other flags that the rule must ignore.
        low = rng.choice(4, size=raw.shape, p=[0.55, 0.2, 0.1, 0.15]).astype(np.uint16)
        high = rng.integers(0, 64, size=raw.shape).astype(np.uint16) << 2
        qa = (low | high).astype(np.uint16)
        for i, (year, doy) in enumerate(modis_dates()):
            kt.write_raster(os.path.join(qa_dir, "qa_A%04d%03d.tif" % (year, doy)), qa[i],
                            geotransform=GEOTRANSFORM, epsg=EPSG)
        out = os.path.join(self.tmp, "out")
        kt.run_fill_ok(self, [os.path.join(data_dir, "*.tif"), "--out", out, "--lambda", "10",
                              "--qa", os.path.join(qa_dir, "*.tif"), "--keep", "bits0-1 in 0,1",
                              "--threads", "2"])
        arrays, _ = read_all(out, dates)
        flag = arrays["flag"]
        bad_qa = (qa & 3) >= 2
        valid = raw != NODATA
        self.assertTrue(bad_qa.any() and (valid & bad_qa).any())
        # Cells whose QA bits 0-1 are 2 or 3 are never kept as observed.
        self.assertTrue(np.all(flag[bad_qa] >= 2), "a cell with QA 2/3 kept as observed")
        # Cells with a value and QA 0/1 are observed (flag 0; no outlier rejection here).
        self.assertTrue(np.all(flag[valid & ~bad_qa] == 0))
        s = kt.read_summary(out)
        self.assertEqual(s["masked_by_qa"], int((valid & bad_qa).sum()))
        self.assertEqual(s["observed"], int((valid & ~bad_qa).sum()))


class RejectedNearTheEnd(kt.TempDirTestCase):
    """A low outlier after the last kept observation, beyond --max-extrapolation (32 days).

    Mechanics with invented data: 25 clean dates, two missing, one value far below the curve
    (rejected as an outlier: flag 1), two missing. The rejected value lies 48 days after the
    last kept one: beyond the reach of the fit, so it cannot be replaced and is flag 3
    (docs/outputs.md). The invariant holds: a value is NaN only with flag 3.
    """

    def test_flag_1_never_nan(self):
        kt.require_binary(kt.KALENDS_BIN)
        width, height = 8, 8
        folder = os.path.join(self.tmp, "stack")
        os.makedirs(folder)
        rng = np.random.default_rng(12)
        dates = [to_date(y, d) for y, d in modis_dates()]
        days = np.array([(d - dates[0]).days for d in dates], dtype=float)
        ndvi = 0.45 + 0.25 * np.cos(2 * np.pi * (days - 60.0) / 365.25)
        raw = np.empty((30, height, width), dtype=np.int16)
        for i in range(30):
            raw[i] = np.round((ndvi[i] + 0.005 * rng.standard_normal((height, width))) / SCALE)
        raw[27] = np.round((ndvi[27] - 0.5) / SCALE)  # cloud: far below the curve
        raw[[25, 26, 28, 29]] = NODATA
        for i, (year, doy) in enumerate(modis_dates()):
            kt.write_raster(os.path.join(folder, "ndvi_A%04d%03d.tif" % (year, doy)), raw[i],
                            geotransform=GEOTRANSFORM, epsg=EPSG, scale=SCALE, nodata=NODATA)
        for label, args in (("harmonic", ["--method", "harmonic", "--harmonics", "2"]),
                            ("whittaker envelope", ["--lambda", "10", "--envelope", "upper"])):
            with self.subTest(label):
                out = os.path.join(self.tmp, label.replace(" ", "-"))
                kt.run_fill_ok(self, [os.path.join(folder, "*.tif"), "--out", out] + args)
                arrays, _ = read_all(out, dates)
                flag, value = arrays["flag"], arrays["value"]
                # The low value is rejected, and with nothing in reach to replace it: flag 3.
                self.assertTrue(np.all(flag[27] == 3), "%s: flags at the low value %s" %
                                (label, np.unique(flag[27])))
                self.assertTrue(np.all(np.isin(flag[:25][raw[:25] != NODATA], (0.0, 1.0))), label)
                wrong = np.isnan(value) != (flag == 3)
                self.assertEqual(int(wrong.sum()), 0,
                                 "%s: NaN value with flags %s (dates %s)" % (
                                     label, np.unique(flag[wrong]),
                                     sorted(set(int(t) for t in np.argwhere(wrong)[:, 0]))))


class MixedSpacing(kt.TempDirTestCase):
    """8-day composites, then 16-day ones (two products, or one that changed its calendar)."""

    def test_a_line_is_kept_on_its_true_days(self):
        # The order-2 difference penalty leaves a straight line unpenalised (Eilers 2003), so on
        # the dates' true days a line is reproduced whatever lambda. Before 0.3.14 the grid took
        # the median step (16 days) and the 8-day dates pushed each other on, slot after slot:
        # the fill at day 169 was 0.2596 against 0.248.
        folder = os.path.join(self.tmp, "mixed")
        os.makedirs(folder)
        days = [145, 153, 161, 169, 177, 193, 209, 225, 241, 257]
        gaps = (169, 225)
        for doy in days:
            values = np.full((4, 4), round((0.2 + 0.002 * (doy - 145)) / SCALE), np.int16)
            if doy in gaps:
                values[:] = NODATA
            kt.write_raster(os.path.join(folder, "ndvi_A2004%03d.tif" % doy), values, geotransform=GEOTRANSFORM,
                            epsg=EPSG, scale=SCALE, nodata=NODATA)
        out = os.path.join(self.tmp, "out")
        done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--out", out, "--lambda", "1e5"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("dates of mixed spacing (median 16 days, smallest 8)", done.stderr)
        for doy in gaps:
            date = datetime.date(2004, 1, 1) + datetime.timedelta(days=doy - 1)
            filled = kt.read_output(os.path.join(out, "ndvi_%s.tif" % date.isoformat()))
            self.assertTrue(np.all(filled["flag"] == 2))
            np.testing.assert_allclose(filled["value"], 0.2 + 0.002 * (doy - 145), atol=2e-4)
        done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif"), "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("time grid step 8 days (the smallest spacing", done.stdout)
        self.assertIn("15 slots, 10 with a date", done.stdout)

    def test_a_regular_stack_keeps_the_median_step(self):
        # MODIS 16-day over three year ends (DOY 353 then 001, 13 days): the median step.
        folder = os.path.join(self.tmp, "regular")
        os.makedirs(folder)
        for year in (2019, 2020, 2021):
            for doy in range(1, 366, 16):
                kt.write_raster(os.path.join(folder, "ndvi_A%d%03d.tif" % (year, doy)), np.full((2, 2), 5000, np.int16),
                                scale=SCALE, nodata=NODATA)
        done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif"), "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("time grid step 16 days (the median spacing)", done.stdout)


class TwoStacksOneFolder(kt.TempDirTestCase):
    """Two stacks of one name (two areas, or a copy) filled into one --out folder."""

    def write_stack(self, folder, doys):
        os.makedirs(folder)
        for doy in doys:
            kt.write_raster(os.path.join(folder, "ndvi_A2004%03d.tif" % doy), np.full((3, 3), 5000, np.int16),
                            geotransform=GEOTRANSFORM, epsg=EPSG, scale=SCALE, nodata=NODATA)

    def test_another_stacks_output_of_the_same_date_is_replaced_with_a_note(self):
        # Both stacks have DOY 17: the second fill's output takes its name, which had gone unsaid.
        first, second = os.path.join(self.tmp, "north"), os.path.join(self.tmp, "south")
        self.write_stack(first, [1, 17, 33])
        self.write_stack(second, [17, 49, 65])
        out = os.path.join(self.tmp, "shared")
        self.assertEqual(kt.run_kalends(["-q", "fill", os.path.join(first, "*.tif"), "--out", out]).returncode, 0)
        done = kt.run_kalends(["-q", "fill", os.path.join(second, "*.tif"), "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: 1 earlier output in %s made from another input (%s) had this fill's names and was replaced"
                      % (out, os.path.join(first, "*.tif")), done.stderr)
        self.assertEqual(len(glob.glob(os.path.join(out, "ndvi_2004-*.tif"))), 5)

    def test_the_other_stacks_outputs_stay_and_its_own_withdrawn_dates_go(self):
        # The second fill had removed the first stack's outputs of dates it did not have, without
        # a word. Now they stay; a date withdrawn from the same stack still goes, and is counted.
        first, second = os.path.join(self.tmp, "east"), os.path.join(self.tmp, "west")
        self.write_stack(first, [1, 17, 33, 49, 65])
        self.write_stack(second, [97, 113, 129, 145])
        out = os.path.join(self.tmp, "out")
        for folder in (first, second):
            done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--out", out])
            self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("removed", done.stdout)
        self.assertIn("fill-summary.json of another input (%s) was replaced" % os.path.join(first, "*.tif"),
                      done.stderr)
        self.assertEqual(len(glob.glob(os.path.join(out, "ndvi_2004-*.tif"))), 9)
        os.remove(os.path.join(second, "ndvi_A2004145.tif"))
        # The same input spelled another way ("./west/*.tif" from the folder above, as a user
        # would type it by hand where cron gives the absolute path) is still the same input.
        done = kt.run_kalends(["fill", os.path.join(".", os.path.basename(second), "*.tif"), "--out", out],
                              cwd=self.tmp)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("(1 earlier output no longer made removed)", done.stdout)
        self.assertNotIn("fill-summary.json of another input", done.stderr)  # its own
        names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(out, "ndvi_2004-*.tif")))
        self.assertEqual(len(names), 8)
        self.assertNotIn("ndvi_2004-05-24.tif", names)  # DOY 145 of 2004 (a leap year)
        self.assertIn("ndvi_2004-01-01.tif", names)
        # Through a link to the folder (a mount point, a 'current' link): the same files, so the
        # same input; it had counted as another and kept the withdrawn date's output.
        os.symlink(second, os.path.join(self.tmp, "west-link"))
        os.remove(os.path.join(second, "ndvi_A2004129.tif"))
        done = kt.run_kalends(["fill", os.path.join("west-link", "*.tif"), "--out", out], cwd=self.tmp)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("(1 earlier output no longer made removed)", done.stdout)
        self.assertNotIn("another input", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(out, "ndvi_2004-05-08.tif")))  # DOY 129
        self.assertEqual(len(glob.glob(os.path.join(out, "ndvi_2004-*.tif"))), 7)


class PointSamples(kt.TempDirTestCase):
    def test_a_point_grid_stays_a_point_grid(self):
        # AREA_OR_POINT=Point (GeoTIFF's RasterPixelIsPoint): GDAL reports the cells' corners
        # either way, but the file's tie point is the first cell's centre. Fill outputs had said
        # Area with the same corner: a reader that takes tie points literally
        # (GTIFF_POINT_GEO_IGNORE=YES) then put input and output half a cell apart.
        gdal = kt.gdal()
        folder = os.path.join(self.tmp, "point")
        os.makedirs(folder)
        rng = np.random.default_rng(5)
        for doy in range(1, 200, 16):
            path = os.path.join(folder, "ndvi_A2004%03d.tif" % doy)
            values = kt.f32(0.5 + 0.1 * rng.random((10, 12)))
            values[rng.random((10, 12)) < 0.3] = np.nan
            kt.write_raster(path, values, geotransform=GEOTRANSFORM, epsg=EPSG)
            ds = gdal.Open(path, gdal.GA_Update)
            ds.SetMetadataItem("AREA_OR_POINT", "Point")
            ds = None
        out = os.path.join(self.tmp, "point_out")
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--out", out, "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        # validate's kept work files too (they had said Area).
        checked = os.path.join(self.tmp, "point_validate")
        done = kt.run_kalends(["-q", "validate", os.path.join(folder, "*.tif"), "--out", checked, "--methods",
                               "whittaker", "--lambda", "10", "--keep-work"])
        self.assertEqual(done.returncode, 0, done.stderr)
        source = os.path.join(folder, "ndvi_A2004001.tif")
        work = sorted(glob.glob(os.path.join(checked, "work", "*", "*.tif")))
        self.assertTrue(work)
        try:
            for ignore in ("NO", "YES"):
                gdal.SetConfigOption("GTIFF_POINT_GEO_IGNORE", ignore)
                for written in [os.path.join(out, "ndvi_2004-01-01.tif")] + work:
                    a, b = gdal.Open(source), gdal.Open(written)
                    self.assertEqual(b.GetMetadataItem("AREA_OR_POINT"), "Point", written)
                    np.testing.assert_allclose(b.GetGeoTransform(), a.GetGeoTransform(), rtol=0, atol=1e-6)
                    a = b = None
        finally:
            gdal.SetConfigOption("GTIFF_POINT_GEO_IGNORE", None)


class NodataOfTheType(kt.TempDirTestCase):
    def test_a_nodata_no_stored_value_can_equal_is_refused(self):
        # int16 NDVI x 10000: --nodata -40000 (or 0.5) marks nothing, and every fill value would
        # have counted as an observation without a word. Refused naming the type's range.
        folder = os.path.join(self.tmp, "int16")
        os.makedirs(folder)
        for doy in (1, 17, 33):
            kt.write_raster(os.path.join(folder, "ndvi_A2004%03d.tif" % doy), np.full((3, 3), 5000, np.int16),
                            geotransform=GEOTRANSFORM, epsg=EPSG, scale=SCALE, nodata=NODATA)
        # NaN too: no integer is NaN, and the files' own -3000 had then counted as an observation.
        for value in ("-40000", "0.5", "nan"):
            out = os.path.join(self.tmp, "out" + value)
            done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--nodata", value, "--out", out])
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn("stores Int16 values (-32768 to 32767, whole numbers): no value can equal it", done.stderr)
            self.assertFalse(os.path.exists(out))
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--nodata", "-3000",
                               "--out", os.path.join(self.tmp, "fine")])
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_values_beyond_float32_after_the_scale_are_refused(self):
        # int16 counts of 5000 x 1e37 = 5e40, no float32: every value had become inf, flagged
        # observed. A scale below float32's smallest normal number had made every value 0.
        folder = os.path.join(self.tmp, "counts")
        os.makedirs(folder)
        for doy in (1, 17, 33):
            kt.write_raster(os.path.join(folder, "ndvi_A2004%03d.tif" % doy), np.full((3, 3), 5000, np.int16),
                            geotransform=GEOTRANSFORM, epsg=EPSG, nodata=NODATA)
        out = os.path.join(self.tmp, "out-scaled")
        done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--scale", "1e37", "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("ndvi_A2004001.tif: every value is beyond the 32-bit values the outputs hold after scale and "
                      "offset", done.stderr)
        self.assertFalse(os.path.exists(out))
        done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--scale", "1e-46", "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--scale 1e-46: is below the 32-bit floating-point values", done.stderr)
        self.assertFalse(os.path.exists(out))

    def test_a_nodata_offset_or_scale_beyond_float32_is_refused(self):
        # 1e40 is no float32 (3.4e38 at most): on a float32 stack it marks nothing either.
        folder = os.path.join(self.tmp, "float32")
        os.makedirs(folder)
        for doy in (1, 17, 33):
            kt.write_raster(os.path.join(folder, "ndvi_A2004%03d.tif" % doy), np.full((3, 3), 0.5, np.float32),
                            geotransform=GEOTRANSFORM, epsg=EPSG)
        out = os.path.join(self.tmp, "out")
        done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--nodata", "-1e40", "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("stores Float32 values (at most 3.40282e+38 in size): no value can equal it", done.stderr)
        self.assertFalse(os.path.exists(out))
        # An offset or scale of that size makes every value inf (flag 0, "observed").
        for option in ("--offset", "--scale"):
            done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), option, "1e40", "--out", out])
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn("%s 1e+40: is beyond the 32-bit floating-point values" % option, done.stderr)
            self.assertFalse(os.path.exists(out))
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--nodata", "-3e38",
                               "--out", os.path.join(self.tmp, "fine")])
        self.assertEqual(done.returncode, 0, done.stderr)


class UnderAMemoryLimit(kt.TempDirTestCase):
    def test_every_published_output_reads_back_with_its_crs(self):
        # Under an address-space limit GDAL could not write a GeoTIFF's CRS keys at the close and
        # put the CRS in a side file named after the temporary, which the rename left behind: the
        # outputs were published without a CRS, exit 0, and a job's next step refused them for
        # good. Over a range of limits, each run either succeeds with every output readable with
        # its CRS (read by GDAL without side files) or fails with one line and publishes nothing.
        import resource
        import subprocess
        g = kt.gdal()
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 60, 60)
        inputs = os.path.join(stack, "ndvi_*.tif")
        names = sorted(os.path.basename(p) for p in glob.glob(inputs))
        outcomes = {"ok": 0, "refused": 0}
        g.SetConfigOption("GDAL_PAM_ENABLED", "NO")
        try:
            for mib in range(150, 601, 10):
                out = os.path.join(self.tmp, "out-%d" % mib)

                def limit(mib=mib):
                    resource.setrlimit(resource.RLIMIT_AS, (mib << 20, mib << 20))

                done = subprocess.run([kt.KALENDS_BIN, "fill", inputs, "--out", out, "--lambda", "100"],
                                      capture_output=True, text=True, timeout=120, preexec_fn=limit)
                published = sorted(os.path.basename(p) for p in glob.glob(os.path.join(out, "*.tif")))
                if done.returncode == 0:
                    outcomes["ok"] += 1
                    self.assertEqual(published, names, mib)
                    for name in published:
                        ds = g.Open(os.path.join(out, name))
                        self.assertIsNotNone(ds.GetSpatialRef(), "%s at %d MiB has no CRS" % (name, mib))
                        ds = None
                    self.assertEqual(glob.glob(os.path.join(out, ".*")), [], mib)
                else:
                    outcomes["refused"] += 1
                    self.assertEqual(published, [], (mib, done.stderr))
        finally:
            g.SetConfigOption("GDAL_PAM_ENABLED", None)
        print("\n  limits 150-600 MiB: %(ok)d runs succeeded, %(refused)d refused" % outcomes)
        self.assertGreater(outcomes["ok"], 0)

    def test_a_zstd_fill_keeps_within_its_budget(self):
        # GDAL's default ZSTD level held a compressor of about 12 MiB per output file, and a fill
        # writes every date's file at once: 46 dates had peaked at several times --memory. The
        # limit is the documented peak <= --memory + 15 % (docs/performance.md). Invented data.
        import subprocess
        stack = os.path.join(self.tmp, "zstd-ndvi")
        kt.make_synthetic_stack(stack, 60, 60, years=2)
        dates = len(glob.glob(os.path.join(stack, "ndvi_*.tif")))
        self.assertGreaterEqual(dates, 40)
        # The child's peak resident size, measured by a Python of its own (RUSAGE_CHILDREN
        # holds the largest of all the children a process waited for).
        measure = ("import resource, subprocess, sys; done = subprocess.run(sys.argv[1:]); "
                   "print(done.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
        for compression in ("deflate", "zstd"):
            out = os.path.join(self.tmp, "zstd-out-" + compression)
            done = subprocess.run([sys.executable, "-c", measure, kt.KALENDS_BIN, "-q", "fill",
                                   os.path.join(stack, "ndvi_*.tif"), "--out", out, "--lambda", "100",
                                   "--memory", "150M", "--threads", "1", "--compress", compression],
                                  capture_output=True, text=True, timeout=300)
            code, peak_kib = (int(v) for v in done.stdout.split())
            self.assertEqual(code, 0, done.stderr)
            self.assertLessEqual(peak_kib / 1024, 150 * 1.15, compression)

    def test_good_inputs_are_not_called_damaged_when_memory_runs_short(self):
        # libtiff reports a failed allocation as "GeoTIFF tags apparently corrupt": intact fill
        # outputs had been called damaged input (exit 2, "an incomplete download or copy?"),
        # which --skip-bad would have left out for good. Short of memory, the run now fails
        # with exit 1 and says so.
        import resource
        import subprocess
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 60, 60)
        filled = os.path.join(self.tmp, "filled")
        kt.run_fill_ok(self, [os.path.join(stack, "ndvi_*.tif"), "--out", filled])
        said = set()
        for mib in range(150, 401, 10):
            def limit(mib=mib):
                resource.setrlimit(resource.RLIMIT_AS, (mib << 20, mib << 20))

            done = subprocess.run([kt.KALENDS_BIN, "seasons", filled, "--out", os.path.join(self.tmp, "s-%d" % mib)],
                                  capture_output=True, text=True, timeout=120, preexec_fn=limit)
            self.assertNotEqual(done.returncode, 2, (mib, done.stderr))
            if "out of memory" in done.stderr:
                said.add(mib)
        print("\n  seasons said 'out of memory' at %s MiB" % sorted(said))
        # grid: PROJ short of memory had made --crs 'EPSG:4326' "not a CRS PROJ knows" (exit 2),
        # and GDAL's abort after a failed CPLRealloc left no word at all.
        for mib in range(150, 401, 10):
            def limit(mib=mib):
                resource.setrlimit(resource.RLIMIT_AS, (mib << 20, mib << 20))

            done = subprocess.run([kt.KALENDS_BIN, "grid", filled, "--out", os.path.join(self.tmp, "g-%d" % mib),
                                   "--crs", "EPSG:4326", "--resolution", "0.01"],
                                  capture_output=True, text=True, timeout=120, preexec_fn=limit)
            self.assertNotEqual(done.returncode, 2, (mib, done.stderr))
            if done.returncode == -6:  # SIGABRT: GDAL's own, after a fatal error
                self.assertIn("kalends: GDAL stopped the program:", done.stderr, mib)

class SmallGrids(kt.TempDirTestCase):
    def test_a_grid_within_one_tile_gets_tiles_of_its_size(self):
        # A 20 x 18 px grid had been written in 256 x 256 px tiles, each open output holding one
        # (a daily record of a few pixels: 1.14 GB for 65 000 values). TIFF tiles are multiples
        # of 16 px (TIFF 6.0, section 15): 32 x 32 here. Values pass through as before.
        folder = os.path.join(self.tmp, "small")
        os.makedirs(folder)
        rng = np.random.default_rng(11)
        for k in range(6):
            values = (0.3 + 0.1 * rng.random((18, 20))).astype(np.float32)
            values[rng.random((18, 20)) < 0.2] = np.nan
            kt.write_raster(os.path.join(folder, "ndvi_2021-%02d-01.tif" % (k + 1)), values,
                            geotransform=GEOTRANSFORM, epsg=EPSG, nodata=float("nan"))
        out = os.path.join(self.tmp, "small-out")
        done = kt.run_kalends(["-q", "fill", os.path.join(folder, "*.tif"), "--out", out, "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        g = kt.gdal()
        for k in range(6):
            name = "ndvi_2021-%02d-01.tif" % (k + 1)
            ds = g.Open(os.path.join(out, name))
            self.assertEqual(ds.GetRasterBand(1).GetBlockSize(), [32, 32])
            value, flag = ds.GetRasterBand(1).ReadAsArray(), ds.GetRasterBand(3).ReadAsArray()
            ds = None
            source = g.Open(os.path.join(folder, name))
            raw = source.ReadAsArray()
            source = None
            observed = np.isfinite(raw)
            np.testing.assert_array_equal(flag[observed], 0)
            np.testing.assert_array_equal(value[observed], raw[observed])


class UnderADescriptorLimit(kt.TempDirTestCase):
    def test_a_fill_stopped_by_the_limit_leaves_no_temporaries(self):
        # The limit reached while the outputs were being created: the temporaries made before
        # the one that failed had stayed, hidden, in the output folder (26 of them at 32).
        import resource
        import subprocess
        folder = os.path.join(self.tmp, "stack")
        os.makedirs(folder)
        for k in range(40):
            kt.write_raster(os.path.join(folder, "ndvi_2021-%02d-%02d.tif" % (1 + k // 4, 1 + 7 * (k % 4))),
                            np.full((8, 9), 0.3 + 0.01 * k, np.float32), geotransform=GEOTRANSFORM, epsg=EPSG)
        out = os.path.join(self.tmp, "out")
        os.makedirs(out)
        with open(os.path.join(out, "keep.txt"), "w") as f:
            f.write("a file of the user's\n")

        def limit():
            resource.setrlimit(resource.RLIMIT_NOFILE, (32, 32))
        done = subprocess.run([kt.KALENDS_BIN, "fill", os.path.join(folder, "*.tif"), "--out", out, "--lambda", "10"],
                              capture_output=True, text=True, timeout=120, preexec_fn=limit)
        self.assertEqual(done.returncode, 1, done.stderr)
        self.assertIn("too many files open at once", done.stderr)
        self.assertEqual(sorted(os.listdir(out)), ["keep.txt"])


if __name__ == "__main__":
    unittest.main(verbosity=2)
