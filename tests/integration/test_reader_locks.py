"""extract and report hold a shared lock on the folders they read; writers an exclusive one.

A fill replacing a folder while `extract` or `report` read it had given a table (or a page) that
mixed the two fills' files, exit 0. Now a reader started while a command writes there, or while
another process's job run works on the output folder, is refused (exit 2, one line naming the
folder), and a writer started while a reader reads is refused (exit 1). The other process is
simulated here by this test holding the locks with flock(2), so nothing depends on timing.

The stack is a small invented one (mechanics only).

Run: /usr/bin/python3 -m unittest -v tests/integration/test_reader_locks.py
"""

import fcntl
import os
import shutil
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

GEOTRANSFORM = (500000.0, 30.0, 0.0, 7000000.0, 0.0, -30.0)
EPSG = 32736


class ReaderLocks(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        stack = os.path.join(cls.tmp, "stack")
        os.makedirs(stack)
        rng = np.random.default_rng(5)
        for k in range(6):
            values = (0.4 + 0.1 * rng.random((20, 24))).astype(np.float32)
            kt.write_raster(os.path.join(stack, "ndvi_2021-%02d-01.tif" % (k + 1)), values,
                            geotransform=GEOTRANSFORM, epsg=EPSG, nodata=float("nan"))
        cls.filled = os.path.join(cls.tmp, "filled")
        cls.done = kt.run_kalends(["-q", "fill", os.path.join(stack, "*.tif"), "--out", cls.filled, "--threads", "1"])
        cls.points = os.path.join(cls.tmp, "points.csv")
        with open(cls.points, "w") as f:
            f.write("id,x,y,date\nA,%f,%f,2021-03-10\n" % (GEOTRANSFORM[0] + 100, GEOTRANSFORM[3] - 100))

    def setUp(self):
        self.assertEqual(self.done.returncode, 0, self.done.stderr)

    def extract(self, source, out_name):
        return kt.run_kalends(["extract", source, "--points", self.points, "--x-column", "x", "--y-column", "y",
                               "--crs", "EPSG:%d" % EPSG, "--out", os.path.join(self.tmp, out_name)])

    def hold(self, path, mode):
        fd = os.open(path, os.O_RDONLY)
        fcntl.flock(fd, mode | fcntl.LOCK_NB)
        self.addCleanup(os.close, fd)
        return fd

    def test_a_folder_being_written_is_not_read(self):
        fd = self.hold(self.filled, fcntl.LOCK_EX)  # a fill writing into it
        for source in (self.filled, os.path.join(self.filled, "*.tif")):
            done = self.extract(source, "table.csv")
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.splitlines()), 1, done.stderr)
            self.assertIn("filled: another kalends command is writing into this folder now", done.stderr)
            self.assertFalse(os.path.exists(os.path.join(self.tmp, "table.csv")))
        done = kt.run_kalends(["report", self.filled, "--html", os.path.join(self.tmp, "page.html")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("another kalends command is writing into this folder now", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "page.html")))
        os.close(fd)
        self._cleanups.clear()
        done = self.extract(self.filled, "table.csv")
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_a_subfolder_being_written_is_not_read(self):
        # A job's output folder: the fill step's folder inside it is what a writer holds.
        top = os.path.join(self.tmp, "job-out")
        os.makedirs(top, exist_ok=True)
        inner = os.path.join(top, "fill")
        if not os.path.exists(inner):
            shutil.copytree(self.filled, inner)
        self.hold(inner, fcntl.LOCK_EX)
        done = kt.run_kalends(["report", top, "--html", os.path.join(self.tmp, "page2.html")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("fill: another kalends command is writing into this folder now", done.stderr)

    def test_a_job_run_of_another_process_is_waited_for(self):
        top = os.path.join(self.tmp, "job-running")
        shutil.copytree(self.filled, os.path.join(top, "fill"))
        os.makedirs(os.path.join(top, ".kalends"))
        lock = os.path.join(top, ".kalends", "lock")
        with open(lock, "w") as f:
            f.write("424242")
        self.hold(lock, fcntl.LOCK_EX)
        done = kt.run_kalends(["report", top, "--html", os.path.join(self.tmp, "page3.html")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("a kalends run (pid 424242) is working on the output folder %s now" % top, done.stderr)
        done = self.extract(top, "table3.csv")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("job-running: a kalends run (pid 424242)", done.stderr)
        # A step's folder inside it: between two steps no folder is locked but the run's own.
        done = self.extract(os.path.join(top, "fill"), "table3b.csv")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("fill: a kalends run (pid 424242) is working on the output folder %s now" % top, done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "table3b.csv")))

    def test_a_folder_being_read_is_not_written(self):
        self.hold(self.filled, fcntl.LOCK_SH)  # an extract reading it
        before = sorted(os.listdir(self.filled))
        done = kt.run_kalends(["fill", os.path.join(self.tmp, "stack", "*.tif"), "--out", self.filled,
                               "--lambda", "3", "--threads", "1"])
        self.assertEqual(done.returncode, 1, done.stderr)
        self.assertIn("another kalends command is writing into or reading this folder", done.stderr)
        self.assertEqual(sorted(os.listdir(self.filled)), before)
        # Readers share: a second reader goes on.
        done = self.extract(self.filled, "table4.csv")
        self.assertEqual(done.returncode, 0, done.stderr)


SHIM = r"""
#define _GNU_SOURCE
#include <dlfcn.h>
#include <errno.h>
#include <stdlib.h>
#include <sys/file.h>
#include <sys/stat.h>
/* flock(2) as on NFS: a folder (open read-only) cannot be locked; with SHIM_NO_LOCKS nothing can. */
int flock(int fd, int operation) {
  static int (*real)(int, int);
  if (!real) real = (int (*)(int, int))dlsym(RTLD_NEXT, "flock");
  struct stat st;
  if (getenv("SHIM_NO_LOCKS")) { errno = ENOLCK; return -1; }
  if (fstat(fd, &st) == 0 && S_ISDIR(st.st_mode)) { errno = EBADF; return -1; }
  return real(fd, operation);
}
"""


class FileSystemsWithoutFolderLocks(kt.TempDirTestCase):
    """On NFS flock(2) locks only files open for writing, so a folder cannot be locked: writers
    had then run unguarded, and two fills into one folder wrote the same temporaries. A shim
    (LD_PRELOAD, compiled here) gives kalends NFS's answers; this test's own locks are real."""

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        source = os.path.join(cls.tmp, "shim.c")
        with open(source, "w") as f:
            f.write(SHIM)
        cls.shim = os.path.join(cls.tmp, "shim.so")
        import subprocess
        built = subprocess.run(["cc", "-shared", "-fPIC", "-o", cls.shim, source, "-ldl"], capture_output=True, text=True)
        cls.built = built.returncode == 0 and os.path.exists(cls.shim)
        cls.stack = os.path.join(cls.tmp, "stack")
        os.makedirs(cls.stack)
        rng = np.random.default_rng(9)
        for k in range(6):
            kt.write_raster(os.path.join(cls.stack, "ndvi_2021-%02d-01.tif" % (k + 1)),
                            (0.4 + 0.1 * rng.random((16, 16))).astype(np.float32),
                            geotransform=GEOTRANSFORM, epsg=EPSG, nodata=float("nan"))

    def setUp(self):
        if not self.built:
            self.skipTest("no C compiler for the flock shim")

    def kalends(self, args, **extra):
        import subprocess
        env = dict(os.environ, LD_PRELOAD=self.shim, **extra)
        return subprocess.run([kt.KALENDS_BIN] + args, capture_output=True, text=True, timeout=300, env=env)

    def test_a_lock_file_stands_in_for_the_folder(self):
        out = os.path.join(self.tmp, "filled")
        fill = ["fill", os.path.join(self.stack, "*.tif"), "--out", out, "--threads", "1"]
        done = self.kalends(fill)
        self.assertEqual(done.returncode, 0, done.stderr)
        lock = os.path.join(out, ".kalends-lock")
        self.assertTrue(os.path.exists(lock))
        fd = os.open(lock, os.O_RDWR)
        self.addCleanup(os.close, fd)
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # another fill at work there
        before = {n: os.path.getmtime(os.path.join(out, n)) for n in os.listdir(out)}
        done = self.kalends(fill + ["--lambda", "3"])
        self.assertEqual(done.returncode, 1, done.stderr)
        self.assertIn("another kalends command is writing into or reading this folder", done.stderr)
        self.assertEqual({n: os.path.getmtime(os.path.join(out, n)) for n in os.listdir(out)}, before)
        points = os.path.join(self.tmp, "points.csv")
        with open(points, "w") as f:
            f.write("id,x,y,date\nA,%f,%f,2021-03-10\n" % (GEOTRANSFORM[0] + 100, GEOTRANSFORM[3] - 100))
        done = self.kalends(["extract", out, "--points", points, "--x-column", "x", "--y-column", "y",
                             "--crs", "EPSG:%d" % EPSG, "--out", os.path.join(self.tmp, "t.csv")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("another kalends command is writing into this folder now", done.stderr)
        # A fill that fails leaves no folder of its own behind, lock file or not: a composite
        # whose pixels cannot be read fails it once its outputs are begun.
        damaged = os.path.join(self.tmp, "damaged")
        shutil.copytree(self.stack, damaged)
        path = os.path.join(damaged, "ndvi_2021-04-01.tif")
        with open(path, "r+b") as f:
            f.truncate(os.path.getsize(path) - 200)
        fresh = os.path.join(self.tmp, "never", "made")
        done = self.kalends(["fill", os.path.join(damaged, "*.tif"), "--out", fresh])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("ndvi_2021-04-01.tif", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "never")), done.stderr)

    def test_a_job_run_refuses_a_file_system_without_locks(self):
        folder = os.path.join(self.tmp, "job")
        os.makedirs(folder)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.ndvi]\nstack = "%s/*.tif"\n[[step]]\nid = "fill"\ndo = "fill"\n'
                    'input = "ndvi"\n' % self.stack)
        done = self.kalends(["run", job], SHIM_NO_LOCKS="1")
        self.assertEqual(done.returncode, 1, done.stderr)
        self.assertEqual(len(done.stderr.splitlines()), 1, done.stderr)
        self.assertIn("lock: cannot be locked (No locks available)", done.stderr)
        self.assertNotIn("another kalends run", done.stderr)
        # The refused run leaves its lock file (it cannot know whether another holds it):
        # `status` had shown the job as "running (pid ?)".
        self.assertTrue(os.path.exists(os.path.join(folder, "out", ".kalends", "lock")))
        done = self.kalends(["status", job], SHIM_NO_LOCKS="1")
        self.assertNotIn("running", done.stdout + done.stderr)
        self.assertIn("never run", done.stdout)


    def test_a_writer_at_work_is_not_called_stopped(self):
        # On NFS a writer holds the folder's lock file, not the folder: a reader that probed the
        # folder alone had been told to run the writer again while it was publishing.
        out = os.path.join(self.tmp, "publishing")
        done = self.kalends(["-q", "fill", os.path.join(self.stack, "*.tif"), "--out", out, "--threads", "1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        open(os.path.join(out, ".kalends-publishing"), "w").close()
        fd = os.open(os.path.join(out, ".kalends-lock"), os.O_RDWR)
        self.addCleanup(os.close, fd)
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # the writer, at its renames
        done = self.kalends(["seasons", out, "--out", os.path.join(self.tmp, "publishing-seasons")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("%s: another kalends command is replacing its outputs here now" % out, done.stderr)
        fcntl.flock(fd, fcntl.LOCK_UN)  # the writer was killed there
        done = self.kalends(["seasons", out, "--out", os.path.join(self.tmp, "publishing-seasons")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("%s: a kalends run was stopped while replacing its outputs here" % out, done.stderr)


if __name__ == "__main__":
    unittest.main()
