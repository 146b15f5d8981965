"""The spacetime method's results do not depend on how the raster is cut into blocks. Since
version 0.3.9 its blocks are single 256 px tiles (with a halo) whatever the --memory budget, so a
small and a large budget give identical files; what the halo has to hide is the seam between
tiles. A fill whose tiles start elsewhere (--subset at an offset of half a tile, so that the whole
fill's seams fall inside its blocks) gives values within 0.004 of the whole fill (the issue's
tolerance). Invented data: mechanics only.
"""

import glob
import json
import os
import re
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def read_values(out_dir):
    outs = [kt.read_output(p) for p in sorted(glob.glob(os.path.join(out_dir, "*.tif")))]
    return np.stack([o["value"] for o in outs]), np.stack([o["flag"] for o in outs])


class BudgetIndependence(kt.TempDirTestCase):
    """The same stack with a small and a large --memory: the same tiles, fewer or more of them at
    once, identical files."""

    def test_small_and_large_budgets_agree_exactly(self):
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 400, 200)
        at_once = {}
        for memory in ("400M", "4G"):
            out = os.path.join(self.tmp, "out-" + memory)
            done = kt.run_kalends(["fill", os.path.join(stack, "ndvi_*.tif"), "--out", out, "--method",
                                   "spacetime", "--memory", memory, "--halo", "24", "--threads", "2",
                                   "--verbose"])
            self.assertEqual(done.returncode, 0, done.stderr)
            at_once[memory] = re.search(r"blocks: .* (\d+) at a time", done.stderr).group(1)
        self.assertEqual(at_once, {"400M": "1", "4G": "2"})
        small, large = os.path.join(self.tmp, "out-400M"), os.path.join(self.tmp, "out-4G")
        self.assertEqual(kt.read_summary(small)["blocks"], 2)
        for name in kt.final_outputs(small):
            a, b = kt.read_output(os.path.join(small, name)), kt.read_output(os.path.join(large, name))
            for band in ("value", "sd", "flag"):
                np.testing.assert_array_equal(a[band], b[band], err_msg=name + " " + band)


class NoSeams(kt.TempDirTestCase):
    """A 512 x 512 stack fills in four tiles, with seams along row and column 256. A --subset
    from column and row 128 fills in one block whose interior holds those seams: the two agree
    within 0.004, near the seams too. Before version 0.3.4, 4 blocks and 1 of the benchmark's
    512 x 512 x 46 stack differed by up to 0.023: the variance components were estimated per
    block and the solver stopped at a relative residual of 1e-4 with the smoothest components
    unsettled (version 0.3.5 solves those on coarse grids first: 0.0003 on this test's stack)."""

    def test_tiles_and_a_block_across_their_seams_agree(self):
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 512, 512)
        whole, across = os.path.join(self.tmp, "whole"), os.path.join(self.tmp, "across")
        common = [os.path.join(stack, "ndvi_*.tif"), "--method", "spacetime", "--threads", "2"]
        kt.run_fill_ok(self, common + ["--out", whole], timeout=600)
        kt.run_fill_ok(self, common + ["--out", across, "--subset", "128,128,256,256"], timeout=600)
        self.assertEqual(kt.read_summary(whole)["blocks"], 4)
        self.assertEqual(kt.read_summary(across)["blocks"], 1)
        values_whole, flags_whole = read_values(whole)
        values_across, flags_across = read_values(across)
        window = np.s_[:, 128:384, 128:384]
        np.testing.assert_array_equal(flags_whole[window], flags_across)
        np.testing.assert_array_equal(np.isnan(values_whole[window]), np.isnan(values_across))
        diff = np.abs(values_whole[window] - values_across)
        seams = np.zeros(diff.shape[1:], bool)
        seams[120:136, :] = seams[:, 120:136] = True   # within 8 px of row or column 256
        print("\nlargest difference: %.5f, within 8 px of the seams: %.5f"
              % (np.nanmax(diff), np.nanmax(diff[:, seams])))
        self.assertLessEqual(np.nanmax(diff), 0.004)


class FewerBlocksThanThreads(kt.TempDirTestCase):
    """A --memory budget that holds one spacetime block but not one per thread: the blocks then
    run one at a time (the other threads work inside them) instead of the run being refused,
    and the files equal those of one thread with the same budget."""

    def test_one_block_at_a_time(self):
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 600, 200)  # three tiles across
        common = [os.path.join(stack, "ndvi_*.tif"), "--method", "spacetime", "--verbose"]
        one = os.path.join(self.tmp, "one")
        # The smallest budget (16 MiB steps) that runs on one thread; refusals are quick.
        budget = None
        named = set()
        for mib in range(128, 2049, 16):
            done = kt.run_kalends(["fill"] + common + ["--out", one, "--threads", "1",
                                                       "--memory", "%dM" % mib])
            if done.returncode == 0:
                budget = mib
                break
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn("--memory", done.stderr)
            found = re.search(r"(\d+) MiB would do", done.stderr)
            if found:
                named.add(int(found.group(1)))
        self.assertIsNotNone(budget, "no budget up to 2 GiB ran on one thread")
        # A refusal for want of room for one block names the smallest budget that holds one:
        # the same in every refusal, above the last refused step, and enough.
        self.assertEqual(len(named), 1, "refusals named %s" % sorted(named))
        least = named.pop()
        self.assertTrue(budget - 16 < least <= budget, "named %d MiB, found %d" % (least, budget))
        done = kt.run_kalends(["fill"] + common + ["--out", os.path.join(self.tmp, "least"),
                                                   "--threads", "1", "--memory", "%dM" % least])
        self.assertEqual(done.returncode, 0, done.stderr)
        two = os.path.join(self.tmp, "two")
        done = kt.run_kalends(["fill"] + common + ["--out", two, "--threads", "2",
                                                   "--memory", "%dM" % budget])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("1 at a time", done.stderr)
        self.assertGreater(kt.read_summary(two)["blocks"], 1)
        print("\nbudget %d MiB: %s" % (budget, [l for l in done.stderr.splitlines()
                                                if l.startswith("blocks:")]))
        for name in kt.final_outputs(one):
            a, b = kt.read_output(os.path.join(one, name)), kt.read_output(os.path.join(two, name))
            for band in ("value", "sd", "flag"):
                np.testing.assert_array_equal(a[band], b[band], err_msg=name + " " + band)


class SubsetIsAWindowOfTheWhole(kt.TempDirTestCase):
    """`kalends fill --subset C,R,W,H` writes the window of what the whole fill writes: spacetime
    reads its halo beyond the subset, so its values agree within the issue's 0.004 (a block's
    core is such a window too), and whittaker, one pixel at a time, agrees exactly. The outputs
    are georeferenced as the window (GDAL's srcwin geotransform)."""

    def test_subset_equals_the_window(self):
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 300, 120)
        pattern = os.path.join(stack, "ndvi_*.tif")
        column, row, width, height = 170, 40, 90, 50
        for method in ("spacetime", "whittaker"):
            whole, part = os.path.join(self.tmp, method + "-whole"), os.path.join(self.tmp, method + "-part")
            kt.run_fill_ok(self, [pattern, "--out", whole, "--method", method])
            kt.run_fill_ok(self, [pattern, "--out", part, "--method", method, "--subset",
                                  "%d,%d,%d,%d" % (column, row, width, height)])
            names = kt.final_outputs(part)
            self.assertEqual(names, kt.final_outputs(whole))
            largest = 0.0
            for name in names:
                a, b = kt.read_output(os.path.join(whole, name)), kt.read_output(os.path.join(part, name))
                window = np.s_[row:row + height, column:column + width]
                np.testing.assert_array_equal(a["flag"][window], b["flag"])
                np.testing.assert_array_equal(np.isnan(a["value"][window]), np.isnan(b["value"]))
                largest = max(largest, float(np.nanmax(np.abs(a["value"][window] - b["value"]))))
            print("\n%s: largest difference between the subset and the whole fill's window: %.5f"
                  % (method, largest))
            self.assertLessEqual(largest, 0.004 if method == "spacetime" else 0.0)
            g = kt.gdal()
            gt_whole = g.Open(os.path.join(whole, names[0])).GetGeoTransform()
            gt_part = g.Open(os.path.join(part, names[0])).GetGeoTransform()
            np.testing.assert_allclose(gt_part, [gt_whole[0] + column * gt_whole[1], gt_whole[1], 0,
                                                 gt_whole[3] + row * gt_whole[5], 0, gt_whole[5]])


    def test_a_shards_short_last_strip_equals_the_whole_run_exactly(self):
        # A cluster shard takes full-width strips of 256 rows; the last may be shorter (24 rows of
        # a 280-row grid). Its blocks had been judged as if a tile high, and the strip cut into
        # tile-wide columns where the whole run takes one full-width strip: the sd differed by
        # up to 0.02 (a helper's 300 x 300 job, plan --shards 2). The same block, the same values.
        stack = os.path.join(self.tmp, "strip")
        kt.make_synthetic_stack(stack, 300, 280, "--dates", "12")
        pattern = os.path.join(stack, "ndvi_*.tif")
        whole, part = os.path.join(self.tmp, "strip-whole"), os.path.join(self.tmp, "strip-part")
        kt.run_fill_ok(self, [pattern, "--out", whole, "--method", "spacetime", "--fft-wisdom", "none"])
        kt.run_fill_ok(self, [pattern, "--out", part, "--method", "spacetime", "--fft-wisdom", "none",
                              "--subset", "0,256,300,24"])
        for name in kt.final_outputs(part):
            a, b = kt.read_output(os.path.join(whole, name)), kt.read_output(os.path.join(part, name))
            for band in ("value", "sd", "flag"):
                np.testing.assert_array_equal(a[band][256:280], b[band], err_msg=name + " " + band)

    def test_a_subsets_budget_is_that_of_its_own_window(self):
        # A subset's blocks are no larger than the subset and its halo; the budget named for it
        # had been that of a whole tile of the raster (414 MiB against the 199 that run, for
        # 80 x 100 px of a 600 x 200 stack). It is now that of the same window cut out as a
        # stack of its own (gdal_translate -srcwin), and enough.
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 600, 200)
        column, row, width, height, halo = 300, 50, 80, 100, 32
        cut = os.path.join(self.tmp, "cut")
        os.makedirs(cut)
        g = kt.gdal()
        for path in sorted(glob.glob(os.path.join(stack, "ndvi_*.tif"))):
            g.Translate(os.path.join(cut, os.path.basename(path)), path,
                        srcWin=[column - halo, row - halo, width + 2 * halo, height + 2 * halo])

        def named(pattern, *extra):
            done = kt.run_kalends(["fill", pattern, "--method", "spacetime", "--threads", "1", "--memory", "16M",
                                   "--out", os.path.join(self.tmp, "refused")] + list(extra))
            self.assertEqual(done.returncode, 2, done.stderr)
            return int(re.search(r"(\d+) MiB would do", done.stderr).group(1))

        subset = ["--subset", "%d,%d,%d,%d" % (column, row, width, height)]
        need = named(os.path.join(stack, "ndvi_*.tif"), *subset)
        self.assertEqual(need, named(os.path.join(cut, "ndvi_*.tif")))
        self.assertLess(need, named(os.path.join(stack, "ndvi_*.tif")))
        kt.run_fill_ok(self, [os.path.join(stack, "ndvi_*.tif"), "--method", "spacetime", "--threads", "1",
                              "--memory", "%dM" % need, "--out", os.path.join(self.tmp, "part")] + subset)

class DefaultBudgetGrowsToOneBlock(kt.TempDirTestCase):
    """Without --memory, a stack whose one block needs more than the default 1 GiB (here 80
    dates of 320 x 320 px) is filled with what one block needs, up to half the machine's memory,
    with a note; the values are those of a run given that budget. An explicit --memory 1G is
    refused and names the same figure."""

    def test_default_budget_grows(self):
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 320, 320, "--dates", "80")
        common = ["fill", os.path.join(stack, "ndvi_*.tif"), "--method", "spacetime", "--threads", "2"]
        refused = kt.run_kalends(common + ["--out", os.path.join(self.tmp, "refused"), "--memory", "1G"])
        self.assertEqual(refused.returncode, 2, refused.stderr)
        need = int(re.search(r"(\d+) MiB would do", refused.stderr).group(1))
        self.assertGreater(need, 1024)
        with open("/proc/meminfo") as f:
            physical_mib = int(f.readline().split()[1]) // 1024
        if need > physical_mib // 2:
            self.skipTest("this machine has %d MiB; the test needs %d MiB" % (physical_mib, 2 * need))
        grown = os.path.join(self.tmp, "grown")
        done = kt.run_kalends(common + ["--out", grown])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: one block of this stack needs %d MiB" % need, done.stderr)
        given = os.path.join(self.tmp, "given")
        done = kt.run_kalends(common + ["--out", given, "--memory", "%dM" % need])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("note:", done.stderr)
        for name in kt.final_outputs(given):
            a, b = kt.read_output(os.path.join(grown, name)), kt.read_output(os.path.join(given, name))
            for band in ("value", "sd", "flag"):
                np.testing.assert_array_equal(a[band], b[band], err_msg=name + " " + band)


class SmoothingChoiceRecorded(kt.TempDirTestCase):
    """--space-smoothing/--time-smoothing auto: fill-summary.json lists the values GCV chose per
    block, and giving them back as fixed values reproduces the fill exactly."""

    def test_chosen_values_reproduce_the_fill(self):
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 60, 40)
        common = [os.path.join(stack, "ndvi_*.tif"), "--method", "spacetime", "--threads", "2",
                  "--fft-wisdom", "none"]
        auto = os.path.join(self.tmp, "auto")
        kt.run_fill_ok(self, common + ["--out", auto, "--space-smoothing", "auto",
                                       "--time-smoothing", "auto"])
        summary = kt.read_summary(auto)
        self.assertEqual(len(summary["chosen"]), summary["blocks"])
        choice = summary["chosen"][0]
        self.assertEqual(choice["window"], [0, 0, 60, 40])
        # The search walks quarter decades from the defaults 3 and 0.3, within 1e-3..1e4
        # (src/fill/pls_gcv.hpp).
        for key, start in (("space_smoothing", 3.0), ("time_smoothing", 0.3)):
            value = choice[key]
            self.assertTrue(1e-3 <= value <= 1e4, "%s %g" % (key, value))
            if value not in (1e-3, 1e4):
                steps = np.log10(value / start) / 0.25
                self.assertAlmostEqual(steps, round(steps), places=9, msg=key)
        fixed = os.path.join(self.tmp, "fixed")
        kt.run_fill_ok(self, common + ["--out", fixed,
                                       "--space-smoothing", repr(choice["space_smoothing"]),
                                       "--time-smoothing", repr(choice["time_smoothing"])])
        self.assertNotIn("chosen", kt.read_summary(fixed))
        for a, b in zip(sorted(glob.glob(os.path.join(auto, "*.tif"))),
                        sorted(glob.glob(os.path.join(fixed, "*.tif")))):
            oa, ob = kt.read_output(a), kt.read_output(b)
            for band in ("value", "sd", "flag"):
                np.testing.assert_array_equal(oa[band], ob[band], err_msg=a + " " + band)


if __name__ == "__main__":
    unittest.main(verbosity=2)
