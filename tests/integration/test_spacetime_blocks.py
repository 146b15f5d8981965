"""The spacetime method's results do not depend on the block size: the same invented stack
filled with a small and a large --memory (several blocks with halos, or one block) gives values
within 0.004 (the issue's tolerance). Invented data: mechanics only.
"""

import glob
import json
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def read_values(out_dir):
    outs = [kt.read_output(p) for p in sorted(glob.glob(os.path.join(out_dir, "*.tif")))]
    return np.stack([o["value"] for o in outs]), np.stack([o["flag"] for o in outs])


class BlockSizeIndependence(kt.TempDirTestCase):
    """The same stack with a small and a large --memory gives the same values within 0.004."""

    def test_small_and_large_blocks_agree(self):
        stack = os.path.join(self.tmp, "ndvi")
        done = kt.subprocess.run(
            ["/usr/bin/python3", os.path.join(kt.REPO_ROOT, "tools", "synth_stack.py"), "--out",
             stack, "--width", "400", "--height", "200", "--years", "1", "--quiet"],
            capture_output=True, text=True, timeout=120)
        self.assertEqual(done.returncode, 0, done.stderr)
        results = {}
        for memory in ("600M", "4G"):
            out = os.path.join(self.tmp, "out-" + memory)
            kt.run_fill_ok(self, [os.path.join(stack, "ndvi_*.tif"), "--out", out, "--method",
                                  "spacetime", "--halo", "24", "--memory", memory,
                                  "--threads", "1"])  # the budget is per run, not per thread
            results[memory] = (kt.read_summary(out)["blocks"],) + read_values(out)
        self.assertGreater(results["600M"][0], results["4G"][0], "both runs used the same blocks")
        small, large = results["600M"][1], results["4G"][1]
        np.testing.assert_array_equal(np.isnan(small), np.isnan(large))
        np.testing.assert_array_equal(results["600M"][2], results["4G"][2])
        diff = np.nanmax(np.abs(small - large))
        print("\nlargest difference between %d and %d blocks: %.5f" % (
            results["600M"][0], results["4G"][0], diff))
        self.assertLessEqual(diff, 0.004)


if __name__ == "__main__":
    unittest.main(verbosity=2)
