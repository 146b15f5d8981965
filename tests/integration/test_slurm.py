#!/usr/bin/python3
"""Cluster runs: `kalends plan`, `kalends run --shard K`, `kalends run --finalize`, first without a
workload manager, then as a job array on a real one-node Slurm cluster started here on localhost.

Invented data (tools/synth_stack.py and tools/synth_lst.py, the fictional demo district at a
small size): checks of the mechanics. "Identical" compares what a user reads: every band's pixels
bit for bit, band descriptions, georeferencing and dataset metadata of every raster, and every
other file byte for byte, except the fill summary's 'blocks' and 'block_size', which say how the
work was cut into blocks (docs/cluster.md).

The Slurm part installs Debian's slurm-wlm and munge when missing (tools/setup.sh does it too),
needs root to start slurmd, and is skipped, saying why, only where the cluster cannot start.
"""
import datetime
import glob
import json
import os
import re
import shlex
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "tools"))
import kalends_testlib as kt  # noqa: E402
import synth_lst  # noqa: E402
import synth_stack  # noqa: E402

# The demo job (demo/job.toml) with its inputs at a small size; 1024 rows are 4 strips of 256.
DEMO_JOB = """
[job]
name = "lower-tamsin-cluster"
out = "out"
memory = "512M"
threads = 1

[inputs.ndvi]
stack = "stack/ndvi/ndvi_*.tif"
qa = "stack/qa/qa_*.tif"
keep = "bits0-1 in 0,1"
valid_range = [-0.2, 1.0]

[inputs.lst_day]
stack = "stack/lst/day/lst_day_*.tif"

[inputs.lst_night]
stack = "stack/lst/night/lst_night_*.tif"

[[step]]
id = "fill"
do = "fill"
input = "ndvi"
method = "whittaker"
lambda = "auto"
envelope = "upper"
every = "1M"
reach = 183

[[step]]
id = "seasons"
do = "seasons"
input = "fill"
period = "1M"

[[step]]
id = "compare"
do = "compare"
input = "seasons"

[[step]]
id = "day_fill"
do = "fill"
input = "lst_day"
method = "harmonic"
harmonics = 2

[[step]]
id = "night_fill"
do = "fill"
input = "lst_night"
method = "harmonic"
harmonics = 2

[[step]]
id = "suitability"
do = "suitability"
day = "day_fill"
night = "night_fill"
model = "r0-2013"
"""

# A quicker job for the checks that need no cluster: 512 rows, 2 strips.
SMALL_JOB = """
[job]
name = "small"
out = "out"
memory = "256M"
threads = 2

[inputs.ndvi]
stack = "stack/ndvi/ndvi_*.tif"
qa = "stack/qa/qa_*.tif"
keep = "bits0-1 in 0,1"

[[step]]
id = "fill"
do = "fill"
input = "ndvi"
lambda = "10"
every = "1M"

[[step]]
id = "seasons"
do = "seasons"
input = "fill"

[[step]]
id = "compare"
do = "compare"
input = "seasons"
"""

VOLATILE_SUMMARY_KEYS = ("blocks", "block_size")  # how the work was cut, not what it made


def kalends(*args, timeout=600, cwd=None):
    return subprocess.run([kt.KALENDS_BIN] + list(args), capture_output=True, text=True, timeout=timeout, cwd=cwd)


def read(path):
    with open(path) as f:
        return f.read()


def outputs(out):
    return sorted(os.path.relpath(p, out) for p in glob.glob(os.path.join(out, "**", "*"), recursive=True)
                  if os.path.isfile(p) and not os.path.relpath(p, out).startswith(".kalends"))


class Compare:
    def assert_same_outputs(self, single, sharded):
        """Every output of `sharded` as in `single` (see the module's docstring)."""
        import numpy as np
        g = kt.gdal()
        files = outputs(single)
        self.assertEqual(files, outputs(sharded))
        rasters = 0
        for rel in files:
            a, b = os.path.join(single, rel), os.path.join(sharded, rel)
            if rel.endswith(".tif"):
                x, y = g.Open(a), g.Open(b)
                self.assertEqual((x.RasterXSize, x.RasterYSize, x.RasterCount),
                                 (y.RasterXSize, y.RasterYSize, y.RasterCount), rel)
                self.assertEqual({k: v.replace(single, "<out>") for k, v in x.GetMetadata().items()},
                                 {k: v.replace(sharded, "<out>") for k, v in y.GetMetadata().items()}, rel)
                self.assertEqual(x.GetGeoTransform(), y.GetGeoTransform(), rel)
                self.assertEqual(x.GetProjection(), y.GetProjection(), rel)
                for band in range(1, x.RasterCount + 1):
                    bx, by = x.GetRasterBand(band), y.GetRasterBand(band)
                    self.assertEqual(bx.GetDescription(), by.GetDescription(), rel)
                    px, py = bx.ReadAsArray(), by.ReadAsArray()
                    # Bit for bit, NaN included.
                    self.assertTrue(np.array_equal(px.view(np.uint32), py.view(np.uint32)),
                                    "%s band %d: %d pixels differ" % (rel, band, int((px.view(np.uint32) != py.view(np.uint32)).sum())))
                rasters += 1
            elif rel.endswith("fill-summary.json"):
                with open(a) as f, open(b) as h:
                    sa, sb = json.load(f), json.load(h)
                for k in VOLATILE_SUMMARY_KEYS:
                    sa.pop(k), sb.pop(k)
                self.assertEqual(sa, sb, rel)
            else:
                with open(a, "rb") as f, open(b, "rb") as h:
                    self.assertEqual(f.read().replace(single.encode(), b"<out>"),
                                     h.read().replace(sharded.encode(), b"<out>"), rel)
        self.assertGreater(rasters, 10)
        return len(files)


def cut_short(path, size):
    """Keeps the first `size` bytes of `path`, as a failed download leaves a file."""
    with open(path, "rb") as f:
        head = f.read(size)
    with open(path, "wb") as f:
        f.write(head)


# ---- without a workload manager ---------------------------------------------------------------

class ShardsByHand(kt.TempDirTestCase, Compare):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        synth_stack.make_stack(os.path.join(cls.tmp, "stack", "ndvi"), width=64, height=512, years=2,
                               qa_dir=os.path.join(cls.tmp, "stack", "qa"))
        cls.job = os.path.join(cls.tmp, "job.toml")
        with open(cls.job, "w") as f:
            f.write(SMALL_JOB)
        cls.single = os.path.join(cls.tmp, "single")
        done = kalends("run", cls.job, "--out", cls.single, "-q")
        assert done.returncode == 0, done.stderr

    def out(self, name):
        return os.path.join(self.tmp, name)

    def test_a_damaged_composite_is_left_out_by_plan_shards_and_finalize_with_skip_bad(self):
        # A composite cut short by a failed download: plan had stopped on it (no --skip-bad),
        # and the shards' --skip-bad could not help, as each made the plan again from every
        # file. Now plan, shards and finalize leave it out and list it (exit 3), the sbatch line
        # passes --skip-bad to the tasks, and the result equals one machine's --skip-bad run.
        folder = self.out("damaged")
        shutil.copytree(os.path.join(self.tmp, "stack"), os.path.join(folder, "stack"))
        bad = sorted(glob.glob(os.path.join(folder, "stack", "ndvi", "ndvi_*.tif")))[7]
        cut_short(bad, 300)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write(SMALL_JOB)
        single, out = os.path.join(folder, "single"), os.path.join(folder, "sharded")
        self.assertEqual(kalends("run", job, "--out", single, "--skip-bad", "-q").returncode, 3)
        self.assertEqual(kalends("plan", job, "--out", out, "--shards", "2").returncode, 2)
        plan = kalends("plan", job, "--out", out, "--shards", "2", "--skip-bad")
        self.assertEqual(plan.returncode, 3, plan.stderr)
        self.assertIn("skipped input: " + bad, plan.stderr)
        self.assertTrue(plan.stdout.strip().splitlines()[-1].endswith(" --skip-bad"), plan.stdout)
        status = kalends("status", job, "--out", out)
        self.assertRegex(status.stdout, r"input\s+bad\s+left out\s+%s" % re.escape(bad))
        self.shards_and_finalize_skip(job, out, bad, single, "is damaged")  # plan finds it too

    def shards_and_finalize_skip(self, job, out, bad, single, finalize_says):
        """Both shards and the finalize with --skip-bad leave `bad` out; the result equals `single`.
        A finalize without --skip-bad refuses naming `bad` and saying `finalize_says`."""
        for k in ("1", "2"):
            done = kalends("run", job, "--out", out, "--shard", k, "--skip-bad")
            self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
            self.assertIn("skipped input: " + bad, done.stdout)
        # Without --skip-bad: the file named, and what to do (it had said only that the shards'
        # inputs changed and to run them again, which changed nothing).
        done = kalends("run", job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn(bad + ": ", done.stderr)
        self.assertIn(finalize_says, done.stderr)
        done = kalends("run", job, "--out", out, "--finalize", "--skip-bad")
        self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
        self.assert_same_outputs(single, out)
        status = kalends("status", job, "--out", out)
        self.assertEqual(status.returncode, 0, status.stdout + status.stderr)
        self.assertRegex(status.stdout, r"2/2\s+shard\s+done")

    def test_a_composite_whose_pixels_are_cut_short_is_left_out_by_shards_and_finalize(self):
        # Plain GeoTIFFs (tags first, then the strips) of invented NDVI, one cut after 600 bytes:
        # plan opens it, each shard finds its pixels unreadable and leaves it out. Finalize had
        # then judged every shard stale ("1 new file") however often they were rerun.
        import numpy as np
        g = kt.gdal()
        folder = self.out("cut-pixels")
        os.makedirs(os.path.join(folder, "in"))
        rng = np.random.default_rng(5)
        for k in range(23):
            date = datetime.date(2021, 1, 1) + datetime.timedelta(16 * k)
            values = (0.4 + 0.3 * np.sin(k / 3.7) + 0.02 * rng.standard_normal((600, 8))).astype(np.float32)
            values[rng.random((600, 8)) < 0.2] = np.nan
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "in", "ndvi_%s.tif" % date), 8, 600, 1,
                                                   g.GDT_Float32)
            ds.SetGeoTransform([500000, 30, 0, 4000000, 0, -30])
            ds.GetRasterBand(1).WriteArray(values)
            ds = None
        bad = os.path.join(folder, "in", "ndvi_2021-03-06.tif")
        cut_short(bad, 600)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\nthreads = 2\n[inputs.ndvi]\nstack = "in/*.tif"\n[[step]]\nid = "fill"\n'
                    'do = "fill"\ninput = "ndvi"\nlambda = 10\n')
        single, out = os.path.join(folder, "single"), os.path.join(folder, "sharded")
        self.assertEqual(kalends("run", job, "--out", single, "--skip-bad", "-q").returncode, 3)
        plan = kalends("plan", job, "--out", out, "--shards", "2", "--skip-bad")
        self.assertEqual(plan.returncode, 0, plan.stderr)  # the header reads
        self.shards_and_finalize_skip(job, out, bad, single,
                                      "left it out (--skip-bad): give --finalize --skip-bad too, or repair the file")
        # A shard run again without --skip-bad, as an operator might: told, not run on the
        # file's rows that still read (it had said done, and stayed stale for the finalize).
        done = kalends("run", job, "--out", out, "--shard", "1")
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn(bad + ": ", done.stderr)
        self.assertIn("give this shard --skip-bad too, as the plan's sbatch line does", done.stderr)

    def test_a_note_every_shard_gives_says_its_counts_are_each_shards(self):
        # A stack ending in June: every shard notes the last year's empty cycle layer with its own
        # strip's count. The finalize had shown that line once, as if the count were the whole
        # area's (half of the single run's here).
        import re
        folder = self.out("half-year")
        shutil.copytree(os.path.join(self.tmp, "stack"), os.path.join(folder, "stack"))
        for path in glob.glob(os.path.join(folder, "stack", "*", "*_2022-0[7-9]-*.tif")) + \
                glob.glob(os.path.join(folder, "stack", "*", "*_2022-1*.tif")):
            os.remove(path)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write(SMALL_JOB)
        single = kalends("run", job, "--out", os.path.join(folder, "single"))
        self.assertEqual(single.returncode, 0, single.stderr)
        out = os.path.join(folder, "sharded")
        self.assertEqual(kalends("plan", job, "--out", out, "--shards", "2", "-q").returncode, 0)
        for shard in ("1/2", "2/2"):
            self.assertEqual(kalends("run", job, "--out", out, "--shard", shard, "-q").returncode, 0)
        done = kalends("run", job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 0, done.stderr)
        pattern = r"the 2022 cycle layer is empty at (\d+) of the (\d+) pixels"
        whole = re.search(pattern, single.stdout + single.stderr)
        each = re.search(r"each of the 2 shards: " + pattern, done.stdout + done.stderr)
        self.assertIsNotNone(whole, single.stdout + single.stderr)
        self.assertIsNotNone(each, done.stdout + done.stderr)
        self.assertEqual(2 * int(each.group(2)), int(whole.group(2)))

    def test_plan_refuses_more_shards_than_strips(self):
        done = kalends("plan", self.job, "--out", self.out("too-many"), "--shards", "3")
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        line = done.stderr.strip()
        print("\n  " + line)
        self.assertEqual(len(line.splitlines()), 1)
        self.assertIn("'ndvi' has 512 rows", line)
        self.assertIn("at most 2 shards", line)

    def test_counts_of_pixels_not_fitted_add_up_over_shards(self):
        # Real gaps: the Alaska masked30 NDVI (see the data README) repeated six times down a
        # 100 x 600 px grid, so that two 256-row strips exist; whittaker by year (reach) leaves
        # some pixel-years with too few observations unfitted. fill-summary.json's reasons and
        # fill-years.tsv (per year and reason) after --finalize are those of one machine: they
        # had been the first shard's alone.
        folder = os.path.join(self.tmp, "not-fitted")
        stack = os.path.join(folder, "stack")
        os.makedirs(stack)
        g = kt.gdal()
        source = kt.shared_path("alaska-ndvi", "masked30")
        for name in sorted(os.listdir(source)):
            if name.endswith(".tif"):
                values = g.Open(os.path.join(source, name)).ReadAsArray()
                kt.write_raster(os.path.join(stack, name), np.tile(values, (6, 1)))
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\nmemory = "256M"\n[inputs.ndvi]\nstack = "stack/ndvi_*.tif"\n'
                    '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = "10"\nreach = 183\n')
        single = os.path.join(folder, "single")
        self.assertEqual(kalends("run", job, "--out", single, "-q").returncode, 0)
        with open(os.path.join(single, "fill", "fill-summary.json")) as f:
            reasons = json.load(f)["series_not_fitted"]
        self.assertGreater(sum(reasons.values()), 0)
        out = os.path.join(folder, "sharded")
        self.assertEqual(kalends("plan", job, "--out", out, "--shards", "2").returncode, 0)
        for shard in ("1/2", "2/2"):
            done = kalends("run", job, "--out", out, "--shard", shard)
            self.assertEqual(done.returncode, 0, done.stderr)
        done = kalends("run", job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assert_same_outputs(single, out)
        with open(os.path.join(out, "fill", "fill-years.tsv")) as f:
            per_year = [line.split("\t") for line in f if line.startswith("not-fitted\t")]
        self.assertEqual(sum(int(fields[2]) for fields in per_year), sum(reasons.values()))

    def test_spacetime_shards_equal_one_run(self):
        # spacetime fills one tile row of 256 px at a time with its halo, whatever the budget,
        # and shards take whole 256-row strips, so each tile is filled from the same pixels in a
        # shard as on one machine: the stitched outputs are the one-machine run's, bit for bit.
        # Also for a grid of 300 rows, which one block of tile and halo (320 rows) would hold.
        short = os.path.join(self.tmp, "short")
        synth_stack.make_stack(os.path.join(short, "stack", "ndvi"), width=64, height=300, years=2,
                               qa_dir=os.path.join(short, "stack", "qa"))
        text = SMALL_JOB.replace('lambda = "10"', 'method = "spacetime"').replace('"256M"', '"512M"')
        for folder in (self.tmp, short):
            job = os.path.join(folder, "spacetime.toml")
            with open(job, "w") as f:
                f.write(text)
            single = os.path.join(folder, "spacetime-single")
            done = kalends("run", job, "--out", single, "-q")
            self.assertEqual(done.returncode, 0, done.stderr)
            out = os.path.join(folder, "spacetime-sharded")
            done = kalends("plan", job, "--out", out, "--shards", "2")
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertIn("split by rows: fill, seasons", done.stdout)
            self.assertIn("at --finalize: compare (needs the whole area)", done.stdout)
            for shard in ("1/2", "2/2"):
                done = kalends("run", job, "--out", out, "--shard", shard)
                self.assertEqual(done.returncode, 0, done.stderr)
            done = kalends("run", job, "--out", out, "--finalize")
            self.assertEqual(done.returncode, 0, done.stderr)
            n = self.assert_same_outputs(single, out)
            print("\n  spacetime, %s: %d outputs of 2 shards identical to the single-machine run"
                  % (os.path.basename(folder), n))

    def test_a_removed_date_goes_and_block_choices_and_notes_come_through(self):
        # Invented 20 x 300 px stack (two 256-row strips), 12 dates; spacetime with GCV, which
        # lists its choice per block in fill-summary.json. --finalize had kept only the first
        # shard's choices, had kept a stitched date the shards no longer make after the date
        # left the input, and showed none of the notes the shards' steps printed.
        import numpy as np
        folder = os.path.join(self.tmp, "removed-date")
        stack = os.path.join(folder, "stack")
        os.makedirs(stack)
        rng = np.random.default_rng(3)
        for k in range(12):
            values = (0.5 + 0.2 * np.sin(k / 2) + rng.normal(0, 0.02, (300, 20))).astype(np.float32)
            values[rng.random((300, 20)) < 0.2] = np.nan
            values[:, :2] = np.nan  # two columns never observed: harmonic cannot fit them
            kt.write_raster(os.path.join(stack, "ndvi_2031-%02d-01.tif" % (k + 1)), values,
                            geotransform=(0, 1, 0, 300, 0, -1), nodata=float("nan"))
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\nmemory = "512M"\nthreads = 1\n[inputs.ndvi]\nstack = "stack/ndvi_*.tif"\n'
                    '[[step]]\nid = "st"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\n'
                    'time_smoothing = "auto"\n[[step]]\nid = "h"\ndo = "fill"\ninput = "ndvi"\n'
                    'method = "harmonic"\nharmonics = 3\n')
        out = os.path.join(folder, "sharded")

        def both(single):
            self.assertEqual(kalends("run", job, "--out", single, "-q").returncode, 0)
            self.assertEqual(kalends("plan", job, "--out", out, "--shards", "2", "-q").returncode, 0)
            for shard in ("1/2", "2/2"):
                done = kalends("run", job, "--out", out, "--shard", shard, "-q")
                self.assertEqual(done.returncode, 0, done.stderr)
            done = kalends("run", job, "--out", out, "--finalize")
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assert_same_outputs(single, out)   # fill-summary.json's "chosen" included
            return done

        done = both(os.path.join(folder, "single"))
        with open(os.path.join(out, "st", "fill-summary.json")) as f:
            self.assertEqual([c["block"] for c in json.load(f)["chosen"]], [0, 1])
        # 12 dates are too few for 3 harmonics where a fifth is cloud: each shard says how many
        # of its pixels were not fitted, and --finalize shows both lines.
        self.assertRegex(done.stdout, r"note: shard 1/2: \d+ pixels not fitted")
        self.assertRegex(done.stdout, r"note: shard 2/2: \d+ pixels not fitted")
        os.remove(os.path.join(stack, "ndvi_2031-12-01.tif"))
        done = both(os.path.join(folder, "single-without-december"))
        self.assertFalse(os.path.exists(os.path.join(out, "st", "ndvi_2031-12-01.tif")))
        self.assertEqual(done.stdout.count("note: removed 1 stitched file(s) that no shard makes any more"), 2)  # a step each

    def test_the_printed_submission_survives_spaces(self):
        import shlex
        folder = os.path.join(self.tmp, "with space")
        os.makedirs(folder)
        job = os.path.join(folder, "job x.toml")
        shutil.copy(self.job, job)
        with open(job) as f:
            text = f.read().replace('"stack/', '"%s/stack/' % self.tmp)
        with open(job, "w") as f:
            f.write(text)
        out = os.path.join(folder, "o ut")
        done = kalends("plan", job, "--out", out, "--shards", "2", "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        words = shlex.split(done.stdout.strip())
        self.assertEqual(words[0], "sbatch")
        self.assertEqual(words[-3:], [os.path.abspath(job), "--out", os.path.abspath(out)])
        self.assertTrue(any(w.startswith("--export=ALL,KALENDS_BIN=") for w in words))

    def test_a_program_path_with_a_comma_is_passed_in_the_environment(self):
        # sbatch --export splits its list at commas (sbatch(1), --export): KALENDS_BIN=/a/b,c
        # would have arrived as /a/b.
        import shlex
        folder = os.path.join(self.tmp, "bin in,x=y")
        os.makedirs(folder)
        program = os.path.join(folder, "kalends")
        shutil.copy(kt.KALENDS_BIN, program)
        done = subprocess.run([program, "plan", self.job, "--out", self.out("comma"), "--shards", "2", "-q"],
                              capture_output=True, text=True, timeout=300)
        self.assertEqual(done.returncode, 0, done.stderr)
        words = shlex.split(done.stdout.strip())
        self.assertEqual(words[0], "KALENDS_BIN=" + program)
        self.assertEqual(words[1:3], ["sbatch", "--export=ALL"])
        self.assertFalse(any("," in w for w in words[1:] if w.startswith("--export")))

    def test_shard_needs_a_plan_and_a_shard_of_it(self):
        done = kalends("run", self.job, "--out", self.out("no-plan"), "--shard", "1/2")
        self.assertEqual(done.returncode, 2)
        self.assertIn("no shard plan", done.stderr)
        self.assertIn("--out " + self.out("no-plan") + " --shards N", done.stderr)  # the command to run
        self.assertEqual(kalends("plan", self.job, "--out", self.out("no-plan"), "--shards", "2", "-q").returncode, 0)
        # An empty value (an unset $SLURM_ARRAY_TASK_ID) or a fraction must not run anything,
        # least of all the whole job.
        for wrong, words in (("3", "the plan has shards 1 to 2"), ("1/4", "the plan has 2 shards"),
                             ("0/2", "1 <= K <= N"), ("", "needs a value ('' given)"), ("1.9", "1 <= K <= N"),
                             ("1/2.5", "1 <= K <= N")):
            done = kalends("run", self.job, "--out", self.out("no-plan"), "--shard", wrong)
            self.assertEqual(done.returncode, 2, wrong)
            self.assertIn(words, done.stderr)
        self.assertFalse(glob.glob(os.path.join(self.out("no-plan"), "*", "*.tif")))
        # The same job under another file name: the plan names the job file it was made for.
        copy = os.path.join(os.path.dirname(self.job), "copy-of-job.toml")
        shutil.copy(self.job, copy)
        done = kalends("run", copy, "--out", self.out("no-plan"), "--shard", "1/2")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("made for another job file (%s)" % os.path.abspath(self.job), done.stderr)

    def test_shards_then_finalize_equal_one_run_and_stale_shards_are_named(self):
        out = self.out("by-hand")
        plan = kalends("plan", self.job, "--out", out, "--shards", "2")
        self.assertEqual(plan.returncode, 0, plan.stderr)
        self.assertIn("at --finalize: compare", plan.stdout)
        self.assertIn("sbatch ", plan.stdout.strip().splitlines()[-1])
        self.assertIn("--array=1-2", plan.stdout)
        # Nothing done: finalize refuses, names both shards, writes nothing.
        done = kalends("run", self.job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 4, done.stdout + done.stderr)
        self.assertIn("1/2 (never run)", done.stderr)
        self.assertIn("2/2 (never run)", done.stderr)
        self.assertEqual(outputs(out), [])
        self.assertEqual(kalends("run", self.job, "--out", out, "--shard", "1/2", "-q").returncode, 0)
        done = kalends("run", self.job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 4)
        self.assertIn("finalize refused, nothing changed", done.stdout)
        self.assertIn("2/2", done.stderr)
        self.assertNotIn("1/2", done.stderr)
        # Shard 2 at work (its folder's lock held, as a running shard holds it): named as
        # running, and not offered for resubmission.
        import fcntl
        lock_path = os.path.join(out, ".kalends", "shards", "2-of-2", ".kalends", "lock")
        os.makedirs(os.path.dirname(lock_path), exist_ok=True)
        with open(lock_path, "a+") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            lock.truncate(0)
            lock.write(str(os.getpid()))
            lock.flush()
            done = kalends("run", self.job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 4)
        self.assertIn("2/2 (running (pid %d)" % os.getpid(), done.stderr)
        self.assertIn("wait for them to end", done.stderr)
        self.assertNotIn("sbatch --array", done.stderr)
        # Shard 1 at work on its fill (the step marked running, as a run marks it): "being run",
        # not "interrupted", which had been said of a live task.
        import sqlite3
        state = sqlite3.connect(os.path.join(out, ".kalends", "shards", "1-of-2", ".kalends", "state.sqlite"))
        state.execute("UPDATE steps SET status = 'running' WHERE id = 'fill'")
        state.commit()
        with open(os.path.join(out, ".kalends", "shards", "1-of-2", ".kalends", "lock"), "a+") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            lock.truncate(0)
            lock.write(str(os.getpid()))
            lock.flush()
            status = kalends("status", self.job, "--out", out).stdout
        line = [l for l in status.splitlines() if l.startswith("1/2")][0]
        self.assertIn("running (pid %d): fill being run" % os.getpid(), line)
        self.assertNotIn("interrupted", line)
        state.execute("UPDATE steps SET status = 'done' WHERE id = 'fill'")
        state.commit()
        state.close()
        # A finalize (or any run) holding the folder: plan would rewrite plan.tsv under it.
        main_lock = os.path.join(out, ".kalends", "lock")
        plan_before = open(os.path.join(out, ".kalends", "plan.tsv")).read()
        with open(main_lock, "a+") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            done = kalends("plan", self.job, "--out", out, "--shards", "1")
        self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
        self.assertIn("another kalends run", done.stderr)
        self.assertEqual(open(os.path.join(out, ".kalends", "plan.tsv")).read(), plan_before)
        status = kalends("status", self.job, "--out", out).stdout
        self.assertRegex(status, r"1/2\s+shard\s+done")
        self.assertRegex(status, r"2/2\s+shard\s+not done\s+never run")
        done = kalends("run", self.job, "--out", out, "--shard", "2")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertRegex(done.stdout, r"compare\s+later")
        # Each shard holds only its strip.
        g = kt.gdal()
        for k, rows in ((1, 256), (2, 256)):
            tif = sorted(glob.glob(os.path.join(out, ".kalends", "shards", "%d-of-2" % k, "fill", "ndvi_*.tif")))[0]
            self.assertEqual((g.Open(tif).RasterXSize, g.Open(tif).RasterYSize), (64, rows))
        done = kalends("run", self.job, "--out", out, "--finalize")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assert_same_outputs(self.single, out)
        # The stitched steps are recorded like a single-machine run's: a plain run does nothing.
        done = kalends("run", self.job, "--out", out)
        self.assertIn("nothing new, nothing done", done.stdout)
        # A shard whose fill was stopped mid-run, then one whose fill failed: status names each
        # state and exits 1 for a monitoring script (it had said "not done ... failed last time"
        # for the stopped one, and exited 0 for both).
        import sqlite3
        shard_state = os.path.join(out, ".kalends", "shards", "2-of-2", ".kalends", "state.sqlite")
        shutil.copy2(shard_state, shard_state + ".bak")
        try:
            for status_value, message, state, words in (("running", "", "interrupted", "fill interrupted"),
                                                        ("failed", "disk full", "failed", "fill failed: disk full")):
                db = sqlite3.connect(shard_state)
                db.execute("UPDATE steps SET status = ?, message = ?, fingerprint = '' WHERE id = 'fill'",
                           (status_value, message))
                db.commit()
                db.close()
                done = kalends("status", self.job, "--out", out)
                self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
                self.assertRegex(done.stdout, r"2/2\s+shard\s+%s\s+.*%s" % (state, words))
                self.assertNotIn("failed last time", done.stdout)
        finally:
            shutil.move(shard_state + ".bak", shard_state)
        self.assertEqual(kalends("status", self.job, "--out", out).returncode, 0)
        # A changed composite makes every shard stale; finalize says so.
        first = sorted(glob.glob(os.path.join(self.tmp, "stack", "ndvi", "ndvi_*.tif")))[3]
        backup = first + ".bak"
        shutil.copy2(first, backup)
        try:
            ds = g.Open(first, 1)
            band = ds.GetRasterBand(1)
            values = band.ReadAsArray()
            values[0, 0] = values[0, 0] + 7
            band.WriteArray(values)
            ds = None
            done = kalends("run", self.job, "--out", out, "--finalize")
            self.assertEqual(done.returncode, 4, done.stdout + done.stderr)
            print("\n  " + done.stderr.strip())
            # The fill reads the changed file; the seasons step reads the fill.
            for shard in ("1/2", "2/2"):
                self.assertIn("%s (fill stale: its inputs changed (0 new, 1 changed files), seasons stale: its inputs "
                              "changed)" % shard, done.stderr)
        finally:
            shutil.move(backup, first)


# ---- a real Slurm -----------------------------------------------------------------------------

def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LocalSlurm:
    """A one-node Slurm cluster on localhost, its configuration, keys and state in `folder`."""

    def __init__(self, folder):
        self.folder = folder
        self.env = dict(os.environ, SLURM_CONF=os.path.join(folder, "slurm.conf"))
        self.pids = []  # (pid, daemon) in start order

    def install(self):
        if shutil.which("slurmctld") or os.path.exists("/usr/sbin/slurmctld"):
            return
        if os.geteuid() != 0:
            raise unittest.SkipTest("Slurm is not installed and installing it needs root (apt-get install slurm-wlm munge)")
        print("\n  installing slurm-wlm and munge", flush=True)
        env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
        subprocess.run(["apt-get", "update", "-qq"], env=env, capture_output=True, timeout=600)
        done = subprocess.run(["apt-get", "install", "-y", "-qq", "--no-install-recommends", "slurm-wlm", "munge"],
                              env=env, capture_output=True, text=True, timeout=900)
        if done.returncode != 0:
            raise unittest.SkipTest("cannot install slurm-wlm and munge: " + done.stderr.strip()[-300:])

    def start(self):
        if os.geteuid() != 0:
            raise unittest.SkipTest("slurmd needs root to start jobs as their user; this test runs as uid %d" % os.geteuid())
        self.install()
        f = self.folder
        munge = os.path.join(f, "munge")
        for d in ("munge", "state", "spool", "log"):
            os.makedirs(os.path.join(f, d), mode=0o700, exist_ok=True)
        os.chmod(f, 0o700)
        key = os.path.join(munge, "munge.key")
        with open(key, "wb") as out:
            out.write(os.urandom(1024))
        os.chmod(key, 0o600)
        self.socket = os.path.join(munge, "munge.socket")
        self.daemon(["/usr/sbin/munged", "--key-file=" + key, "--socket=" + self.socket,
                     "--pid-file=" + os.path.join(munge, "munged.pid"), "--log-file=" + os.path.join(munge, "munged.log"),
                     "--seed-file=" + os.path.join(munge, "munged.seed"), "--force"],
                    os.path.join(munge, "munged.pid"), os.path.join(munge, "munged.log"))
        cpus = min(2, os.cpu_count() or 1)
        with open("/proc/meminfo") as m:
            total_mib = int(m.readline().split()[1]) // 1024
        memory = min(4096, total_mib - 512)
        conf = f"""
ClusterName=kalendstest
SlurmctldHost=localhost(127.0.0.1)
SlurmctldPort={free_port()}
SlurmdPort={free_port()}
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket={self.socket}
StateSaveLocation={f}/state
SlurmdSpoolDir={f}/spool
SlurmctldPidFile={f}/slurmctld.pid
SlurmdPidFile={f}/slurmd.pid
SlurmctldLogFile={f}/log/slurmctld.log
SlurmdLogFile={f}/log/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
SchedulerType=sched/backfill
MpiDefault=none
ReturnToService=2
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
InactiveLimit=0
MinJobAge=600
KillWait=5
NodeName=localhost NodeAddr=127.0.0.1 CPUs={cpus} RealMemory={memory} State=UNKNOWN
PartitionName=debug Nodes=localhost Default=YES MaxTime=INFINITE State=UP
"""
        with open(self.env["SLURM_CONF"], "w") as out:
            out.write(conf)
        self.daemon(["/usr/sbin/slurmctld", "-i"], os.path.join(f, "slurmctld.pid"), os.path.join(f, "log", "slurmctld.log"))
        self.daemon(["/usr/sbin/slurmd", "-N", "localhost"], os.path.join(f, "slurmd.pid"), os.path.join(f, "log", "slurmd.log"))
        deadline = time.time() + 60
        state = ""
        while time.time() < deadline:
            state = self.command("sinfo", "-h", "-o", "%t").stdout.strip()
            if state == "idle":
                return
            time.sleep(1)
        raise unittest.SkipTest("the Slurm node did not come up (state '%s'); slurmd log: %s"
                                % (state, self.tail(os.path.join(f, "log", "slurmd.log"))))

    def daemon(self, argv, pid_file, log):
        done = subprocess.run(argv, env=self.env, capture_output=True, text=True, timeout=60)
        # The daemon creates its pid file before it writes the pid: wait for the number.
        def pid():
            try:
                with open(pid_file) as f:
                    text = f.read().strip()
            except OSError:
                return None
            return int(text) if text.isdigit() else None
        deadline = time.time() + 20
        while time.time() < deadline and pid() is None:
            time.sleep(0.2)
        if done.returncode != 0 or pid() is None:
            raise unittest.SkipTest("%s did not start (exit %d): %s %s" % (os.path.basename(argv[0]), done.returncode,
                                                                           done.stderr.strip(), self.tail(log)))
        self.pids.append((pid(), os.path.basename(argv[0])))

    @staticmethod
    def tail(path):
        try:
            with open(path) as f:
                return " | ".join(f.read().strip().splitlines()[-4:])
        except OSError:
            return "(no log)"

    def command(self, *argv, cwd=None):
        return subprocess.run(list(argv), env=self.env, capture_output=True, text=True, timeout=60, cwd=cwd)

    def submit(self, argv, cwd):
        """Runs an sbatch command line; returns the job id."""
        done = subprocess.run([argv[0], "--parsable"] + argv[1:], env=self.env, capture_output=True, text=True,
                              timeout=60, cwd=cwd)
        if done.returncode != 0:
            raise AssertionError("sbatch failed: " + done.stderr)
        return done.stdout.strip().split(";")[0]

    def wait(self, job, timeout=900):
        deadline = time.time() + timeout
        while time.time() < deadline:
            if not self.command("squeue", "-h", "-j", job, "-o", "%i").stdout.strip():
                return
            time.sleep(1)
        raise AssertionError("job %s still queued or running after %d s" % (job, timeout))

    def stop(self):
        """Stops the daemons, whatever state the tests left them in."""
        if os.path.exists(self.env["SLURM_CONF"]):
            self.command("scancel", "--full", "-u", "root")
            self.command("scontrol", "shutdown")
        for pid, name in reversed(self.pids):
            if name == "munged":
                self.signal(pid, signal.SIGTERM)
            deadline = time.time() + 15
            while time.time() < deadline and self.signal(pid, 0):
                time.sleep(0.3)
            self.signal(pid, signal.SIGKILL)

    @staticmethod
    def signal(pid, number):
        try:
            os.kill(pid, number)
            return True
        except ProcessLookupError:
            return False


class SlurmArray(kt.TempDirTestCase, Compare):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        # A short path: munged's socket must fit in a socket address.
        cls.cluster = LocalSlurm(tempfile.mkdtemp(prefix="kalends-slurm-"))
        cls.addClassCleanup(shutil.rmtree, cls.cluster.folder, ignore_errors=True)
        cls.addClassCleanup(cls.cluster.stop)
        cls.cluster.start()
        stack = os.path.join(cls.tmp, "stack")
        synth_stack.make_stack(os.path.join(stack, "ndvi"), width=128, height=1024, years=2,
                               qa_dir=os.path.join(stack, "qa"))
        synth_lst.make_lst(os.path.join(stack, "lst"), width=128, height=1024, years=2, quiet=True)
        cls.job = os.path.join(cls.tmp, "job.toml")
        with open(cls.job, "w") as f:
            f.write(DEMO_JOB)
        cls.single = os.path.join(cls.tmp, "single")
        started = time.time()
        done = kalends("run", cls.job, "--out", cls.single, "-q")
        assert done.returncode == 0, done.stderr
        print("\n  single machine: %.0f s" % (time.time() - started), flush=True)

    def plan(self, out):
        done = kalends("plan", self.job, "--out", out, "--shards", "4", "--threads", "1")
        self.assertEqual(done.returncode, 0, done.stderr)
        line = done.stdout.strip().splitlines()[-1]
        print("\n  " + line, flush=True)
        argv = shlex.split(line)
        self.assertEqual(argv[0], "sbatch")
        self.assertIn("--array=1-4", argv)
        self.assertIn("--mem=640M", argv)  # the job's 512M and a quarter
        return argv

    def finalize(self, out):
        return kalends("run", self.job, "--out", out, "--finalize")

    def test_1_array_of_4_equals_one_machine(self):
        out = os.path.join(self.tmp, "array")
        argv = self.plan(out)
        started = time.time()
        job = self.cluster.submit(argv, self.tmp)
        self.cluster.wait(job)
        print("  array of 4 on %d CPUs: %.0f s" % (min(2, os.cpu_count() or 1), time.time() - started), flush=True)
        logs = sorted(glob.glob(os.path.join(self.tmp, "kalends-%s_*.log" % job)))
        self.assertEqual(len(logs), 4, "one log per array task")
        done = self.finalize(out)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr + "".join(map(read, logs)))
        # The stitched suitability step shows its caution, as a plain run does.
        self.assertRegex(done.stdout, r"suitability +ran .*\n +Caution: temperature suitability describes temperature alone")
        n = self.assert_same_outputs(self.single, out)
        print("  finalize: %d outputs identical to the single-machine run" % n)

    def test_2_a_killed_task_is_rerun_alone(self):
        out = os.path.join(self.tmp, "killed")
        argv = self.plan(out)
        job = self.cluster.submit(argv, self.tmp)
        # Kill task 2 midway: once its fill has begun writing.
        shard = os.path.join(out, ".kalends", "shards", "2-of-4")
        deadline = time.time() + 300
        while time.time() < deadline and not glob.glob(os.path.join(shard, "fill", ".*.partial")):
            time.sleep(0.2)
        self.assertTrue(glob.glob(os.path.join(shard, "fill", ".*.partial")), "task 2 never started writing")
        self.assertEqual(self.cluster.command("scancel", "%s_2" % job).returncode, 0)
        self.cluster.wait(job)
        done = self.finalize(out)
        self.assertEqual(done.returncode, 4, done.stdout + done.stderr)
        print("  " + done.stderr.strip())
        self.assertIn("1 of 4 shards not done: 2/4 (", done.stderr)
        self.assertIn("--array=2", done.stderr)
        self.assertEqual([p for p in outputs(out)], [], "a refused finalize writes nothing")
        # Only that task again.
        again = [a if not a.startswith("--array=") else "--array=2" for a in argv]
        job = self.cluster.submit(again, self.tmp)
        self.cluster.wait(job)
        logs = glob.glob(os.path.join(self.tmp, "kalends-%s_*.log" % job))
        self.assertEqual(len(logs), 1)
        log = read(logs[0])
        self.assertIn("shard 2 of job", log)
        done = self.finalize(out)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr + log)
        self.assert_same_outputs(self.single, out)


if __name__ == "__main__":
    unittest.main(verbosity=2)
