#!/usr/bin/python3
"""kalends as a library for programs of one's own (docs/library.md): `cmake --install` puts the
static library, the public headers and a CMake package under a prefix; the example program
(examples/library) is configured with find_package(kalends), built, and run. Its fill equals
`kalends fill` with the same settings, file for file (read with GDAL), and its errors are the
library's exceptions, with the file and the reason. Invented data.

Run: /usr/bin/python3 -m unittest -v tests/integration/test_library.py
"""
import glob
import os
import subprocess
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


class InstalledLibrary(kt.TempDirTestCase):
    def test_the_example_program_builds_on_the_installed_package_and_fills_as_the_cli(self):
        build = os.path.dirname(os.path.abspath(kt.KALENDS_BIN))
        if not os.path.exists(os.path.join(build, "cmake_install.cmake")):
            self.skipTest("KALENDS_BIN is not in a CMake build tree")
        prefix = os.path.join(self.tmp, "prefix")
        done = subprocess.run(["cmake", "--install", build, "--prefix", prefix], capture_output=True, text=True)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        for installed in ("lib/libkalends_core.a", "include/kalends/fill.hpp", "lib/cmake/kalends/kalendsConfig.cmake"):
            self.assertTrue(os.path.exists(os.path.join(prefix, installed)), installed)
        example = os.path.join(self.tmp, "example-build")
        done = subprocess.run(["cmake", "-S", os.path.join(kt.REPO_ROOT, "examples", "library"), "-B", example,
                               "-DCMAKE_PREFIX_PATH=" + prefix, "-DCMAKE_BUILD_TYPE=Release"],
                              capture_output=True, text=True)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        done = subprocess.run(["cmake", "--build", example], capture_output=True, text=True, timeout=600)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        program = os.path.join(example, "fill_stack")

        stack = os.path.join(self.tmp, "stack")
        kt.make_synthetic_stack(stack, 24, 18)
        pattern = os.path.join(stack, "ndvi_*.tif")
        mine, cli = os.path.join(self.tmp, "mine"), os.path.join(self.tmp, "cli")
        done = subprocess.run([program, pattern, mine], capture_output=True, text=True, timeout=300)
        self.assertEqual(done.returncode, 0, done.stderr)
        version = kt.run_kalends(["--version"]).stdout.split()[-1]
        self.assertTrue(done.stdout.startswith("kalends %s: " % version), done.stdout)
        kt.run_fill_ok(self, [pattern, "--out", cli, "--lambda", "10"])
        names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(cli, "*.tif")))
        self.assertGreater(len(names), 10)
        self.assertEqual(names, sorted(os.path.basename(p) for p in glob.glob(os.path.join(mine, "*.tif"))))
        for name in names:
            a = kt.gdal().Open(os.path.join(mine, name)).ReadAsArray()
            b = kt.gdal().Open(os.path.join(cli, name)).ReadAsArray()
            np.testing.assert_array_equal(a, b, name)
        # A bad input is the library's exception, caught by the program: one line, the pattern.
        done = subprocess.run([program, os.path.join(self.tmp, "none", "*.tif"), mine], capture_output=True, text=True)
        self.assertEqual(done.returncode, 1)
        self.assertEqual(done.stderr.strip(), "fill_stack: %s: no file matches this pattern: the folder %s does not "
                         "exist" % (os.path.join(self.tmp, "none", "*.tif"), os.path.join(self.tmp, "none")))


if __name__ == "__main__":
    unittest.main(verbosity=2)
