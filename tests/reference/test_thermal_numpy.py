#!/usr/bin/python3
"""Thermal kernels checked against numpy re-implementations (tests/pylib/thermal_numpy.py,
written from the published equations) and against published or hand-computed values.

References:
- relative R0(T), Mordecai et al. (2013), Ecol. Lett. 16:22-30, doi:10.1111/ele.12015, trait
  fits as listed in docs/methods.md. Values 0.1859 (20 C), 0.9866 (25 C), 0.7894 (28 C),
  0.4495 (30 C), maximum at 25.6 +- 0.1 C, zero at and below 15.7 C and at and above 33.8 C:
  computed with numpy from the published fits (issue #5; two independent public
  implementations agree). The paper itself reports an optimum of 25 C and limits of about
  16 and 34 C.
- degree-day: n = 111/(T - 16) (P. falciparum) and 105/(T - 14.5) (P. vivax) (Detinova 1962;
  Macdonald 1957): 12.33 and 10.0 days at 25 C. Martens (1997) p = exp(-1/(-4.4 + 1.31 T -
  0.03 T^2)): 0.9030, 0.9011, 0.8811 at 20, 25, 30 C.
- Parton & Logan (1981) diurnal curve with the choices of docs/methods.md; Cooper (1969)
  declination.
"""
import json
import os
import subprocess
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402
import thermal_numpy as tn  # noqa: E402

THERMAL_PROBE = os.environ.get("KALENDS_THERMAL_PROBE",
                               os.path.join(kt.REPO_ROOT, "build", "tests", "kalends_thermal_probe"))


def probe(text):
    kt.require_binary(THERMAL_PROBE)
    done = subprocess.run([THERMAL_PROBE], input=text, capture_output=True, text=True, timeout=60)
    if done.returncode != 0:
        raise AssertionError("thermal probe failed: " + done.stderr)
    return {k: (np.array(v, dtype=np.float64) if isinstance(v, list) else v)
            for k, v in json.loads(done.stdout).items()}


def numbers(values):
    return " ".join(repr(float(v)) for v in values)


# A grid of temperatures with the edges of every trait range and the R0 limits on it.
GRID = np.unique(np.concatenate([np.arange(-5.0, 45.0, 0.05),
                                 [11.7, 14.7, 15.0, 15.3, 15.76, 15.7622, 33.71, 33.7136, 34.0,
                                  34.4, 42.3, 16.0, 14.5, 18.0, 34.0]]))


def model(kind, parasite, temps):
    return probe("model %s %s %d %s\n" % (kind, parasite, len(temps), numbers(temps)))


class ModelsAgainstNumpy(unittest.TestCase):
    def test_r0_2013_matches_numpy_on_a_grid(self):
        got = model("r0-2013", "falciparum", GRID)
        self.assertLess(np.max(np.abs(got["relative"] - tn.relative("r0-2013", GRID))), 1e-9)
        self.assertLess(np.max(np.abs(got["r0"] - tn.r0_unscaled(GRID))), 1e-9 * tn.r0_unscaled(GRID).max())

    def test_r0_2013_published_values(self):
        # Computed with numpy from the published fits (issue #5), given to 4 decimals. Within
        # 1e-4, not half a unit: at 25 C kalends and our own numpy both give 0.98654, which the
        # issue lists as 0.9866 (its maximum was presumably found on a coarser grid).
        got = model("r0-2013", "falciparum", [20.0, 25.0, 28.0, 30.0])["relative"]
        np.testing.assert_allclose(got, [0.1859, 0.9866, 0.7894, 0.4495], atol=1e-4)
        self.assertAlmostEqual(model("r0-2013", "falciparum", [25.0])["optimum"], 25.6, delta=0.1)
        cold = np.arange(0.0, 15.7001, 0.01)
        hot = np.arange(33.8, 45.0, 0.01)
        self.assertTrue(np.all(model("r0-2013", "falciparum", cold)["relative"] == 0))
        self.assertTrue(np.all(model("r0-2013", "falciparum", hot)["relative"] == 0))
        # Between 14.7 and 15.3 C two quadratics are negative; R0 stays 0 (not a positive
        # product of two negatives).
        self.assertTrue(np.all(model("r0-2013", "falciparum", np.arange(14.7, 15.31, 0.01))["relative"] == 0))

    def test_degree_day_matches_numpy_and_published_values(self):
        for parasite in ("falciparum", "vivax"):
            got = model("degree-day", parasite, GRID)
            self.assertLess(np.max(np.abs(got["relative"] - tn.relative("degree-day", GRID, parasite))), 1e-9,
                            parasite)
            self.assertLess(np.max(np.abs(got["survival"] - tn.martens_survival(GRID))), 1e-12)
            self.assertAlmostEqual(got["optimum"], tn.optimum("degree-day", parasite), delta=1e-6)
        # Detinova (1962): 111/9 and 105/10.5 days at 25 C.
        self.assertAlmostEqual(model("degree-day", "falciparum", [25.0])["incubation"][0], 12.3333, places=4)
        self.assertAlmostEqual(model("degree-day", "vivax", [25.0])["incubation"][0], 10.0, places=9)
        # Martens (1997) as computed in issue #5.
        np.testing.assert_allclose(model("degree-day", "falciparum", [20.0, 25.0, 30.0])["survival"],
                                   [0.9030, 0.9011, 0.8811], atol=5e-5)

    def test_window_matches_numpy(self):
        got = model("window", "falciparum", GRID)["relative"]
        np.testing.assert_array_equal(got, tn.relative("window", GRID))


class DiurnalAgainstNumpy(unittest.TestCase):
    def test_sun_times(self):
        rng = np.random.default_rng(5)
        for lat, doy in zip(rng.uniform(-70, 70, 30), rng.integers(1, 366, 30)):
            got = probe("sun %r %d\n" % (float(lat), int(doy)))
            rise, sset, length = tn.sun(lat, doy)
            self.assertAlmostEqual(got["day_length"], float(length), places=10)
            self.assertAlmostEqual(got["sunrise"], float(rise), places=10)

    def test_curve_matches_numpy(self):
        rng = np.random.default_rng(7)
        hours = np.linspace(0, 24, 97)
        for case in range(25):
            lat, doy = float(rng.uniform(-60, 60)), int(rng.integers(2, 365))
            a, b, c = (tn.PARTON_LOGAN if case < 10 else
                       (float(rng.uniform(0.5, 3)), float(rng.uniform(0.5, 5)), float(rng.uniform(-1, 1))))
            lows = rng.uniform(-5, 25, 3)
            ext = [(lo, lo + rng.uniform(0, 20)) for lo in lows]
            text = "diurnal %r %r %r %r %d %s %d %s\n" % (
                a, b, c, lat, doy, numbers([v for e in ext for v in e]), len(hours), numbers(hours))
            got = probe(text)["temperature"]
            s = [tn.sun(lat, d) for d in (doy - 1, doy, doy + 1)]
            expected = tn.parton_logan(hours, ext[1][0], ext[1][1], s[1][0], s[1][2], ext[0][0], ext[0][1],
                                       s[0][0], s[0][2], ext[2][0], s[2][0], params=(a, b, c))
            self.assertLess(np.max(np.abs(got - expected)), 1e-9, "case %d" % case)

    def test_two_samples_match_numpy(self):
        rng = np.random.default_rng(11)
        for _ in range(20):
            lat, doy = float(rng.uniform(-40, 40)), int(rng.integers(1, 366))
            day, night = float(rng.uniform(15, 55)), float(rng.uniform(-5, 30))
            got = probe("samples 1.86 2.2 -0.17 %r %d %r 13.5 %r 1.5\n" % (lat, doy, day, night))
            rise, _, length = tn.sun(lat, doy)
            tmin, tmax = tn.extremes_from_samples(day, 13.5, night, 1.5, rise, length)
            self.assertAlmostEqual(got["tmin"], float(tmin), places=9)
            self.assertAlmostEqual(got["tmax"], float(tmax), places=9)


class RunsAgainstNumpy(unittest.TestCase):
    def test_counts_and_longest_runs(self):
        rng = np.random.default_rng(3)
        for _ in range(40):
            v = np.where(rng.random(12) < 0.5, 0.0, rng.random(12))
            for cyclic in (0, 1):
                got = probe("runs 0.2 %d 12 %s\n" % (cyclic, numbers(v)))
                suitable = v > 0.2
                # Brute force: the longest run over the series (twice over when cyclic).
                series = np.concatenate([suitable, suitable]) if cyclic else suitable
                longest, run = 0, 0
                for s in series:
                    run = run + 1 if s else 0
                    longest = max(longest, run)
                self.assertEqual(got["count"], suitable.sum())
                self.assertEqual(got["longest"], min(longest, 12))
                self.assertAlmostEqual(got["mean"], v.mean(), places=12)


if __name__ == "__main__":
    unittest.main()
