#!/usr/bin/python3
"""`kalends run` / `kalends status`: job-file checks, incremental runs, kills at random moments,
two runs at once, bad inputs, a failing disk.

Invented data (tools/synth_stack.py, the fictional demo district at a small size): these are
checks of the mechanics, not of accuracy. "Identical" compares what a user reads: every band's
pixels bit for bit, band descriptions and dataset metadata.
"""
import datetime
import glob
import json
import os
import random
import re
import resource
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "tools"))
import kalends_testlib as kt  # noqa: E402
import synth_stack  # noqa: E402

JOB = """
[job]
name = "test"
out = "out"
memory = "256M"

[inputs.ndvi]
stack = "stack/ndvi/ndvi_*.tif"
qa = "stack/qa/qa_*.tif"
keep = "bits0-1 in 0,1"
valid_range = [-0.2, 1.0]

[[step]]
id = "fill"
do = "fill"
input = "ndvi"
lambda = "{lam}"
envelope = "upper"
every = "1M"
{extra}

[[step]]
do = "seasons"
input = "fill"

[[step]]
do = "compare"
input = "seasons"
"""


def make_job(folder, lam="auto", years=2, size=96, extra=""):
    os.makedirs(folder, exist_ok=True)
    if not os.path.exists(os.path.join(folder, "stack", "ndvi", "synth.json")):
        synth_stack.make_stack(os.path.join(folder, "stack", "ndvi"), width=size, height=size, years=years,
                               qa_dir=os.path.join(folder, "stack", "qa"))
    path = os.path.join(folder, "job.toml")
    with open(path, "w") as f:
        f.write(JOB.format(lam=lam, extra=extra))
    return path


def small_dated_job(folder, more_steps=""):
    """A job in `folder` filling three invented 4 x 4 px composites of January-February 2021
    (step 'fill'), then `more_steps`; returns the job file's path."""
    os.makedirs(os.path.join(folder, "layers"))
    for day in (1, 17, 33):
        date = datetime.date(2021, 1, 1) + datetime.timedelta(days=day - 1)
        kt.write_raster(os.path.join(folder, "layers", "ndvi_%s.tif" % date.isoformat()),
                        np.full((4, 4), 0.5, np.float32), geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
    job = write_job(folder,
                    '[job]\nout = "out"\n[inputs.ndvi]\nstack = "layers/*.tif"\n[[step]]\nid = "fill"\ndo = "fill"\n'
                    'input = "ndvi"\n' + more_steps)
    return job


def write_job(folder, text):
    """Writes `text` to folder/job.toml; returns its path."""
    path = os.path.join(folder, "job.toml")
    with open(path, "w") as f:
        f.write(text)
    return path


def edit_job(job, old, new):
    """Replaces `old` by `new` in the job file (a user editing it between runs)."""
    with open(job) as f:
        text = f.read()
    assert old in text, old
    with open(job, "w") as f:
        f.write(text.replace(old, new))


def run(job, *args, env=None, preexec=None, timeout=300):
    return subprocess.run([kt.KALENDS_BIN, "run", job] + list(args), capture_output=True, text=True,
                          timeout=timeout, env=env, preexec_fn=preexec)


def run_until_a_step_starts(args, log):
    """Starts `kalends ARGS --log json` writing to `log`; returns the process once a step has
    started (or the run ended, or two minutes passed)."""
    with open(log, "w") as f:
        process = subprocess.Popen([kt.KALENDS_BIN] + args + ["--log", "json"], stdout=f, stderr=subprocess.PIPE,
                                   text=True)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and process.poll() is None:
        with open(log) as f:
            if '"step_started"' in f.read():
                break
        time.sleep(0.005)
    return process


def content(out):
    """Everything a user reads from the outputs: {relative path: (metadata, descriptions, pixels)}.
    Provenance metadata names files inside the output folder; those names are written relative
    to it here, so that runs into two folders can be compared."""
    g = kt.gdal()
    result = {}
    for path in sorted(glob.glob(os.path.join(out, "**", "*"), recursive=True)):
        rel = os.path.relpath(path, out)
        if os.path.isdir(path) or rel.startswith(".kalends"):
            continue
        if path.endswith(".tif"):
            ds = g.Open(path)
            bands = [ds.GetRasterBand(b) for b in range(1, ds.RasterCount + 1)]
            metadata = sorted((k, v.replace(os.path.abspath(out), "<out>").replace(out, "<out>"))
                              for k, v in ds.GetMetadata().items())
            result[rel] = (metadata, [b.GetDescription() for b in bands],
                           ds.ReadAsArray().tobytes())
        else:
            with open(path, "rb") as f:
                result[rel] = f.read().replace(os.path.abspath(out).encode(), b"<out>")
    return result


def mtimes(out):
    return {p: os.stat(p).st_mtime_ns for p in glob.glob(os.path.join(out, "**", "*.tif"), recursive=True)}


class JobFile(kt.TempDirTestCase):
    def check_refused(self, text, expected_line, words):
        path = os.path.join(self.tmp, "bad.toml")
        with open(path, "w") as f:
            f.write(text)
        done = run(path)
        self.assertEqual(done.returncode, 2, done.stderr)
        lines = done.stderr.strip().splitlines()
        self.assertEqual(len(lines), 1, done.stderr)
        print("\n  " + lines[0])
        self.assertIn("bad.toml:%d" % expected_line if expected_line else "bad.toml", lines[0])
        for w in words:
            self.assertIn(w, lines[0])

    def test_a_budget_too_small_names_the_job_key_and_what_would_do(self):
        # A spacetime fill and a seasons step (which had said only "give more memory"); exit 2,
        # as for a bad option, and the budget named then runs.
        folder = os.path.join(self.tmp, "small")
        make_job(folder)
        job = os.path.join(folder, "small.toml")
        for step in ('id = "fill"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\n',
                     'id = "seasons"\ndo = "seasons"\ninput = "ndvi"\n'):
            text = ('[job]\nout = "out"\nmemory = "{}"\nthreads = 2\n\n[inputs.ndvi]\n'
                    'stack = "stack/ndvi/ndvi_*.tif"\n\n[[step]]\n' + step)
            with open(job, "w") as f:
                f.write(text.format("8M"))
            done = run(job)
            self.assertEqual(done.returncode, 2, done.stderr)
            line = done.stderr.strip().splitlines()[-1]
            # The key's line: a job file may be long.
            self.assertRegex(line, r"small\.toml:3: \[job\] memory: (step 'fill': )?budget of 8 MiB is too small")
            need = re.search(r"(\d+) MiB would do", line).group(1)
            with open(job, "w") as f:
                f.write(text.format(need + "M"))
            done = run(job)
            self.assertEqual(done.returncode, 0, done.stderr)

    def test_a_later_steps_budget_is_checked_before_the_first_step_runs(self):
        # A budget that holds a Whittaker fill's block but not a spacetime fill's, whose halo
        # makes its block larger (110 MiB; 101 would do for Whittaker and 132 for spacetime at
        # 0.3.15): the run, --dry-run and `kalends plan` all refuse the later step at once, naming
        # it; the first step had run for its whole time before the run reached the second (and
        # every array task of a plan failed the same way). The refused step fails alone: a step
        # that does not read it still runs (since 0.3.20; the refusal had stopped the whole job,
        # and the independent steps were "not reached" with no reason).
        folder = os.path.join(self.tmp, "later")
        make_job(folder, size=64)
        job = os.path.join(folder, "later.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\nthreads = 1\nmemory = "110M"\n\n[inputs.ndvi]\n'
                    'stack = "stack/ndvi/ndvi_*.tif"\n\n'
                    '[[step]]\nid = "smooth"\ndo = "fill"\ninput = "ndvi"\nmethod = "whittaker"\n\n'
                    '[[step]]\nid = "joint"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\n')
        out = os.path.join(folder, "out")
        for args in (["run", job, "--dry-run"], ["plan", job, "--shards", "1"], ["run", job]):
            done = subprocess.run([kt.KALENDS_BIN] + args, capture_output=True, text=True, timeout=300)
            self.assertEqual(done.returncode, 2, (args, done.stdout, done.stderr))
            line = done.stderr.strip().splitlines()[-1]
            self.assertRegex(line, r"later\.toml:4: \[job\] memory: step 'joint': budget of 110 MiB is too small "
                                   r"for one block .*; \d+ MiB would do", args)
            self.assertEqual(bool(glob.glob(os.path.join(out, "smooth", "*.tif"))), args[-1] == job, args)
            self.assertFalse(os.path.exists(os.path.join(out, ".kalends", "plan.tsv")), args)
            if args[0] == "run":
                self.assertRegex(done.stdout, r"joint +%s" % ("would fail" if "--dry-run" in args else "failed"), args)
        self.assertFalse(glob.glob(os.path.join(out, "joint", "*.tif")))
        # The refusal is the step's failure to `status` (exit 1 for a monitoring script), as it
        # was when the run reached the step.
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertEqual(status.returncode, 1, status.stdout)
        self.assertRegex(status.stdout, r"joint +fill +failed")
        # A damaged composite does not switch the check off: it is left out of it, as --skip-bad
        # leaves it out of the run.
        stack = os.path.join(folder, "stack", "ndvi")
        with open(os.path.join(stack, "ndvi_2099-01-01.tif"), "w") as f:
            f.write("not a raster")
        for args in (["run", job, "--dry-run", "--skip-bad"], ["run", job, "--skip-bad"]):
            done = subprocess.run([kt.KALENDS_BIN] + args, capture_output=True, text=True, timeout=300)
            self.assertEqual(done.returncode, 2, (args, done.stdout, done.stderr))
            self.assertIn("step 'joint': budget of 110 MiB is too small", done.stderr.strip().splitlines()[-1])
            self.assertFalse(glob.glob(os.path.join(out, "joint", "*.tif")), args)
        # Without --skip-bad the run would fail both steps, each on its own reason, and the dry
        # run says so (it had named the budget alone, and the first step "would run").
        done = subprocess.run([kt.KALENDS_BIN, "run", job, "--dry-run"], capture_output=True, text=True, timeout=300)
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertRegex(done.stdout, r"smooth +would fail +.*ndvi_2099-01-01\.tif")
        self.assertRegex(done.stdout, r"joint +would fail +.*budget of 110 MiB is too small")
        self.assertIn("2 steps failed", done.stderr)
        os.remove(os.path.join(stack, "ndvi_2099-01-01.tif"))
        # The default budget is named as such when the file sets none.
        edit_job(job, 'memory = "110M"', 'name = "later"')
        # 1G holds the spacetime block of 64 x 64 px: both steps run.
        self.assertEqual(run(job).returncode, 0)

    def test_an_installed_plan_names_the_installed_array_script(self):
        # `cmake --install` puts the script in PREFIX/share/kalends: an installed kalends names
        # that one, not the build tree's (which a cluster node may never see).
        folder = os.path.join(self.tmp, "installed")
        job = make_job(folder, size=32)
        prefix = os.path.join(self.tmp, "prefix")
        os.makedirs(os.path.join(prefix, "bin"))
        os.makedirs(os.path.join(prefix, "share", "kalends"))
        program = os.path.join(prefix, "bin", "kalends")
        shutil.copy(kt.KALENDS_BIN, program)
        script = os.path.join(prefix, "share", "kalends", "kalends-array.sbatch")
        shutil.copy(os.path.join(kt.REPO_ROOT, "tools", "cluster", "kalends-array.sbatch"), script)
        done = subprocess.run([program, "plan", job, "--shards", "1", "-q"], capture_output=True, text=True)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn(" %s " % script, done.stdout)
        self.assertIn("KALENDS_BIN=%s" % program, done.stdout)
        # Without it, the source tree's script, which exists.
        os.remove(script)
        done = subprocess.run([program, "plan", job, "--shards", "1", "-q"], capture_output=True, text=True)
        self.assertEqual(done.returncode, 0, done.stderr)
        named = done.stdout.split()[-2]
        self.assertTrue(named.endswith("kalends-array.sbatch") and os.path.isfile(named), done.stdout)
        # ... and says so: a copy of the program outside its tree names a path nodes may not see.
        self.assertIn("note: the array script named is the source tree's", done.stderr)
        done = subprocess.run([kt.KALENDS_BIN, "plan", job, "--shards", "1", "-q"], capture_output=True, text=True)
        self.assertNotIn("note:", done.stderr)

    def test_a_compare_step_takes_the_layer_set_by_name(self):
        # 'name' as compare's --name (it had been an unknown key): the set the seasons step
        # made is compared; another name is refused, naming the key and the sets the folder holds.
        folder = os.path.join(self.tmp, "compare-name")
        job = make_job(folder, years=2, size=32)
        with open(job) as f:
            text = f.read()
        for name, code in (("ndvi", 0), ("evi", 2)):
            with open(job, "w") as f:
                f.write(text.replace('do = "compare"\ninput = "seasons"', 'do = "compare"\ninput = "seasons"\nname = "%s"' % name))
            done = run(job)
            self.assertEqual(done.returncode, code, done.stdout + done.stderr)
            if code:
                self.assertIn("'name' 'evi': the folder holds no such layer set; it holds ndvi", done.stderr)
                self.assertNotIn("--name", done.stderr)

    def test_status_tells_an_interrupted_step_from_one_never_run(self):
        # A run killed while writing a step's first outputs leaves only hidden .partial files
        # (test_killed_at_random_moments...); status then says so rather than "never run".
        folder = os.path.join(self.tmp, "interrupted")
        job = make_job(folder, years=1, size=32)
        os.makedirs(os.path.join(folder, "out", "fill"))
        with open(os.path.join(folder, "out", "fill", ".ndvi_2021-01-01.tif.partial"), "wb") as f:
            f.write(b"II*\x00")
        done = kt.run_kalends(["status", job])
        self.assertEqual(done.returncode, 1, done.stderr)   # a step interrupted: for a monitoring script
        fill = [l for l in done.stdout.splitlines() if l.startswith("fill ")][0]
        self.assertIn("interrupted", fill)
        self.assertRegex(fill, r"^fill +fill +interrupted +a run stopped")   # the column holds the word
        later = [l for l in done.stdout.splitlines() if l.startswith("seasons ")]
        self.assertTrue(later and "never run" in later[0], done.stdout)
        # While a run holds the folder's lock (taken here as a run takes it), its steps are
        # "running", not stale or interrupted.
        import fcntl
        os.makedirs(os.path.join(folder, "out", ".kalends"))
        with open(os.path.join(folder, "out", ".kalends", "lock"), "w") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            lock.write("4242")
            lock.flush()
            done = kt.run_kalends(["status", job])
        self.assertEqual(done.returncode, 0, done.stderr)
        for line in done.stdout.splitlines():
            self.assertRegex(line, r"^\w+ +\w+ +running +a run \(pid 4242\) is going now; before it: never done")
        self.assertEqual(run(job).returncode, 0)
        # A run redoing the fill after a parameter change (its step marked running, as a run marks
        # it when it starts it): "before it" is that change. It had said "never done".
        with open(job) as f:
            text = f.read()
        self.assertIn('lambda = "auto"', text)
        with open(job, "w") as f:
            f.write(text.replace('lambda = "auto"', "lambda = 50", 1))
        database = sqlite3.connect(os.path.join(folder, "out", ".kalends", "state.sqlite"))
        database.execute("UPDATE steps SET status = 'running' WHERE id = 'fill'")
        database.commit()
        database.close()
        with open(os.path.join(folder, "out", ".kalends", "lock"), "w") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            lock.write("4243")
            lock.flush()
            done = kt.run_kalends(["status", job])
        fill = [l for l in done.stdout.splitlines() if l.startswith("fill ")][0]
        self.assertRegex(fill, r"running +a run \(pid 4243\) is going now; before it: stale \(lambda auto -> 50\)")
        with open(job, "w") as f:
            f.write(text)
        self.assertEqual(run(job).returncode, 0)
        self.assertEqual(glob.glob(os.path.join(folder, "out", "**", ".*.partial"), recursive=True), [])

    def test_mistakes_are_named_with_their_line(self):
        good = JOB.format(lam="auto", extra="")
        self.check_refused(good.replace("envelope =", "envelop ="), good.split("\n").index('envelope = "upper"') + 1,
                           ["unknown key 'envelop'"])
        self.check_refused(good.replace('memory = "256M"', "memory = 256"), 5, ["'memory' must be a string"])
        # Found by fuzzing: a whole number beyond an int had said only "kalends: stoi" (exit 1);
        # an integer that a double cannot hold exactly had been read as garbage ("stod"); an id
        # of another type had been taken as none (the step named after its kind).
        self.check_refused(good.replace('memory = "256M"', 'memory = "256M"\nthreads = 2147483648'), 6,
                           ["'threads' = 2147483648 is out of range"])
        self.check_refused(good.replace('lambda = "{lam}"'.format(lam="auto"), "lambda = 99999999999999999"),
                           good.split("\n").index('lambda = "auto"') + 1, ["'lambda': must be between"])
        self.check_refused(good.replace('id = "fill"', "id = 1.5"), good.split("\n").index('id = "fill"') + 1,
                           ["'id' must be text"])
        self.check_refused(good.replace('stack = "stack/ndvi/ndvi_*.tif"', 'stack = "stack/ndvi\\u0000/x/ndvi_*.tif"'),
                           good.split("\n").index('stack = "stack/ndvi/ndvi_*.tif"') + 1, ["'stack' holds a NUL character"])
        empty = good + '\n[[step]]\ndo = "extract"\ninput = []\npoints = "points.csv"\n'
        self.check_refused(empty, empty.split("\n").index("input = []") + 1, ["'input' names no input or step"])
        self.check_refused(good.replace('do = "compare"', 'do = "compere"'),
                           good.split("\n").index('do = "compare"') + 1, ["unknown step 'compere'"])
        self.check_refused(good.replace('input = "fill"', 'input = "fil"'),
                           good.split("\n").index('input = "fill"') + 1, ["'fil' is neither an input nor an earlier step"])
        self.check_refused(good.replace('do = "compare"\ninput = "seasons"', 'do = "compare"\ninput = "fill"'),
                           good.split("\n").index('do = "compare"') + 2,
                           ["'input' must name a 'seasons' step; 'fill' is a 'fill' step"])
        self.check_refused(good.replace("[job]", "[job"), 2, [])
        # No shell expands '~' in a job file: it had made a folder named '~' beside it.
        self.check_refused(good.replace('out = "out"', 'out = "~/nightly"'), 4,
                           ["'out' '~/nightly': '~' is not expanded in a job file"])
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "~")))
        self.check_refused(good.replace('memory = "256M"', 'memory = "256M"\nthreads = -2'), 6,
                           ["'threads' must be 0 (all cores) to 4096"])
        # As --threads: 5000 had been taken in a job file.
        self.check_refused(good.replace('memory = "256M"', 'memory = "256M"\nthreads = 5000'), 6,
                           ["'threads' must be 0 (all cores) to 4096"])
        self.check_refused(good.replace('valid_range = [-0.2, 1.0]', 'valid_range = [-0.2, 1.0]\nband = 0'), 7,
                           ["[inputs.ndvi]: bands are numbered from 1"])
        self.check_refused(good.replace("lambda = \"auto\"", "lambda = true"),
                           good.split("\n").index('lambda = "auto"') + 1, ["'lambda' must be a number or \"auto\""])
        # Keys, not the command's options, where the step's check names several (it had said
        # "--nir-band: reads the same band as --red").
        index = good + '\n[[step]]\nid = "i"\ndo = "index"\nred = "ndvi"\nnir = "ndvi"\n'
        self.check_refused(index, len(good.split("\n")) + 1,
                           ["step 'i': 'nir_band': reads the same band as 'red'"])

    def test_a_refused_job_file_and_a_held_folder_leave_json_in_a_json_log(self):
        # With --log json (the documented cron line sends stdout and stderr to one .jsonl file),
        # a job file the run cannot use still ends in one `finished` event naming the problem,
        # and nothing else is printed; it had printed only a plain line on stderr.
        good = JOB.format(lam="auto", extra="")
        folder = os.path.join(self.tmp, "json-refused")
        os.makedirs(folder)
        path = os.path.join(folder, "job.toml")
        with open(path, "w") as f:
            f.write(good.replace("envelope =", "envelop ="))
        done = run(path, "--log", "json")
        self.assertEqual(done.returncode, 2)
        self.assertEqual(done.stderr, "")
        events = [json.loads(line) for line in done.stdout.splitlines()]
        self.assertEqual(len(events), 1, done.stdout)
        self.assertEqual((events[0]["event"], events[0]["exit_code"]), ("finished", 2))
        self.assertIn("unknown key 'envelop'", events[0]["error"])

    def test_values_a_step_cannot_use_are_refused_when_the_file_is_read(self):
        # Before any step runs (and by --dry-run): a nightly run must not fail hours in.
        good = JOB.format(lam="auto", extra="")
        lines = good.split("\n")
        lam = lines.index('lambda = "auto"') + 1
        cases = [
            (good.replace('lambda = "auto"', 'lambda = "sometimes"'), lam, ["'lambda' must be a number or \"auto\""]),
            (good.replace('lambda = "auto"', "lambda = -3"), lam, ["'lambda'", "must be between 1e-6 and 1e10"]),
            (good.replace('lambda = "auto"', 'lambda = "auto"\nmax_gap = -10'), lam + 1, ["'max_gap'", "no limit"]),
            (good.replace('envelope = "upper"', 'envelope = "uper"'), lines.index('envelope = "upper"') + 1,
             ["'envelope' 'uper'", "none or upper"]),
            (good.replace('every = "1M"', 'every = "2W"'), lines.index('every = "1M"') + 1,
             ["'every' '2W'", "1M or a number of days"]),
            (good.replace('do = "seasons"\ninput = "fill"', 'do = "seasons"\ninput = "fill"\nperiod = "fortnight"'),
             lines.index('do = "seasons"') + 3, ["'period' 'fortnight'"]),
            (good.replace('every = "1M"', 'every = "1M"\ncompress = "zip"'), lines.index('every = "1M"') + 2,
             ["'compress'", "'zip'"]),
            (good.replace('memory = "256M"', 'memory = "lots"'), 5, ["'memory' = 'lots'", "512M or 2G"]),
            (good.replace('lambda = "auto"', 'lambda = "auto"\nharmonics = 2'), lam + 1,
             ["'harmonics'", "applies to the harmonic method only"]),
            (good.replace('valid_range = [-0.2, 1.0]', 'valid_range = [1.0, -0.2]'),
             lines.index('valid_range = [-0.2, 1.0]') + 1, ["'valid_range' = [1, -0.2]", "below the maximum"]),
            # A QA rule that cannot be parsed: it had stopped the run at the step reading the input.
            (good.replace('keep = "bits0-1 in 0,1"', 'keep = "bits0-1 on 0,1"'),
             lines.index('keep = "bits0-1 in 0,1"') + 1, ["'keep' 'bits0-1 on 0,1'", "expected 'in'"]),
            # A fill step's own rule too, and a rule with no QA stack to apply it to.
            (good.replace('every = "1M"', 'every = "1M"\nkeep = "bitz0-1 in 0"'), lines.index('every = "1M"') + 2,
             ["'keep' 'bitz0-1 in 0'"]),
            (good.replace('qa = "stack/qa/qa_*.tif"\n', ''), lines.index('[inputs.ndvi]') + 1,
             ["'keep' rule but no 'qa' stack"]),
            # A step's rule for an input without QA had been ignored (exit 0; the command refuses it).
            (good.replace('qa = "stack/qa/qa_*.tif"\nkeep = "bits0-1 in 0,1"\n', '')
                 .replace('every = "1M"', 'every = "1M"\nkeep = "bits0-1 in 0"'),
             lines.index('every = "1M"'), ["'keep': given, but the input 'ndvi' has no QA stack"]),
        ]
        n = len(lines)
        grid = '\n[[step]]\ndo = "grid"\nlayers = ["fill"]\ncrs = "EPSG:4326"\n'
        cases += [
            (good + grid + 'extent = ["1", "2", "three", "4"]\n', n + 5, ["'extent' 'three'", "expected a number"]),
            # Numbers are read as numbers are in other lists (they had been refused as 'an array of
            # strings'): the step's own check then sees them.
            (good + grid + 'extent = [5, 2, 1.5, 4]\n', n + 5, ["'extent'", "with XMIN < XMAX"]),
            (good + grid + 'extent = [1, 2, true, 4]\n', n + 5, ["'extent'", "an array of strings (or numbers)"]),
            (good + grid + 'resample = "avg"\n', n + 5, ["'resample' 'avg'", "average"]),
            # The command refuses each; the job file had taken them (or waited for the run).
            (good.replace('grid', '') + '\n[[step]]\ndo = "grid"\nlayers = []\ncrs = "EPSG:4326"\n', n + 3,
             ["'layers': names no step"]),
            (good.replace('input = "seasons"', 'input = "seasons"\ntop = -1'),
             lines.index('input = "seasons"') + 2, ["'top': must be 0..10000"]),
            (good + '\n[[step]]\ndo = "report"\nafter = ["fill"]\nmap_size = 0\n', n + 4,
             ["'map_size': between 16 and 4096"]),
            # A page in a folder that does not exist had failed only when the step ran.
            (good + '\n[[step]]\ndo = "report"\nafter = ["fill"]\nhtml = "no-such-folder/page.html"\n', n + 4,
             ["'html' ", "no-such-folder/page.html", "does not exist"]),
            (good + grid.replace("EPSG:4326", "EPSG:99999"), n + 4, ["'crs' 'EPSG:99999'", "not a CRS"]),
            (good + '\n[[step]]\ndo = "report"\nafter = ["fill"]\npixels = ["10 20", "ten 20"]\n', n + 4,
             ["'pixels' 'ten 20'", "COLUMN ROW"]),
            (good.replace('do = "seasons"\ninput = "fill"', 'do = "seasons"\ninput = "fill"\nprominence = 1.5'),
             lines.index('do = "seasons"') + 3, ["'prominence'", "strictly between 0 and 1"]),
            (good + '\n[[step]]\ndo = "suitability"\ntemperature = "fill"\nmodel = "window"\nwindow = [30.0, 20.0]\n',
             n + 5, ["'window'", "must be below"]),
            # Files a step reads and a points CRS: they had failed only when the step ran, after
            # the steps before it (and passed --dry-run).
            (good + grid + 'clip = "no-such-area.gpkg"\n', n + 5, ["'clip': no such file", "no-such-area.gpkg"]),
            (good + '\n[[step]]\ndo = "extract"\ninput = ["fill"]\npoints = "no-such-points.csv"\n', n + 4,
             ["'points': no such file", "no-such-points.csv"]),
            (good + '\n[[step]]\ndo = "extract"\ninput = ["fill"]\npoints = "bad.toml"\ncrs = "EPSG:999999"\n',
             n + 5, ["'crs' 'EPSG:999999'", "not a CRS"]),
            # A name with '../': a seasons step had written its layers outside its folder, a
            # fill step had passed --dry-run and failed when it ran.
            (good.replace('do = "seasons"\ninput = "fill"', 'do = "seasons"\ninput = "fill"\nname = "../../away"'),
             lines.index('do = "seasons"') + 3, ["name '../../away'", "must be a plain name"]),
            (good.replace('every = "1M"', 'every = "1M"\nname = "../x"'), lines.index('every = "1M"') + 2,
             ["name '../x'", "must be a plain name"]),
        ]
        with open(os.path.join(self.tmp, "sites.csv"), "w") as f:
            f.write("site,lon,lat\ns1,10,20\n")
        for text, line, words in cases:
            for extra in ([], ["--dry-run"]):
                with self.subTest(words=words, extra=extra):
                    path = os.path.join(self.tmp, "bad.toml")
                    with open(path, "w") as f:
                        f.write(text)
                    done = run(path, *extra)
                    self.assertEqual(done.returncode, 2, done.stderr)
                    message = done.stderr.strip().splitlines()
                    self.assertEqual(len(message), 1, done.stderr)
                    self.assertIn("bad.toml:%d:" % line, message[0])
                    for w in words:
                        self.assertIn(w, message[0])
                    self.assertFalse(os.path.exists(os.path.join(self.tmp, "out")), "a step ran")
        # A number written as a string is still a number: the file is read, and the dry run
        # goes on to the inputs (which this test does not make).
        path = os.path.join(self.tmp, "quoted.toml")
        with open(path, "w") as f:
            f.write(good.replace('lambda = "auto"', 'lambda = "10"'))
        done = run(path, "--dry-run")
        self.assertIn("no file matches this pattern", done.stderr)
        self.assertNotIn("lambda", done.stderr)


class CopiedOutputFolder(kt.TempDirTestCase):
    def test_a_copy_checks_its_own_files(self):
        # `cp -a out copy` and the job run into the copy: the state database recorded the first
        # folder's paths, so the copy's steps had counted as done while its own files were gone.
        job = small_dated_job(os.path.join(self.tmp, "j"), '[[step]]\nid = "seasons"\ndo = "seasons"\ninput = "fill"\n')
        out = os.path.join(self.tmp, "j", "out")
        first = run(job)
        self.assertEqual(first.returncode, 0, first.stdout + first.stderr)
        copy = os.path.join(self.tmp, "j", "copy")
        shutil.copytree(out, copy, symlinks=True)
        lost = sorted(glob.glob(os.path.join(copy, "seasons", "*_year_2021.tif")))[0]
        os.remove(lost)
        status = subprocess.run([kt.KALENDS_BIN, "status", job, "--out", copy], capture_output=True, text=True)
        self.assertIn("outputs recorded in another folder", status.stdout + status.stderr)
        again = run(job, "--out", copy)
        self.assertEqual(again.returncode, 0, again.stdout + again.stderr)
        self.assertRegex(again.stdout, r"seasons\s+ran")
        self.assertTrue(os.path.exists(lost))
        # Now the copy's own: nothing more to do.
        third = run(job, "--out", copy)
        self.assertIn("nothing new, nothing done", third.stdout)
        # The same folder through a symbolic link is no copy (it had been redone whole each time
        # the path changed between the link and the folder).
        link = os.path.join(self.tmp, "j", "link")
        os.symlink(copy, link)
        for out_dir in (link, copy, link):
            again = run(job, "--out", out_dir)
            self.assertIn("nothing new, nothing done", again.stdout, out_dir)


class YearsDropped(kt.TempDirTestCase):
    def test_a_seasons_step_counts_the_year_layers_it_removes(self):
        # years = "2021-2022" then "2022": the 2021 layers went with only a note; the step said
        # "0 removed" in its JSON (operations.md: removed files are counted).
        folder = os.path.join(self.tmp, "j")
        os.makedirs(os.path.join(folder, "layers"))
        for year in (2021, 2022):
            for day in range(1, 366, 16):
                date = datetime.date(year, 1, 1) + datetime.timedelta(days=day - 1)
                kt.write_raster(os.path.join(folder, "layers", "ndvi_%s.tif" % date.isoformat()),
                                np.full((4, 4), 0.3 + 0.001 * day, np.float32),
                                geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        job = os.path.join(folder, "job.toml")
        text = ('[job]\nout = "out"\n[inputs.ndvi]\nstack = "layers/*.tif"\n[[step]]\nid = "seasons"\n'
                'do = "seasons"\ninput = "ndvi"\nyears = "2021-2022"\n')
        with open(job, "w") as f:
            f.write(text)
        self.assertEqual(run(job).returncode, 0)
        before = set(os.listdir(os.path.join(folder, "out", "seasons")))
        with open(job, "w") as f:
            f.write(text.replace('"2021-2022"', '"2022"'))
        done = run(job, "--log", "json")
        self.assertEqual(done.returncode, 0, done.stderr)
        gone = before - set(os.listdir(os.path.join(folder, "out", "seasons")))
        self.assertTrue(gone and all("2021" in name for name in gone), gone)
        finished = [e for e in map(json.loads, done.stdout.splitlines()) if e["event"] == "step_finished"]
        self.assertEqual(finished[0]["removed"], len(gone))


class ReasonsNameTheChange(kt.TempDirTestCase):
    def test_a_changed_key_is_named_with_its_values(self):
        # The reason had been "parameters or program version changed" for any key, and "its
        # inputs changed" for an input's rule, whatever was edited.
        job = small_dated_job(os.path.join(self.tmp, "j"))
        with open(job) as f:
            text = f.read()
        self.assertEqual(run(job).returncode, 0)
        with open(job, "w") as f:
            f.write(text + 'lambda = "10"\n')
        done = run(job, "--dry-run")
        self.assertRegex(done.stdout, r"fill\s+would run\s+lambda 10 \(new\)")
        self.assertEqual(run(job).returncode, 0)
        with open(job, "w") as f:
            f.write(text.replace('stack = "layers/*.tif"', 'stack = "layers/*.tif"\nvalid_range = [-1, 1]')
                    + 'lambda = "20"\n')
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        for words in ("inputs.ndvi.valid_range maximum (none) -> 1", "inputs.ndvi.valid_range minimum (none) -> -1",
                      "lambda 10 -> 20"):
            self.assertIn(words, status.stdout)
        self.assertNotIn("its inputs changed", status.stdout)
        # Numbers as written (0.003 had read 0.0030000000000000001).
        self.assertEqual(run(job).returncode, 0)
        with open(job, "w") as f:
            f.write(text + "lambda = 0.003\n")
        self.assertIn("lambda 20 -> 0.003", run(job, "--dry-run").stdout)
        # Parameters left by a run whose fingerprint is not the one recorded (an earlier version
        # ran the step since): not used; the reason stays general rather than naming a wrong key.
        import sqlite3
        state = sqlite3.connect(os.path.join(self.tmp, "j", "out", ".kalends", "state.sqlite"))
        state.execute("UPDATE steps SET fingerprint = '0123456789abcdef:0123456789abcdef' WHERE id = 'fill'")
        state.commit()
        state.close()
        dry = run(job, "--dry-run").stdout
        self.assertIn("parameters or program version changed", dry)
        self.assertNotIn("lambda", dry)


class Incremental(kt.TempDirTestCase):
    def test_second_run_does_nothing_and_keeps_every_file(self):
        job = make_job(os.path.join(self.tmp, "a"))
        out = os.path.join(self.tmp, "a", "out")
        # A dry run of a job never run says what would run and makes nothing, not the folder.
        dry = run(job, "--dry-run")
        self.assertEqual(dry.returncode, 0, dry.stderr)
        self.assertRegex(dry.stdout, r"fill\s+would run\s+never run")
        self.assertFalse(os.path.exists(out))
        first = run(job)
        self.assertEqual(first.returncode, 0, first.stdout + first.stderr)
        before = mtimes(out)
        self.assertGreater(len(before), 10)
        t0 = time.monotonic()
        second = run(job)
        elapsed = time.monotonic() - t0
        self.assertEqual(second.returncode, 0, second.stderr)
        self.assertIn("nothing new, nothing done", second.stdout)
        # Said once per step (it had read "fill  up to date up to date").
        self.assertRegex(second.stdout, r"\n  fill\s+up to date\n")
        self.assertNotIn("up to date up to date", second.stdout)
        self.assertEqual(mtimes(out), before)
        print("\n  second run with nothing new: %.2f s" % elapsed)
        # A file touched but not changed is recognised by its checksum.
        first_input = sorted(glob.glob(os.path.join(self.tmp, "a", "stack", "ndvi", "*.tif")))[0]
        os.utime(first_input, None)
        third = run(job)
        self.assertIn("nothing new, nothing done", third.stdout)
        # A rerun of compare counts as written the files it changed and as unchanged those it kept
        # with their time (it had counted every file as written, and rewritten its class raster
        # with the same bytes).
        edit_job(job, "valid_range = [-0.2, 1.0]", "valid_range = [-0.2, 1.5]")
        compare_files = [p for p in glob.glob(os.path.join(out, "compare", "*")) if os.path.isfile(p)]
        self.assertEqual(len(compare_files), 3)
        times = {p: os.stat(p).st_mtime_ns for p in compare_files}
        ranged = run(job)
        self.assertEqual(ranged.returncode, 0, ranged.stdout + ranged.stderr)
        counts = re.search(r"compare\s+ran\s.* (\d+) files? written, (\d+) unchanged", ranged.stdout)
        self.assertIsNotNone(counts, ranged.stdout)
        changed = sum(os.stat(p).st_mtime_ns != t for p, t in times.items())
        self.assertEqual((int(counts.group(1)), int(counts.group(2))), (changed, 3 - changed))
        self.assertEqual(os.stat(os.path.join(out, "compare", "ndvi_year_specific_class.tif")).st_mtime_ns,
                         times[os.path.join(out, "compare", "ndvi_year_specific_class.tif")])
        edit_job(job, "valid_range = [-0.2, 1.5]", "valid_range = [-0.2, 1.0]")
        self.assertEqual(run(job).returncode, 0)
        # A file replaced by one of the same size whose modification time was set back (cp -p,
        # rsync -t, touch -r): the cached checksum had been kept, and the change never seen.
        replaced = sorted(glob.glob(os.path.join(self.tmp, "a", "stack", "ndvi", "*.tif")))[1]
        stamp = os.stat(replaced)
        dataset = kt.gdal().Open(replaced, 1)
        band = dataset.GetRasterBand(1)
        band.WriteArray(band.ReadAsArray()[::-1].copy())   # the same values, rows upside down
        dataset = band = None
        self.assertEqual(os.stat(replaced).st_size, stamp.st_size)
        os.utime(replaced, ns=(stamp.st_atime_ns, stamp.st_mtime_ns))
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertIn("1 changed", [l for l in status.stdout.splitlines() if l.startswith("fill")][0])
        self.assertRegex(run(job).stdout, r"fill\s+ran")
        before = mtimes(out)
        # A changed parameter reruns the steps it reaches; dry run says so first.
        make_job(os.path.join(self.tmp, "a"), lam="100")
        dry = run(job, "--dry-run")
        self.assertIn("would run", dry.stdout)
        self.assertIn("lambda auto -> 100", dry.stdout)  # the key and its values, named
        self.assertEqual(mtimes(out), before)
        fourth = run(job)
        self.assertEqual(fourth.returncode, 0, fourth.stderr)
        self.assertRegex(fourth.stdout, r"fill\s+ran")
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertEqual([l.split()[2] for l in status.stdout.splitlines()], ["done", "done", "done"])

    def assert_same_as_from_scratch(self, job, out, scratch_out):
        """The job's outputs in `out` are what a run from scratch into `scratch_out` writes."""
        incremental = content(out)
        scratch = run(job, "--out", scratch_out)
        self.assertEqual(scratch.returncode, 0, scratch.stderr)
        fresh = content(scratch_out)
        self.assertEqual(sorted(incremental), sorted(fresh))
        for key in fresh:
            self.assertEqual(incremental[key], fresh[key], key)

    def test_adding_composites_one_at_a_time_equals_a_run_from_scratch(self):
        # With a reach of 120 days each year is filled from the dates within 120 days of it, so
        # composites arriving in late 2022 recompute 2022 (and 2023) but leave 2021 alone.
        folder = os.path.join(self.tmp, "b")
        job = make_job(folder, extra="reach = 120")
        source = os.path.join(folder, "stack")
        arrived = os.path.join(folder, "arrived")
        files = sorted(glob.glob(os.path.join(source, "ndvi", "ndvi_*.tif")))
        live = os.path.join(folder, "live")
        os.makedirs(os.path.join(live, "ndvi"))
        os.makedirs(os.path.join(live, "qa"))
        with open(job) as f:
            text = f.read().replace('"stack/', '"live/')
        with open(job, "w") as f:
            f.write(text)
        # The last three composites arrive one night at a time.
        for path in files[:-3]:
            name = os.path.basename(path)
            shutil.copy(path, os.path.join(live, "ndvi", name))
            shutil.copy(os.path.join(source, "qa", name.replace("ndvi_", "qa_")), os.path.join(live, "qa"))
        self.assertEqual(run(job).returncode, 0)
        out = os.path.join(folder, "out")
        first_year = {p: t for p, t in mtimes(out).items() if "2021-" in os.path.basename(p)
                      and "/fill/" in p}
        self.assertGreater(len(first_year), 20)
        # Seasons: the year-specific layer of 2021 depends on 2021 alone, so it stays too.
        seasons_2021 = {p: t for p, t in mtimes(out).items() if os.path.basename(p).endswith("_year_2021.tif")}
        self.assertEqual(len(seasons_2021), 1)
        first_year.update(seasons_2021)
        for path in files[-3:]:
            name = os.path.basename(path)
            shutil.copy(path, os.path.join(live, "ndvi", name))
            shutil.copy(os.path.join(source, "qa", name.replace("ndvi_", "qa_")), os.path.join(live, "qa"))
            done = run(job)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertIn("2 new", done.stdout)   # the composite and its QA layer
            self.assertIn("recomputing the years it reaches: 2022", done.stdout)
            # 2021 too, whose cycle layer searches its peaks into 2022 (it had been left as it
            # was); not 2023, which has no data. 2021's year layer does not change and keeps its
            # file (below).
            self.assertIn("redoing the year layers of 2021, 2022 and the synoptic layers", done.stdout)
        now = mtimes(out)
        self.assertEqual({p: now[p] for p in first_year}, first_year)   # 2021 untouched
        self.assert_same_as_from_scratch(job, os.path.join(folder, "out"), os.path.join(folder, "scratch"))
        # Seasons limited to 2022: a composite of 2021 replaced redoes the fill's 2021 (and 2022,
        # within its reach), and the seasons step names only its own year; it had named 2021.
        edit_job(job, 'do = "seasons"\ninput = "fill"', 'do = "seasons"\ninput = "fill"\nyears = "2022-2022"')
        self.assertEqual(run(job).returncode, 0)
        replaced = os.path.join(live, "ndvi", os.path.basename(files[15]))
        self.assertIn("2021-", replaced)
        dataset = kt.gdal().Open(replaced, 1)
        band = dataset.GetRasterBand(1)
        band.WriteArray(band.ReadAsArray()[::-1].copy())
        dataset = band = None
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("recomputing the years it reaches: 2021", done.stdout)
        self.assertIn("redoing the year layers of 2022 and the synoptic layers", done.stdout)
        self.assertNotIn("year layers of 2021", done.stdout)

    def test_spacetime_by_year_adding_composites_equals_a_run_from_scratch(self):
        # spacetime with a reach of 400 days: each year learns its seasons from its slice of
        # the grid, 400 days on either side. A composite of mid-January 2023 then reaches 2021
        # too (its slice runs to 5 February 2023), not only the year before, but not 2020.
        folder = os.path.join(self.tmp, "st")
        source = os.path.join(folder, "stack")
        synth_stack.make_stack(source, width=40, height=40, start_year=2020, dates=3 * 23 + 2)
        files = sorted(glob.glob(os.path.join(source, "ndvi_*.tif")))
        self.assertIn("2023-01", os.path.basename(files[-1]))
        live = os.path.join(folder, "live")
        os.makedirs(live)
        job = write_job(folder, '[job]\nout = "out"\nmemory = "256M"\n\n[inputs.ndvi]\nstack = "live/ndvi_*.tif"\n\n'
                        '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\n'
                        'halo = 8\nreach = 400\n')
        for path in files[:-1]:
            shutil.copy(path, live)
        first = run(job)
        self.assertEqual(first.returncode, 0, first.stderr)
        out = os.path.join(folder, "out")
        year_2020 = {p: t for p, t in mtimes(out).items() if os.path.basename(p).startswith("ndvi_2020-")}
        self.assertEqual(len(year_2020), 23)
        shutil.copy(files[-1], live)
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("recomputing the years it reaches: 2021, 2022, 2023)", done.stdout)
        now = mtimes(out)
        self.assertEqual({p: now[p] for p in year_2020}, year_2020)   # 2020 untouched
        self.assert_same_as_from_scratch(job, out, os.path.join(folder, "scratch"))
        # Filled year by year, 2020 learns from its slice alone, so its gaps differ from a
        # whole-series fill's; its observed values (flag 0) pass through in both.
        whole = os.path.join(folder, "whole")
        done = subprocess.run([kt.KALENDS_BIN, "fill", os.path.join(live, "ndvi_*.tif"), "--method", "spacetime",
                               "--halo", "8", "--out", whole, "--quiet"], capture_output=True, text=True)
        self.assertEqual(done.returncode, 0, done.stderr)
        g = kt.gdal()
        name = os.path.basename(sorted(year_2020)[10])
        by_year = g.Open(os.path.join(out, "fill", name)).ReadAsArray()
        at_once = g.Open(os.path.join(whole, name)).ReadAsArray()
        observed = by_year[2] == 0
        self.assertTrue(observed.any() and (~observed).any())
        np.testing.assert_array_equal(by_year[0][observed], at_once[0][observed])
        self.assertGreater(np.abs(by_year[0][~observed] - at_once[0][~observed]).max(), 1e-4)


LST_JOB = """
[job]
out = "out"
memory = "256M"

[inputs.day]
stack = "live/day/lst_day_*.tif"

[inputs.night]
stack = "live/night/lst_night_*.tif"

[[step]]
id = "day_fill"
do = "fill"
input = "day"
method = "harmonic"
harmonics = 2
reach = 120

[[step]]
id = "night_fill"
do = "fill"
input = "night"
method = "harmonic"
harmonics = 2
reach = 120

[[step]]
do = "suitability"
day = "day_fill"
night = "night_fill"
"""


class JobWording(kt.TempDirTestCase):
    def test_a_step_that_failed_on_a_missing_input_folder_is_failed_to_status(self):
        # status had listed it 'stale' and exited 0, which a monitoring script reads as fine.
        job = os.path.join(self.tmp, "missing.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.u]\nstack = "missing/*.tif"\n[[step]]\nid = "fill"\ndo = "fill"\n'
                    'input = "u"\n')
        done = kt.run_kalends(["status", job])
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertRegex(done.stdout, r"^fill +fill +never run +an input cannot be read: .*missing")
        self.assertEqual(run(job).returncode, 2)
        done = kt.run_kalends(["status", job])
        self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
        self.assertRegex(done.stdout, r"^fill +fill +failed +.* UTC: .*missing/\*\.tif: no file matches this pattern")
        # Which input of the job file: its line and key.
        self.assertIn("(%s:4, [inputs.u] stack)" % job, done.stdout)

    def test_a_failed_step_stops_only_the_steps_that_read_it(self):
        # One step's bad input had left every later step of the night "not reached", the
        # independent ones too.
        folder = os.path.join(self.tmp, "independent")
        job = small_dated_job(folder, '[[step]]\nid = "broken"\ndo = "fill"\ninput = "bad"\n'
                                        '[[step]]\nid = "again"\ndo = "fill"\ninput = "broken"\n'
                                        '[[step]]\nid = "other"\ndo = "fill"\ninput = "ndvi"\nmethod = "harmonic"\n'
                                        '[[step]]\ndo = "report"\nafter = ["again", "other"]\n')
        with open(job, "a") as f:
            f.write('[inputs.bad]\nstack = "broken/*.tif"\n')
        os.makedirs(os.path.join(folder, "broken"))
        with open(os.path.join(folder, "broken", "ndvi_2021-01-01.tif"), "wb") as f:
            f.write(b"not a raster")
        done = run(job)
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        rows = {line.split()[0]: line for line in done.stdout.splitlines() if line.startswith("  ") and
                not line.startswith("  note")}
        self.assertRegex(rows["fill"], r"^  fill +ran ")
        self.assertRegex(rows["other"], r"^  other +ran ")
        self.assertRegex(rows["broken"], r"^  broken +failed +.*ndvi_2021-01-01.tif: cannot open")
        self.assertRegex(rows["again"], r"not reached +reads step 'broken', which failed")
        self.assertRegex(rows["report"], r"not reached +reads step 'again', which waits for failed step 'broken'")
        self.assertTrue(glob.glob(os.path.join(folder, "out", "other", "*.tif")))
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("ndvi_2021-01-01.tif: cannot open", done.stderr)
        status = kt.run_kalends(["status", job])
        self.assertEqual(status.returncode, 1, status.stdout)
        self.assertRegex(status.stdout, r"(?m)^other +fill +done ")
        self.assertRegex(status.stdout, r"(?m)^again +fill +never run +reads step 'broken', which failed")
        self.assertRegex(status.stdout, r"(?m)^report +report +never run +reads step 'again', which waits for "
                                        r"failed step 'broken'")
        # The same when the failed step's input folder is missing (the steps reading it cannot
        # be fingerprinted either: they had been "stale: an input cannot be read").
        os.rename(os.path.join(folder, "broken"), os.path.join(folder, "gone"))
        self.assertEqual(run(job).returncode, 2)
        status = kt.run_kalends(["status", job])
        self.assertRegex(status.stdout, r"(?m)^again +fill +never run +reads step 'broken', which failed$")
        self.assertRegex(status.stdout, r"(?m)^report +report +never run +reads step 'again', which waits for "
                                        r"failed step 'broken'$")
        os.rename(os.path.join(folder, "gone"), os.path.join(folder, "broken"))
        # Fixed, the next run does what waited and leaves the rest.
        for path in glob.glob(os.path.join(folder, "layers", "*.tif")):
            shutil.copy(path, os.path.join(folder, "broken"))
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        for step, action in (("fill", "up to date"), ("other", "up to date"), ("broken", "ran"), ("again", "ran"),
                             ("report", "ran")):
            self.assertRegex(done.stdout, r"(?m)^  %s +%s" % (step, action))

    def test_a_bad_survey_table_fails_its_step_alone_before_any_step_runs(self):
        # A bad row or column in the survey table had refused the whole job when the file was
        # read (every branch of the night undone) and `status` with it.
        folder = os.path.join(self.tmp, "survey")
        job = small_dated_job(folder, '[[step]]\ndo = "extract"\ninput = ["fill"]\npoints = "sites.csv"\n'
                                      '[[step]]\ndo = "report"\nafter = ["fill", "extract"]\n')
        with open(os.path.join(folder, "sites.csv"), "w") as f:
            f.write("site,lon,lat\ns1,30.015,-1.015\n")
        for extra in (["--dry-run"], []):
            done = run(job, *extra)
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            self.assertRegex(done.stdout, r"(?m)^  extract +%s +.*sites.csv: no column 'id' \('id_column'\); "
                                          r"the columns are: site, lon, lat$" % ("would fail" if extra else "failed"))
            self.assertRegex(done.stdout, r"(?m)^  report +not reached +reads step 'extract', which failed$")
            self.assertRegex(done.stdout, r"(?m)^  fill +%s " % ("would run" if extra else "ran"))
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertTrue(glob.glob(os.path.join(folder, "out", "fill", "*.tif")))
        status = kt.run_kalends(["status", job])
        self.assertEqual(status.returncode, 1, status.stdout + status.stderr)
        self.assertRegex(status.stdout, r"(?m)^extract +extract +failed +.*no column 'id'")
        self.assertRegex(status.stdout, r"(?m)^fill +fill +done ")
        # Fixed: the extract step and the report run, the fill is up to date.
        with open(os.path.join(folder, "sites.csv"), "w") as f:
            f.write("id,longitude,latitude,date\ns1,30.015,-1.015,2021-01-20\n")
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertRegex(done.stdout, r"(?m)^  fill +up to date$")
        self.assertRegex(done.stdout, r"(?m)^  extract +ran ")

    def test_a_folder_given_as_the_job_file_is_named_as_a_folder(self):
        # A folder (job.toml made by mkdir by mistake) had been read as an empty job: "no
        # [[step]]: nothing to do", which sends the user looking inside a file that is not there.
        folder = os.path.join(self.tmp, "job.toml")
        os.makedirs(folder)
        for command in (["run", folder], ["status", folder], ["plan", folder, "--shards", "2"]):
            done = subprocess.run([kt.KALENDS_BIN] + command, capture_output=True, text=True, timeout=60)
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            self.assertEqual(done.stderr.strip(), "kalends: %s: is a folder, not a job file" % folder)

    @unittest.skipUnless(hasattr(os, "geteuid") and os.geteuid() == 0 and shutil.which("setpriv"),
                         "needs root to run kalends as another user")
    def test_a_job_file_the_user_may_not_read_is_named_without_a_line(self):
        # It had said "job.toml:0: File could not be opened for reading": a line 0 to look for.
        job = os.path.join(self.tmp, "closed.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n')
        os.chmod(job, 0)
        os.chmod(self.tmp, 0o755)
        try:
            done = subprocess.run(["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", kt.KALENDS_BIN,
                                   "run", job], capture_output=True, text=True, timeout=60)
        finally:
            os.chmod(self.tmp, 0o700)
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: %s: cannot read the job file: Permission denied" % job)

    def test_an_unreadable_composite_is_named_with_the_reason_and_skipped_with_skip_bad(self):
        # "cannot read the file" had given no reason, and --skip-bad had not left it out.
        folder = os.path.join(self.tmp, "unreadable")
        job = small_dated_job(folder)
        for day in ("2021-01-01", "2021-01-17", "2021-02-02", "2021-02-18"):
            kt.write_raster(os.path.join(folder, "layers", "ndvi_%s.tif" % day), np.full((4, 4), 0.5, np.float32),
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        closed = os.path.join(folder, "layers", "ndvi_2021-02-18.tif")
        os.chmod(closed, 0)
        for path in (self.tmp, folder, os.path.join(folder, "layers")):
            os.chmod(path, 0o777)

        def as_nobody(*extra):
            return subprocess.run(["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", kt.KALENDS_BIN,
                                   "run", job] + list(extra), capture_output=True, text=True, timeout=120)
        try:
            done = as_nobody()
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            self.assertIn("%s: cannot read the file: Permission denied" % closed, done.stderr)
            done = as_nobody("--skip-bad")
            self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
            self.assertIn("skipped input: %s: cannot read the file: Permission denied" % closed, done.stdout)
            # status and the next --skip-bad run know it left out and unchanged (status had said
            # "stale: an input cannot be read", and not listed it).
            status = subprocess.run(["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", kt.KALENDS_BIN,
                                     "status", job], capture_output=True, text=True, timeout=60)
            self.assertEqual(status.returncode, 0, status.stdout + status.stderr)
            self.assertRegex(status.stdout, r"(?m)^fill +fill +done ")
            self.assertRegex(status.stdout, r"(?m)^input +bad +left out +%s: cannot read" % re.escape(closed))
            done = as_nobody("--skip-bad")
            self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
            self.assertRegex(done.stdout, r"(?m)^  fill +up to date$")
        finally:
            os.chmod(self.tmp, 0o700)

    def test_a_unit_error_names_the_steps_key_not_an_option(self):
        # Temperatures without a unit label: the advice had been "give --units kelvin or --units
        # celsius", an option a job file does not take.
        folder = os.path.join(self.tmp, "job")
        os.makedirs(os.path.join(folder, "temp"))
        for day in (1, 9, 17):
            kt.write_raster(os.path.join(folder, "temp", "t_2021-03-%02d.tif" % day), np.full((4, 4), 24.0, np.float32),
                            geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        job = os.path.join(folder, "job.toml")

        def refused(step):
            """The job with a suitability step of `step`'s keys, run: refused, exit 2."""
            with open(job, "w") as f:
                f.write('[job]\nout = "out"\n\n[inputs.temp]\nstack = "temp/t_*.tif"\n\n'
                        '[[step]]\nid = "warmth"\ndo = "suitability"\n' + step)
            done = run(job)
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            return done

        done = refused('temperature = "temp"\nmodel = "window"\n')
        self.assertIn("states no unit", done.stderr)
        self.assertIn("set units = \"kelvin\" or \"celsius\" in step 'warmth'", done.stderr)
        self.assertNotIn("--units", done.stderr)
        # Overpass hours the wrong way round: named by the step's keys, not --day-time/--night-time.
        done = refused('day = "temp"\nnight = "temp"\nunits = "celsius"\nday_hour = 1.5\nnight_hour = 13.5\n')
        self.assertIn("'day_hour' 1.5 'night_hour' 13.5", done.stderr)
        self.assertIn("the day overpass must be the warm one", done.stderr)
        self.assertNotIn("--day-time", done.stderr)
        # An hour outside the day: named at its key's line (it had been the [[step]] line, with
        # the command's --day-time/--night-time).
        done = refused('day = "temp"\nnight = "temp"\nunits = "celsius"\nday_hour = 30\n')
        self.assertIn("job.toml:13: 'day_hour'/'night_hour': local solar hours must lie in [0, 24)", done.stderr)
        # The night hour alone: named at its own line too (it had been the [[step]] line).
        done = refused('day = "temp"\nnight = "temp"\nunits = "celsius"\nnight_hour = 25\n')
        self.assertIn("job.toml:13: 'day_hour'/'night_hour': local solar hours must lie in [0, 24)", done.stderr)
        done = refused('day = "temp"\nnight = "temp"\nunits = "celsius"\nnight_hour = 12.0\n')
        self.assertIn("job.toml:13: 'day_hour' 13.5 'night_hour' 12: the day overpass must be the warm one",
                      done.stderr)
        # The command line's name for the key: refused, saying what it is called here.
        done = refused('day = "temp"\nnight = "temp"\nunits = "celsius"\nday_time = 13.5\n')
        self.assertIn("unknown key 'day_time'", done.stderr)
        self.assertIn("the command line's --day-time is 'day_hour' here", done.stderr)
        # Temperatures a hundred times too large: the advice names the step's and input's keys.
        done = refused('temperature = "temp"\nunits = "kelvin"\n')
        self.assertIn("'temperature' %s" % os.path.join(folder, "temp", "t_*.tif"), done.stderr)
        self.assertIn("the unit ('units' of step 'warmth') or scale factor ('scale' of its input)", done.stderr)
        self.assertNotIn("--", done.stderr)
        # A scale of 0 under an input: refused at its line (it had named neither file nor line).
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.temp]\nstack = "temp/t_*.tif"\nscale = 0\n'
                    '[[step]]\nid = "warmth"\ndo = "suitability"\ntemperature = "temp"\nunits = "celsius"\n')
        done = run(job)
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn("job.toml:5: 'scale' = 0: a scale factor of 0 makes every value 0", done.stderr)


    def test_a_grid_steps_notes_are_shown_with_the_jobs_keys(self):
        # A grid step had dropped what `kalends grid` says: a layer without a value on the study
        # grid, and an extent moved to whole cells.
        folder = os.path.join(self.tmp, "gridjob")
        os.makedirs(os.path.join(folder, "layers"))
        kt.write_raster(os.path.join(folder, "layers", "ndvi_2021-03-01.tif"), np.full((10, 10), 0.5, np.float32),
                        geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        job = write_job(folder, '[job]\nout = "out"\n[inputs.layers]\nstack = "layers/*.tif"\n[[step]]\nid = "study"\n'
                        'do = "grid"\nlayers = ["layers"]\ncrs = "EPSG:4326"\nresolution = 0.03\n'
                        'extent = [30.0, -1.1, 30.1, -1.0]\n')
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertIn("note: 'extent' is not a whole number of 0.03 cells", done.stdout)
        self.assertIn("XMAX 30.1 to 30.09", done.stdout)
        self.assertNotIn("--extent", done.stdout + done.stderr)
        with open(job, "a") as f:
            f.write('[[step]]\nid = "beside"\ndo = "grid"\nlayers = ["layers"]\ncrs = "EPSG:4326"\n'
                    'resolution = 0.01\nextent = [40.0, -1.1, 40.1, -1.0]\n')
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertIn("note: 1 of 1 layers have no value on the study grid", done.stdout)

    def test_a_relative_out_is_recorded_as_the_folder_it_names(self):
        # Outputs record the files they were made from. A relative --out had been recorded as
        # typed ("relout/fill/*.tif"), so the same run gave other bytes for another spelling of
        # the folder, and the path could not be followed from elsewhere; the job file's `out`
        # was already made absolute.
        folder = os.path.join(self.tmp, "relative")
        small_dated_job(folder, '[[step]]\nid = "seasons"\ndo = "seasons"\ninput = "fill"\n')
        done = subprocess.run([kt.KALENDS_BIN, "run", "job.toml", "--out", "relout/", "-q"], cwd=folder,
                              capture_output=True, text=True, timeout=300)
        self.assertEqual(done.returncode, 0, done.stderr)
        g = kt.gdal()
        recorded = g.Open(os.path.join(folder, "relout", "seasons", "ndvi_synoptic_mean.tif")).GetMetadataItem(
            "KALENDS_INPUT")
        self.assertEqual(recorded, os.path.join(folder, "relout", "fill", "*.tif"))

    def test_a_deleted_output_is_named_and_not_counted(self):
        # status had said "outputs missing (3 files in its folder)" with 2 left, and named none.
        folder = os.path.join(self.tmp, "deleted")
        job = small_dated_job(folder)
        self.assertEqual(run(job).returncode, 0)
        outputs = sorted(glob.glob(os.path.join(folder, "out", "fill", "*")))
        os.remove(os.path.join(folder, "out", "fill", "ndvi_2021-01-17.tif"))
        done = kt.run_kalends(["status", job])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("stale       outputs missing: 1 of %d (first: fill/ndvi_2021-01-17.tif) (%d files in its folder)"
                      % (len(outputs), len(outputs) - 1), done.stdout)
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("outputs missing: 1 of %d (first: fill/ndvi_2021-01-17.tif)" % len(outputs), done.stdout)
        self.assertTrue(os.path.exists(os.path.join(folder, "out", "fill", "ndvi_2021-01-17.tif")))

class EditedJob(kt.TempDirTestCase):
    def test_outputs_the_job_no_longer_makes_are_not_read(self):
        # A monthly calendar and a seasons step, then the job edited: no 'every', another
        # lambda, the seasons step gone. The stale calendar (made with the old lambda) had stayed
        # in the fill folder and gone on into the survey table; the report showed the removed
        # step's layers. Now the calendar is removed and the report shows what 'after' names.
        folder = os.path.join(self.tmp, "edited")
        job = make_job(folder, lam="100", size=48)
        with open(job) as f:
            text = f.read()
        points = os.path.join(folder, "points.csv")
        g = kt.gdal()
        ds = g.Open(sorted(glob.glob(os.path.join(folder, "stack", "ndvi", "*.tif")))[0])
        x0, dx, _, y0, _, dy = ds.GetGeoTransform()
        ds = None
        with open(points, "w") as f:
            f.write("id,x,y,date\nA,%r,%r,2021-06-15\n" % (x0 + 10.5 * dx, y0 + 10.5 * dy))
        extra = ('[[step]]\nid = "extract"\ndo = "extract"\ninput = ["fill"]\npoints = "points.csv"\n'
                 'x_column = "x"\ny_column = "y"\ncrs = "EPSG:%d"\n' % synth_stack.EPSG +
                 '[[step]]\nid = "report"\ndo = "report"\nafter = ["fill", "seasons"]\n')
        with open(job, "w") as f:
            f.write(text + extra)
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        out = os.path.join(folder, "out")
        self.assertTrue(glob.glob(os.path.join(out, "fill", "calendar-1M", "*.tif")))
        with open(os.path.join(out, "extract", "table.csv")) as f:
            self.assertIn("fill.calendar-1M.ndvi", f.readline())
        with open(os.path.join(out, "report", "report.html")) as f:
            self.assertIn("seasons.ndvi_synoptic_mean", f.read())
        # The points file renamed, its content the same: extract runs again and leaves its table
        # as it was, which it had counted as written.
        os.rename(points, os.path.join(folder, "sites.csv"))
        with open(job, "w") as f:
            f.write(text + extra.replace('"points.csv"', '"sites.csv"'))
        table = os.stat(os.path.join(out, "extract", "table.csv")).st_mtime_ns
        done = run(job, "--log", "json")
        self.assertEqual(done.returncode, 0, done.stderr)
        finished = {e["step"]: e for e in map(json.loads, done.stdout.splitlines()) if e["event"] == "step_finished"}
        self.assertEqual(finished["extract"]["action"], "ran")
        self.assertEqual((finished["extract"]["written"], finished["extract"]["unchanged"]), (0, 1))
        self.assertEqual(os.stat(os.path.join(out, "extract", "table.csv")).st_mtime_ns, table)
        os.rename(os.path.join(folder, "sites.csv"), points)
        edited = text.replace('every = "1M"\n', "").replace('lambda = "100"', 'lambda = "1000"')
        edited = edited[:edited.index("[[step]]\ndo = \"seasons\"")]
        with open(job, "w") as f:
            f.write(edited + extra.replace('["fill", "seasons"]', '["fill"]'))
        done = run(job, "--log", "json")
        self.assertEqual(done.returncode, 0, done.stderr)
        # The fill no longer makes its calendar's files: each counted as removed.
        finished = {e["step"]: e for e in map(json.loads, done.stdout.splitlines()) if e["event"] == "step_finished"}
        self.assertGreater(finished["fill"]["removed"], 0)
        self.assertFalse(os.path.exists(os.path.join(out, "fill", "calendar-1M")))
        with open(os.path.join(out, "extract", "table.csv")) as f:
            self.assertNotIn("calendar", f.readline())
        with open(os.path.join(out, "report", "report.html")) as f:
            page = f.read()
        self.assertIn("fill.ndvi", page)
        self.assertNotIn("seasons.", page)
        self.assertTrue(os.path.isdir(os.path.join(out, "seasons")))  # left, not shown


class StaleReasons(kt.TempDirTestCase):
    def test_each_step_counts_its_own_new_changed_and_removed_files(self):
        # Two inputs, a fill each: one date added to both and one removed from the second.
        # Each step counts its own input's files; they had been added up over the whole job
        # ("2 new" for each step).
        source = kt.shared_path("alaska-ndvi", "masked30")
        folder = os.path.join(self.tmp, "reasons")
        for name in ("a", "b"):
            os.makedirs(os.path.join(folder, name))
            for path in sorted(glob.glob(os.path.join(source, "ndvi_200[45]*.tif"))):
                shutil.copy(path, os.path.join(folder, name))
        job = write_job(folder,
                        '[job]\nout = "out"\n[inputs.a]\nstack = "a/ndvi_*.tif"\n[inputs.b]\nstack = "b/ndvi_*.tif"\n'
                        '[[step]]\nid = "fill_a"\ndo = "fill"\ninput = "a"\n'
                        '[[step]]\nid = "fill_b"\ndo = "fill"\ninput = "b"\n')
        self.assertEqual(run(job, "-q").returncode, 0)
        for name in ("a", "b"):
            shutil.copy(os.path.join(source, "ndvi_2006-05-25.tif"), os.path.join(folder, name))
        os.remove(os.path.join(folder, "b", "ndvi_2004-05-24.tif"))
        for args in (("--dry-run",), ()):
            done = run(job, *args)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertRegex(done.stdout, r"fill_a +(would run|ran) +its inputs changed \(1 new, 0 changed files\)")
            self.assertRegex(done.stdout,
                             r"fill_b +(would run|ran) +its inputs changed \(1 new, 0 changed, 1 removed files\)")


class IndexStepCopiesQA(kt.TempDirTestCase):
    def test_the_qa_copies_count_among_the_files_written(self):
        # An index step copies each date's QA layer beside the index. A QA file changed alone
        # leaves every index raster the same, so the step had said "0 files written" while it
        # replaced a copy. Invented bands (mechanics only).
        folder = os.path.join(self.tmp, "bands")
        dates = ["2031-03-06", "2031-03-22", "2031-04-07"]
        rng = np.random.default_rng(5)
        for sub in ("red", "nir", "qa"):
            os.makedirs(os.path.join(folder, sub))
        for date in dates:
            kt.write_raster(os.path.join(folder, "red", "red_%s.tif" % date), rng.uniform(0.02, 0.1, (8, 8)).astype(np.float32))
            kt.write_raster(os.path.join(folder, "nir", "nir_%s.tif" % date), rng.uniform(0.2, 0.5, (8, 8)).astype(np.float32))
            kt.write_raster(os.path.join(folder, "qa", "qa_%s.tif" % date), np.zeros((8, 8), np.uint16))
        job = write_job(folder, '[job]\nout = "out"\n[inputs.red]\nstack = "red/red_*.tif"\nqa = "qa/qa_*.tif"\n'
                        'keep = "bit 0 == 0"\n[inputs.nir]\nstack = "nir/nir_*.tif"\n'
                        '[[step]]\ndo = "index"\nred = "red"\nnir = "nir"\n')

        def finished(done):
            self.assertEqual(done.returncode, 0, done.stderr)
            events = [json.loads(line) for line in done.stdout.splitlines()]
            return [e for e in events if e["event"] == "step_finished"][0]

        first = finished(run(job, "--log", "json"))
        self.assertEqual((first["written"], first["unchanged"]), (6, 0))   # three NDVI, three QA
        copy = os.path.join(folder, "out", "index", "qa", "qa_2031-03-22.tif")
        with open(copy, "rb") as f, open(os.path.join(folder, "qa", "qa_2031-03-22.tif"), "rb") as g:
            self.assertEqual(f.read(), g.read())
        kt.write_raster(os.path.join(folder, "qa", "qa_2031-03-22.tif"), np.ones((8, 8), np.uint16))
        second = finished(run(job, "--log", "json"))
        self.assertEqual((second["written"], second["unchanged"]), (1, 5))
        self.assertTrue(np.all(kt.gdal().Open(copy).ReadAsArray() == 1))


def write_monthly_ndvi(folder, count, seed, seen_once=False):
    """`count` invented monthly NDVI rasters of 6 x 6 px in folder/ndvi (2031-01 on); with
    `seen_once`, pixel (0, 0) is observed on the first date alone."""
    os.makedirs(os.path.join(folder, "ndvi"))
    rng = np.random.default_rng(seed)
    for k in range(count):
        values = rng.uniform(0.2, 0.6, (6, 6)).astype(np.float32)
        if seen_once and k > 0:
            values[0, 0] = np.nan
        kt.write_raster(os.path.join(folder, "ndvi", "ndvi_2031-%02d-01.tif" % (k + 1)), values)


class QuietRuns(kt.TempDirTestCase):
    def test_quiet_keeps_notes_and_errors_on_stderr_and_prints_no_summary(self):
        # -q is "only errors, notes on the data and cautions". A quiet run had dropped its
        # steps' notes, and a failed or partial one had printed the whole summary on stdout.
        # Invented data.
        folder = os.path.join(self.tmp, "quiet")
        write_monthly_ndvi(folder, 8, 5, seen_once=True)  # one pixel seen once: not fitted, and a note says so
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\n'
                        '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n')
        done = run(job, "-q")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(done.stdout, "")
        self.assertIn("note: fill: 1 pixels not fitted", done.stderr)
        # A damaged input: the error alone, on stderr.
        bad = os.path.join(folder, "ndvi", "ndvi_2031-09-01.tif")
        with open(bad, "wb") as f:
            f.write(b"II*\x00" + b"\x00" * 40)
        done = run(job, "-q")
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stdout, "")
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn(bad, done.stderr)
        # Left out with --skip-bad: named on stderr, no summary.
        done = run(job, "-q", "--skip-bad")
        self.assertEqual(done.returncode, 3, done.stderr)
        self.assertEqual(done.stdout, "")
        self.assertIn("skipped input: " + bad, done.stderr)


class LateQAPartner(kt.TempDirTestCase):
    def test_a_composite_left_out_for_its_missing_qa_is_read_once_the_qa_comes(self):
        # A value file arrives a night before its QA file. --skip-bad leaves it out (exit 3). The
        # next night the QA came, but the run left the value file out again, "unchanged since the
        # run that found it", every night after; a run from scratch reads it. Invented data.
        folder = os.path.join(self.tmp, "late-qa")
        dates = ["2031-03-06", "2031-03-22", "2031-04-07", "2031-04-23"]
        rng = np.random.default_rng(3)
        for sub in ("ndvi", "qa"):
            os.makedirs(os.path.join(folder, sub))
        for date in dates:
            kt.write_raster(os.path.join(folder, "ndvi", "ndvi_%s.tif" % date),
                            rng.uniform(0.2, 0.6, (6, 6)).astype(np.float32))
            if date != dates[-1]:
                kt.write_raster(os.path.join(folder, "qa", "qa_%s.tif" % date), np.zeros((6, 6), np.uint16))
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\nqa = "qa/qa_*.tif"\n'
                        'keep = "bit 0 == 0"\n[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n')
        last = os.path.join(folder, "out", "fill", "ndvi_%s.tif" % dates[-1])
        # Without --skip-bad the run fails the step on it, and a dry run says so first (it had
        # said "would run": version 0.3.22), changing nothing.
        for extra in (["--dry-run"], []):
            done = run(job, *extra)
            self.assertEqual(done.returncode, 2, (extra, done.stdout, done.stderr))
            self.assertRegex(done.stdout, r"fill +%s +.*ndvi_%s\.tif: no QA layer for %s"
                             % ("would fail" if extra else "failed", dates[-1], dates[-1]))
            self.assertFalse(os.path.exists(last))
        done = run(job, "--skip-bad")
        self.assertEqual(done.returncode, 3, done.stderr)
        self.assertIn("no QA layer for %s" % dates[-1], done.stdout + done.stderr)
        self.assertFalse(os.path.exists(last))
        # Still missing: left out again, without a word of new inputs.
        done = run(job, "--skip-bad")
        self.assertEqual(done.returncode, 3, done.stderr)
        self.assertIn("up to date", done.stdout)
        # The QA file comes: status and the run take the date.
        kt.write_raster(os.path.join(folder, "qa", "qa_%s.tif" % dates[-1]), np.zeros((6, 6), np.uint16))
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True, timeout=120)
        self.assertNotIn("left out", status.stdout)
        done = run(job, "--skip-bad")
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertNotIn("skipped input", done.stdout)
        self.assertTrue(os.path.exists(last))


    def test_a_dry_run_names_every_step_that_would_fail_on_a_missing_qa_file(self):
        # Two fill steps read one input, and an index step reads red and near-infrared bands
        # with their QA; one date's QA file is missing. The run fails all three; the dry run had
        # said so of the first fill step alone (the second was checked without the file), and of
        # no index step. Invented data.
        folder = os.path.join(self.tmp, "dry-qa")
        dates = ["2031-03-06", "2031-03-22", "2031-04-07", "2031-04-23"]
        rng = np.random.default_rng(4)
        for sub in ("ndvi", "qa", "bands"):
            os.makedirs(os.path.join(folder, sub))
        for date in dates:
            kt.write_raster(os.path.join(folder, "ndvi", "ndvi_%s.tif" % date), rng.uniform(0.2, 0.6, (6, 6)).astype(np.float32))
            kt.write_raster(os.path.join(folder, "bands", "red_%s.tif" % date), rng.uniform(0.02, 0.1, (6, 6)).astype(np.float32))
            kt.write_raster(os.path.join(folder, "bands", "nir_%s.tif" % date), rng.uniform(0.2, 0.4, (6, 6)).astype(np.float32))
            if date != dates[1]:
                kt.write_raster(os.path.join(folder, "qa", "qa_%s.tif" % date), np.zeros((6, 6), np.uint16))
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\nqa = "qa/qa_*.tif"\n'
                        'keep = "bit 0 == 0"\n[inputs.red]\nstack = "bands/red_*.tif"\nqa = "qa/qa_*.tif"\n'
                        'keep = "bit 0 == 0"\n[inputs.nir]\nstack = "bands/nir_*.tif"\n'
                        '[[step]]\nid = "one"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n'
                        '[[step]]\nid = "two"\ndo = "fill"\ninput = "ndvi"\nmethod = "harmonic"\n'
                        '[[step]]\nid = "index"\ndo = "index"\nred = "red"\nnir = "nir"\n')
        for extra in (["--dry-run"], []):
            done = run(job, *extra)
            self.assertEqual(done.returncode, 2, (extra, done.stdout, done.stderr))
            for step, file in (("one", "ndvi"), ("two", "ndvi"), ("index", "red")):
                self.assertRegex(done.stdout, r"(?m)^  %s +%s +.*%s_%s\.tif: no QA layer for %s"
                                 % (step, "would fail" if extra else "failed", file, dates[1], dates[1]))
        self.assertFalse(glob.glob(os.path.join(folder, "out", "*", "*.tif")))
        # A cluster plan refuses it too (every array task would fail on it), and plans without it
        # with --skip-bad.
        done = kt.run_kalends(["plan", job, "--shards", "1"])
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn("ndvi_%s.tif: no QA layer for %s" % (dates[1], dates[1]), done.stderr)
        self.assertIn("give --skip-bad to plan without it", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(folder, "out", ".kalends", "plan.tsv")))
        self.assertEqual(kt.run_kalends(["plan", job, "--shards", "1", "--skip-bad"]).returncode, 0)

    def test_a_qa_partner_dated_by_its_band_is_found_when_it_comes(self):
        # The QA stack one multi-band file dated by band descriptions (a NetCDF time axis is
        # the same case): no date in a file name, so the check for the partner had found none,
        # and the value file stayed out after the QA file gained its band. Invented data.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "band-qa")
        dates = ["2031-03-06", "2031-03-22", "2031-04-07", "2031-04-23"]
        os.makedirs(os.path.join(folder, "ndvi"))
        rng = np.random.default_rng(4)
        for date in dates:
            kt.write_raster(os.path.join(folder, "ndvi", "ndvi_%s.tif" % date),
                            rng.uniform(0.2, 0.6, (6, 6)).astype(np.float32))

        def write_qa(days):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "qa.tif"), 6, 6, len(days), g.GDT_UInt16)
            for k, day in enumerate(days):
                ds.GetRasterBand(k + 1).SetDescription(day)
                ds.GetRasterBand(k + 1).WriteArray(np.zeros((6, 6), np.uint16))
            ds = None
        write_qa(dates[:-1])
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\nqa = "qa.tif"\n'
                        'keep = "bit 0 == 0"\n[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n')
        done = run(job, "--skip-bad")
        self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
        write_qa(dates)
        done = run(job, "--skip-bad")
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertTrue(os.path.exists(os.path.join(folder, "out", "fill", "ndvi_%s.tif" % dates[-1])))


class IncrementalCountsOfRealGaps(kt.TempDirTestCase):
    def test_pixels_not_fitted_are_counted_for_every_year_after_a_partial_run(self):
        # The Alaska masked30 NDVI (real cloud patterns; data README): whittaker by year leaves
        # pixel-years with too few observations unfitted. Half the dates, then the rest: the
        # second run redoes only the years the new dates reach, and its fill-summary.json and
        # fill-years.tsv must equal a run from scratch. Its reasons had counted only the years
        # redone (189 pixel-years against 304). With spacetime's smoothing chosen by GCV per
        # block and year, the summary's "chosen" had kept only the years redone.
        source = kt.shared_path("alaska-ndvi", "masked30")
        files = sorted(glob.glob(os.path.join(source, "ndvi_*.tif")))
        for variant, method in (("whittaker", ""), ("spacetime", 'method = "spacetime"\nspace_smoothing = "auto"\n')):
            with self.subTest(method=variant):
                self.partial_run_equals_scratch(os.path.join(self.tmp, variant), files, method)

    def partial_run_equals_scratch(self, folder, files, method):
        runs = {}
        for label, first in (("nightly", files[:24]), ("scratch", files)):
            live = os.path.join(folder, label, "in")
            os.makedirs(live)
            for path in first:
                shutil.copy(path, live)
            job = os.path.join(folder, label, "job.toml")
            with open(job, "w") as f:
                f.write('[job]\nout = "out"\nthreads = 2\n[inputs.ndvi]\nstack = "in/ndvi_*.tif"\n[[step]]\n'
                        'id = "fill"\ndo = "fill"\ninput = "ndvi"\nreach = 183\n' + method)
            self.assertEqual(run(job, "-q").returncode, 0)
            if label == "nightly":
                for path in files[24:]:
                    shutil.copy(path, live)
                done = run(job)
                self.assertEqual(done.returncode, 0, done.stderr)
                self.assertIn("recomputing the years it reaches", done.stdout)
            runs[label] = os.path.join(folder, label, "out", "fill")
        summaries = []
        for label in ("nightly", "scratch"):
            with open(os.path.join(runs[label], "fill-summary.json")) as f:
                summary = json.load(f)
            summary.pop("input")
            summaries.append(summary)
        if method:
            self.assertEqual(sorted({c["year"] for c in summaries[1]["chosen"]}), list(range(2004, 2010)))
        else:
            self.assertGreater(sum(summaries[1]["series_not_fitted"].values()), 0)
        self.assertEqual(summaries[0], summaries[1])
        with open(os.path.join(runs["nightly"], "fill-years.tsv")) as a, \
                open(os.path.join(runs["scratch"], "fill-years.tsv")) as b:
            self.assertEqual(a.read(), b.read())


class IncrementalSuitability(kt.TempDirTestCase):
    def test_new_composites_redo_only_their_years_and_equal_scratch(self):
        # Invented LST (tools/synth_lst.py), 3 years: composites arriving in late 2023 redo
        # the 2023 year layers (not 2024's, which would have no data); 2021's stay, and the synoptic
        # layers, which take 2021 and 2022 from their files, equal a run from scratch.
        folder = os.path.join(self.tmp, "lst")
        done = subprocess.run(["/usr/bin/python3", os.path.join(kt.REPO_ROOT, "tools", "synth_lst.py"), "--out",
                               os.path.join(folder, "source"), "--width", "48", "--height", "40", "--years", "3",
                               "--quiet"], capture_output=True, text=True, timeout=120)
        self.assertEqual(done.returncode, 0, done.stderr)
        for kind in ("day", "night"):
            os.makedirs(os.path.join(folder, "live", kind))
        files = {kind: sorted(glob.glob(os.path.join(folder, "source", kind, "*.tif"))) for kind in ("day", "night")}
        job = write_job(folder, LST_JOB)
        def arrive(k):
            for kind in ("day", "night"):
                shutil.copy(files[kind][k], os.path.join(folder, "live", kind))
        for k in range(len(files["day"]) - 2):
            arrive(k)
        self.assertEqual(run(job).returncode, 0)
        out = os.path.join(folder, "out")
        kept = {p: t for p, t in mtimes(out).items() if "/suitability/" in p and "_2021" in os.path.basename(p)}
        self.assertEqual(len(kept), 2)  # year and summary layers of 2021
        for k in range(len(files["day"]) - 2, len(files["day"])):
            arrive(k)
            # The first quietly, as a cron job might: the caution still shows (on stderr), as
            # `kalends suitability -q` shows it; the second with a JSON log, which carries it.
            quiet = k == len(files["day"]) - 2
            done = run(job, "-q") if quiet else run(job, "--log", "json")
            self.assertEqual(done.returncode, 0, done.stderr)
            if quiet:
                self.assertEqual(done.stdout, "")
                self.assertEqual(done.stderr.count("not malaria risk"), 1, done.stderr)
            else:
                step = [json.loads(line) for line in done.stdout.splitlines() if '"step_finished"' in line][-1]
                self.assertIn("redoing the year layers of 2023 and the synoptic layers", step["reason"])  # no 2024
                self.assertIn("not malaria risk", step["caution"])
        now = mtimes(out)
        self.assertEqual({p: now[p] for p in kept}, kept)
        scratch = run(job, "--out", os.path.join(folder, "scratch"))
        self.assertEqual(scratch.returncode, 0, scratch.stderr)
        incremental = {k: v for k, v in content(out).items() if k.startswith("suitability")}
        fresh = {k: v for k, v in content(os.path.join(folder, "scratch")).items() if k.startswith("suitability")}
        self.assertEqual(sorted(incremental), sorted(fresh))
        for key in fresh:
            self.assertEqual(incremental[key], fresh[key], key)


class CycleOfTheYearBefore(kt.TempDirTestCase):
    def test_a_composite_of_january_redoes_the_cycle_of_the_year_before_last(self):
        # Fill by year (reach 120): January 2022 composites redo the fill's 2021 and 2022. The
        # seasons step redid those and the year after, but 2020's cycle searches its peaks into
        # 2021 too and was left as it was. (Here the old result happened to equal a run from
        # scratch: a new composite moves a whittaker fill little a year away. The redo follows
        # the dependency rather than that luck.) Invented data: a peak near 1 January.
        import datetime as dt
        folder = os.path.join(self.tmp, "january")
        live = os.path.join(folder, "ndvi")
        os.makedirs(live)
        rng = np.random.default_rng(8)
        dates = [dt.date(y, 1, 1) + dt.timedelta(days=d) for y in (2020, 2021, 2022) for d in range(0, 365, 16)]
        dates = [d for d in dates if d <= dt.date(2022, 2, 2)]
        shift = rng.normal(0, 15, (6, 6))
        arrays = {d: (0.45 + 0.25 * np.cos(2 * np.pi * (d.timetuple().tm_yday - 5 - shift) / 365)
                      + rng.normal(0, 0.04, (6, 6))).astype(np.float32) for d in dates}
        for d in dates[:-3]:
            kt.write_raster(os.path.join(live, "ndvi_%s.tif" % d.isoformat()), arrays[d])
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\n'
                        '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 30\nreach = 120\n'
                        '[[step]]\nid = "seasons"\ndo = "seasons"\ninput = "fill"\nperiod = "16d"\n')
        self.assertEqual(run(job).returncode, 0)
        for d in dates[-3:]:
            kt.write_raster(os.path.join(live, "ndvi_%s.tif" % d.isoformat()), arrays[d])
            done = run(job)
            self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("redoing the year layers of 2020, 2021, 2022", done.stdout)
        scratch = run(job, "--out", os.path.join(folder, "scratch"))
        self.assertEqual(scratch.returncode, 0, scratch.stderr)
        g = kt.gdal()
        for year in (2020, 2021):
            name = os.path.join("seasons", "ndvi_cycle_%d.tif" % year)
            mine = g.Open(os.path.join(folder, "out", name))
            fresh = g.Open(os.path.join(folder, "scratch", name))
            np.testing.assert_array_equal(mine.ReadAsArray(), fresh.ReadAsArray(), name)
            mine = fresh = None


class StoppedBetweenSteps(kt.TempDirTestCase):
    def test_a_run_stopped_after_the_fill_leaves_no_stale_year_layers(self):
        # Real MODIS NDVI (alaska-ndvi/observed, 2004-2006). Night 2 changes a 2005 composite and
        # stops after the fill (a job file with the fill step alone stands for a run killed
        # between the steps); night 3 brings a 2007 composite. The seasons step must then redo
        # 2005 too, not only the years the fill redid on night 3: its year layers had stayed
        # those of night 1 for good (up to 0.6 NDVI off).
        g = kt.gdal()
        source = kt.shared_path("alaska-ndvi", "observed")
        inputs = os.path.join(self.tmp, "inputs")
        os.makedirs(inputs)
        for path in sorted(glob.glob(os.path.join(source, "ndvi_200[456]-*.tif"))):
            shutil.copy(path, inputs)
        fill = ('[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nmethod = "whittaker"\nreach = 183\n')
        seasons = '[[step]]\nid = "seasons"\ndo = "seasons"\ninput = "fill"\nperiod = "16d"\n'
        head = '[job]\nout = "out"\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n'
        whole, fill_only = os.path.join(self.tmp, "job.toml"), os.path.join(self.tmp, "fill-only.toml")
        with open(whole, "w") as f:
            f.write(head + fill + seasons)
        with open(fill_only, "w") as f:
            f.write(head + fill)
        self.assertEqual(run(whole).returncode, 0)
        ds = g.Open(os.path.join(inputs, "ndvi_2005-08-13.tif"), g.GA_Update)
        a = ds.ReadAsArray()
        a[50:90, 50:90] *= 0.7
        ds.GetRasterBand(1).WriteArray(a)
        ds = None
        self.assertEqual(run(fill_only).returncode, 0)
        shutil.copy(os.path.join(source, "ndvi_2007-05-25.tif"), inputs)
        night3 = run(whole)
        self.assertEqual(night3.returncode, 0, night3.stderr)
        self.assertNotIn("redoing the year layers of 2006, 2007", night3.stdout)
        done = run(whole, "--out", os.path.join(self.tmp, "scratch"))
        self.assertEqual(done.returncode, 0, done.stderr)
        for name in ("ndvi_year_2005.tif", "ndvi_year_2006.tif", "ndvi_synoptic_mean.tif"):
            mine = g.Open(os.path.join(self.tmp, "out", "seasons", name)).ReadAsArray()
            fresh = g.Open(os.path.join(self.tmp, "scratch", "seasons", name)).ReadAsArray()
            np.testing.assert_array_equal(mine, fresh, name)


class OutputsOutsideTheStepFolder(kt.TempDirTestCase):
    def test_a_page_written_elsewhere_is_made_again_and_a_table_path_is_refused(self):
        # A report step's 'html' outside its folder was never recorded: deleted, the step stayed
        # "done" and the page never came back. An extract 'table' with a path ("../x.csv") was
        # written where the runner never looked; it is a file name in the step folder.
        folder = os.path.join(self.tmp, "elsewhere")
        write_monthly_ndvi(folder, 6, 2)
        head = ('[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\n'
                '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n')
        job = write_job(folder, head + '[[step]]\nid = "page"\ndo = "report"\nafter = ["fill"]\nhtml = "page.html"\n')
        self.assertEqual(run(job).returncode, 0)
        page = os.path.join(folder, "page.html")
        self.assertTrue(os.path.exists(page))
        os.remove(page)
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertRegex(status.stdout, r"page +report +stale +outputs missing")
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertTrue(os.path.exists(page))
        self.assertIn("nothing new", run(job).stdout)
        with open(job, "w") as f:
            f.write(head + '[[step]]\nid = "x"\ndo = "extract"\ninput = ["fill"]\npoints = "p.csv"\n'
                           'table = "../x.csv"\n')
        with open(os.path.join(folder, "p.csv"), "w") as f:
            f.write("id,x,y\na,1,1\n")
        done = run(job)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("'table' '../x.csv': is a file name in the step's folder", done.stderr)

    def test_an_output_folder_that_is_a_file_is_refused_before_anything(self):
        # It had failed at the lock file (exit 1), after a dry run that said every step would run.
        folder = os.path.join(self.tmp, "out-is-a-file")
        write_monthly_ndvi(folder, 6, 2)
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\n'
                                '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n')
        afile = os.path.join(folder, "afile.txt")
        with open(afile, "w") as f:
            f.write("mine\n")
        dangling = os.path.join(folder, "dangling")
        os.symlink(os.path.join(folder, "nowhere"), dangling)
        for extra in ([], ["--dry-run"]):
            done = run(job, "--out", afile, *extra)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn("--out '%s': is a file, not a folder" % afile, done.stderr)
            # A folder under a file, and a link to nothing: the same, where the lock file had
            # failed ("Not a directory", "File exists", exit 1) after a dry run that passed.
            done = run(job, "--out", os.path.join(afile, "sub"), *extra)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn("lies under %s, a file, not a folder" % afile, done.stderr)
            done = run(job, "--out", dangling, *extra)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn("is a symbolic link to a place that does not exist", done.stderr)
        with open(afile) as f:
            self.assertEqual(f.read(), "mine\n")

    def test_a_run_into_another_folder_leaves_the_jobs_own_page_alone(self):
        # `run --out OTHER` (a trial, a cluster's shards) had replaced the page 'html' names
        # beside the job's own folder, whose state still said "done": the page showed OTHER's
        # outputs for good. The page of such a run goes in its own step folder, with a note.
        folder = os.path.join(self.tmp, "other-out")
        write_monthly_ndvi(folder, 6, 2)
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "ndvi/ndvi_*.tif"\n'
                                '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n'
                                '[[step]]\nid = "page"\ndo = "report"\nafter = ["fill"]\nhtml = "page.html"\n')
        self.assertEqual(run(job).returncode, 0)
        page = os.path.join(folder, "page.html")
        with open(page, "rb") as f:
            before = f.read()
        other = os.path.join(self.tmp, "other-out-trial")
        done = run(job, "--out", other)
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page, "rb") as f:
            self.assertEqual(f.read(), before)
        moved = os.path.join(other, "page", "page.html")
        self.assertTrue(os.path.exists(moved), done.stderr)
        self.assertIn("lies outside the output folder --out gave", done.stdout + done.stderr)
        self.assertIn("nothing new", run(job).stdout)
        self.assertIn("nothing new", run(job, "--out", other).stdout)
        # The job's own folder by another name (a symbolic link) shares its state: the page
        # stays where the job says (it had gone into the link's folder, the job's state "done").
        link = os.path.join(self.tmp, "other-out-link")
        os.symlink(os.path.join(folder, "out"), link)
        os.remove(page)
        done = run(job, "--out", link)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertTrue(os.path.exists(page), done.stdout + done.stderr)
        self.assertNotIn("lies outside the output folder", done.stdout + done.stderr)


class OpenFilesLimit(kt.TempDirTestCase):
    def test_too_few_file_descriptors_is_no_bad_input(self):
        # A fill keeps each date's input and output open. Under a small open-files limit the
        # first file past it had been called damaged (exit 2), and --skip-bad left good
        # composites out for good. It is the machine's limit: exit 1, nothing left out, and the
        # message names the limit. Invented data, 60 dates.
        import resource
        folder = os.path.join(self.tmp, "descriptors")
        synth_stack.make_stack(os.path.join(folder, "stack", "ndvi"), width=8, height=8, start_year=2021, dates=60)
        job = write_job(folder, '[job]\nout = "out"\n[inputs.ndvi]\nstack = "stack/ndvi/ndvi_*.tif"\n'
                        '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\n')

        def limit():
            resource.setrlimit(resource.RLIMIT_NOFILE, (64, 64))

        for args in ([], ["--skip-bad"]):
            done = run(job, *args, preexec=limit)
            self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
            self.assertIn("too many files open at once (the limit, ulimit -n, is 64)", done.stdout + done.stderr)
            self.assertNotIn("skipped input", done.stdout)
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertEqual(len(glob.glob(os.path.join(folder, "out", "fill", "ndvi_*.tif"))), 60)


class IndexStepQaBand(kt.TempDirTestCase):
    def test_the_red_inputs_qa_band_is_passed_through(self):
        # Red files holding reflectance in band 1 and QA in band 2 (qa_band = 2): the index step
        # had passed band 1 through as the QA, so the fill masked every observation (exit 0).
        # Invented data: one cloudy row per date.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "qa-band")
        os.makedirs(os.path.join(folder, "r"))
        os.makedirs(os.path.join(folder, "n"))
        dates = ["2021-01-01", "2021-01-17", "2021-02-02", "2021-02-18"]
        for k, d in enumerate(dates):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "r", "red_%s.tif" % d), 8, 6, 2, g.GDT_Float32)
            ds.GetRasterBand(1).WriteArray(np.full((6, 8), 0.1, np.float32))
            qa = np.zeros((6, 8), np.float32)
            qa[k, :] = 1
            ds.GetRasterBand(2).WriteArray(qa)
            ds = None
            kt.write_raster(os.path.join(folder, "n", "nir_%s.tif" % d), np.full((6, 8), 0.4, np.float32))
        job = write_job(folder,
                        '[job]\nout = "out"\n[inputs.red]\nstack = "r/red_*.tif"\nqa = "r/red_*.tif"\nqa_band = 2\n'
                        'keep = "value == 0"\n[inputs.nir]\nstack = "n/nir_*.tif"\n'
                        '[[step]]\nid = "index"\ndo = "index"\nred = "red"\nnir = "nir"\n'
                        '[[step]]\nid = "fill"\ndo = "fill"\ninput = "index"\nkeep = "value == 0"\nlambda = 10\n')
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        summary = kt.read_summary(os.path.join(folder, "out", "fill"))
        self.assertEqual(summary["masked_by_qa"], 4 * 8)
        self.assertEqual(summary["observed"], 4 * 48 - 4 * 8)
        # Without its own 'keep', the fill takes the red input's rule with the QA the index passes
        # through: it had stopped for want of a rule written once already.
        edit_job(job, 'input = "index"\nkeep = "value == 0"\n', 'input = "index"\n')
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        summary = kt.read_summary(os.path.join(folder, "out", "fill"))
        self.assertEqual(summary["masked_by_qa"], 4 * 8)


class EachInputItsOwnRules(kt.TempDirTestCase):
    """A step of two inputs (day and night, red and NIR) reads each with its own [inputs.NAME]
    keys. Before, the last input's scale, offset and nodata were applied to both, and the other's
    were ignored without a word."""

    def lst(self, folder, base, seed, offset=None):
        rng = np.random.default_rng(seed)
        os.makedirs(os.path.join(self.tmp, folder))
        for doy in range(1, 366, 16):
            day = datetime.date(2018, 1, 1) + datetime.timedelta(days=doy - 1)
            kelvin = base + 8 * np.sin(2 * np.pi * (doy - 100) / 365) + rng.standard_normal((4, 4))
            # MODIS LST's convention: kelvin / 0.02 as uint16 (MOD11 user guide, from memory).
            kt.write_raster(os.path.join(self.tmp, folder, "lst_%s.tif" % day.isoformat()),
                            np.round(kelvin / 0.02).astype(np.uint16), geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01),
                            epsg=4326, scale=0.02, offset=offset, nodata=0)

    def suitability(self, name, day, day_keys="", night_keys=""):
        job = os.path.join(self.tmp, name + ".toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "%s"\nthreads = 1\n[inputs.day]\nstack = "%s/*.tif"\n%s\n'
                    '[inputs.night]\nstack = "night/*.tif"\n%s\n[[step]]\nid = "s"\ndo = "suitability"\n'
                    'day = "day"\nnight = "night"\nunits = "kelvin"\n' % (name, day, day_keys, night_keys))
        return run(job)

    def summary(self, name):
        return kt.gdal().Open(os.path.join(self.tmp, name, "s", "r0-2013_summary_2018.tif")).ReadAsArray()

    def test_day_and_night_each_with_their_own_offset(self):
        self.lst("day", 300.0, 2)
        self.lst("night", 288.0, 3)
        self.lst("day_offset", 300.0, 2, offset=-5.0)  # the same counts, the files' own offset
        for name, day, day_keys, night_keys in (("files", "day_offset", "", ""), ("day_key", "day", "offset = -5", ""),
                                                ("night_key", "day", "", "offset = -5")):
            done = self.suitability(name, day, day_keys, night_keys)
            self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        np.testing.assert_array_equal(self.summary("day_key"), self.summary("files"))
        # The night's offset moves the night alone: not what the day's would give.
        self.assertGreater(np.nanmax(np.abs(self.summary("night_key") - self.summary("files"))), 0.01)
        # A valid range that takes out every night value (kelvin given as deg C bounds): refused
        # naming a file, where it had been applied to neither input.
        done = self.suitability("range", "day", "", "valid_range = [1000, 2000]")
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertIn("night/lst_2018-01-01.tif: every value is outside the valid range 1000 to 2000", done.stderr)

    def test_red_and_nir_each_with_their_own_scale(self):
        rng = np.random.default_rng(5)
        for band in ("red", "nir"):
            os.makedirs(os.path.join(self.tmp, band))
        expected = {}
        for k in range(3):
            day = "2020-0%d-01" % (1 + k)
            red = rng.integers(300, 900, (4, 4)).astype(np.int16)
            nir = rng.integers(1500, 2500, (4, 4)).astype(np.int16)
            for band, counts in (("red", red), ("nir", nir)):
                kt.write_raster(os.path.join(self.tmp, band, "%s_%s.tif" % (band, day)), counts,
                                geotransform=(500000.0, 30, 0, 100000.0, 0, -30), epsg=32636)
            r, n = red * 0.0001, nir * 0.0002 + 0.01  # each band's own rule
            expected[day] = (n - r) / (n + r)  # NDVI (Rouse et al. 1974)
        job = os.path.join(self.tmp, "index.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.red]\nstack = "red/*.tif"\nscale = 0.0001\n'
                    '[inputs.nir]\nstack = "nir/*.tif"\nscale = 0.0002\noffset = 0.01\n'
                    '[[step]]\nid = "ndvi"\ndo = "index"\nred = "red"\nnir = "nir"\n')
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        for day, ndvi in expected.items():
            values = kt.gdal().Open(os.path.join(self.tmp, "out", "ndvi", "ndvi_%s.tif" % day)).ReadAsArray()
            np.testing.assert_allclose(values, ndvi, atol=1e-6)


class RemovedOutputs(kt.TempDirTestCase):
    def test_outputs_of_composites_withdrawn_are_counted_as_removed(self):
        # Composites withdrawn from the input: the fill removes their outputs, and the run's
        # summary (text and JSON) counts them; it had counted only files written and unchanged.
        source = kt.shared_path("alaska-ndvi", "observed")
        inputs = os.path.join(self.tmp, "inputs")
        os.makedirs(inputs)
        for path in sorted(glob.glob(os.path.join(source, "ndvi_2004-*.tif"))):
            shutil.copy(path, inputs)
        job = os.path.join(self.tmp, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n[[step]]\nid = "fill"\n'
                    'do = "fill"\ninput = "ndvi"\nmethod = "whittaker"\n')
        self.assertEqual(run(job).returncode, 0)
        withdrawn = sorted(glob.glob(os.path.join(inputs, "*.tif")))[-3:]
        for path in withdrawn:
            os.remove(path)
        done = run(job, "--log", "json")
        self.assertEqual(done.returncode, 0, done.stderr)
        step = [json.loads(l) for l in done.stdout.splitlines() if '"step_finished"' in l][0]
        self.assertEqual(step["removed"], 3)
        for path in withdrawn:
            self.assertFalse(os.path.exists(os.path.join(self.tmp, "out", "fill", os.path.basename(path))))
        shutil.copy(os.path.join(source, "ndvi_2005-05-25.tif"), inputs)
        os.remove(sorted(glob.glob(os.path.join(inputs, "*.tif")))[0])
        done = run(job)
        self.assertIn("1 removed (no longer made)", done.stdout)


    def test_a_copy_of_the_calendar_beside_it_is_kept(self):
        # calendar-1M.bak, the user's copy of the fill's calendar, had been emptied by the next
        # whole rerun (its files carry the step's name in their metadata).
        folder = os.path.join(self.tmp, "calendar-copy")
        job = small_dated_job(folder)
        with open(job, "a") as f:
            f.write('every = "1M"\nmethod = "whittaker"\nlambda = 1\n')
        self.assertEqual(run(job).returncode, 0)
        calendar = os.path.join(folder, "out", "fill", "calendar-1M")
        shutil.copytree(calendar, calendar + ".bak")
        kept = sorted(os.listdir(calendar + ".bak"))
        self.assertTrue(kept)
        edit_job(job, "lambda = 1", "lambda = 2")
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertEqual(sorted(os.listdir(calendar + ".bak")), kept)

    def test_a_renamed_steps_old_files_are_removed_and_not_read(self):
        # An index step changed from NDVI to EVI (and a fill renamed) had left the old name's
        # files beside the new: the fill reading it then failed on "duplicate date", and a
        # renamed fill's old files stayed as if current. Invented bands, mechanics only.
        folder = os.path.join(self.tmp, "renamed")
        os.makedirs(os.path.join(folder, "bands"))
        rng = np.random.default_rng(3)
        for day in (1, 17, 33, 49):
            date = (datetime.date(2021, 1, 1) + datetime.timedelta(days=day - 1)).isoformat()
            for band, level in (("red", 0.05), ("nir", 0.3), ("blue", 0.03)):
                kt.write_raster(os.path.join(folder, "bands", "%s_%s.tif" % (band, date)),
                                (level + 0.02 * rng.random((6, 6))).astype(np.float32),
                                geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        text = ('[job]\nout = "{out}"\n[inputs.red]\nstack = "bands/red_*.tif"\n[inputs.nir]\nstack = "bands/nir_*.tif"\n'
                '[inputs.blue]\nstack = "bands/blue_*.tif"\n[[step]]\nid = "vi"\ndo = "index"\nred = "red"\n'
                'nir = "nir"\nblue = "blue"\nindex = "{index}"\n[[step]]\ndo = "fill"\ninput = "vi"\n{name}')
        job = os.path.join(folder, "job.toml")
        for index, name in (("ndvi", ""), ("evi", ""), ("evi", 'name = "greenness"\n')):
            with open(job, "w") as f:
                f.write(text.format(out="out", index=index, name=name))
            done = run(job)
            self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertIn("4 removed (no longer made)", done.stdout)
        # Rasters of the user's in a step's folder stay: a mask of its own, and a backup copy of
        # an output in a subfolder (both had been removed as outputs no longer made).
        fill_folder = os.path.join(folder, "out", "fill")
        os.makedirs(os.path.join(fill_folder, "backup"))
        shutil.copy(sorted(glob.glob(os.path.join(fill_folder, "greenness_*.tif")))[0], os.path.join(fill_folder, "backup"))
        kt.write_raster(os.path.join(fill_folder, "my_mask.tif"), np.ones((6, 6), np.float32),
                        geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        for name in ('name = "other"\n', 'name = "greenness"\n'):
            with open(job, "w") as f:
                f.write(text.format(out="out", index="evi", name=name))
            self.assertEqual(run(job).returncode, 0)
        self.assertTrue(os.path.exists(os.path.join(fill_folder, "my_mask.tif")))
        self.assertEqual(len(glob.glob(os.path.join(fill_folder, "backup", "*.tif"))), 1)
        for extra in ("my_mask.tif", "backup"):
            shutil.move(os.path.join(fill_folder, extra), os.path.join(folder, extra))
        self.assertEqual(sorted(os.listdir(os.path.join(folder, "out", "vi"))),
                         ["evi_2021-01-01.tif", "evi_2021-01-17.tif", "evi_2021-02-02.tif", "evi_2021-02-18.tif"])
        self.assertEqual(sorted(glob.glob(os.path.join(folder, "out", "fill", "*.tif"))),
                         sorted(glob.glob(os.path.join(folder, "out", "fill", "greenness_*.tif"))))
        # The same as a run of the last job file from scratch.
        with open(job, "w") as f:
            f.write(text.format(out="scratch", index="evi", name='name = "greenness"\n'))
        self.assertEqual(run(job).returncode, 0)
        self.assertEqual(content(os.path.join(folder, "out")), content(os.path.join(folder, "scratch")))


class ReachAcrossTheWinter(kt.TempDirTestCase):
    def test_a_composite_after_the_winter_redoes_every_year_whose_slice_it_moves(self):
        # Real MODIS NDVI (alaska-ndvi/observed, summers of 2004-2006), then the first composite
        # of 2007. It lies more than D days from 2006's composites, but it lengthens the time
        # grid: every year whose slice reaches past the old last date gets new empty slots, and
        # its fill changes. Those years must be redone too, so that the result equals a run from
        # scratch (they had been left as they were: up to 0.015 NDVI off with spacetime).
        g = kt.gdal()
        source = kt.shared_path("alaska-ndvi", "observed")
        for reach, redone in ((60, "2006, 2007"), (730, "2004, 2005, 2006, 2007")):
            folder = os.path.join(self.tmp, "reach-%d" % reach)
            inputs = os.path.join(folder, "inputs")
            os.makedirs(inputs)
            for path in sorted(glob.glob(os.path.join(source, "ndvi_200[456]-*.tif"))):
                shutil.copy(path, inputs)
            job = write_job(folder,
                            '[job]\nout = "out"\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n[[step]]\nid = "fill"\n'
                            'do = "fill"\ninput = "ndvi"\nmethod = "whittaker"\nreach = %d\n' % reach)
            self.assertEqual(run(job).returncode, 0)
            shutil.copy(os.path.join(source, "ndvi_2007-05-25.tif"), inputs)
            done = run(job, "--log", "json")
            self.assertEqual(done.returncode, 0, done.stderr)
            fill = [e for e in map(json.loads, done.stdout.splitlines()) if e["event"] == "step_finished"][0]
            self.assertIn("recomputing the years it reaches: %s" % redone, fill["reason"])
            # The years not redone are left as they were and counted so: the counts add up to the
            # step's files (they had been in neither).
            files = [p for p in glob.glob(os.path.join(folder, "out", "fill", "**", "*"), recursive=True)
                     if os.path.isfile(p)]
            self.assertEqual(fill["written"] + fill["unchanged"], len(files))
            done = run(job, "--out", os.path.join(folder, "scratch"))
            self.assertEqual(done.returncode, 0, done.stderr)
            for path in sorted(glob.glob(os.path.join(folder, "out", "fill", "ndvi_*.tif"))):
                mine = g.Open(path).ReadAsArray()
                fresh = g.Open(path.replace(os.path.join(folder, "out"), os.path.join(folder, "scratch"))).ReadAsArray()
                np.testing.assert_array_equal(mine, fresh, "%s (reach %d)" % (path, reach))


    def test_a_composite_that_moves_the_seasons_end_redoes_every_years_calendar(self):
        # A calendar's periods depend on the days of the year some composite, of any year,
        # stands for (methods.md, "Regular calendar"). A composite of day 273 in 2006, later in
        # the season than any before, makes October a month of the season in every year and
        # lengthens every September; only 2006 had been redone, so the other years' September
        # and October files differed from a run from scratch (and never healed). Its withdrawal
        # the next night must undo it as well.
        g = kt.gdal()
        source = kt.shared_path("alaska-ndvi", "observed")
        folder = os.path.join(self.tmp, "season-end")
        inputs = os.path.join(folder, "inputs")
        os.makedirs(inputs)
        for path in sorted(glob.glob(os.path.join(source, "ndvi_200[456]-*.tif"))):
            shutil.copy(path, inputs)
        late = os.path.join(inputs, "ndvi_2006-09-30.tif")  # day 273: the 16-day phase of the stack
        job = write_job(folder,
                        '[job]\nout = "out"\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n[[step]]\nid = "fill"\n'
                        'do = "fill"\ninput = "ndvi"\nmethod = "whittaker"\nlambda = 100\nevery = "1M"\nreach = 183\n')
        self.assertEqual(run(job).returncode, 0)
        for night in ("arrives", "withdrawn"):
            if night == "arrives":
                g.Translate(late, os.path.join(source, "ndvi_2006-09-14.tif"))
            else:
                os.remove(late)
            done = run(job)
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertIn("recomputing every year", done.stdout)
            scratch = os.path.join(folder, "scratch-" + night)
            done = run(job, "--out", scratch)
            self.assertEqual(done.returncode, 0, done.stderr)
            mine_files = sorted(os.path.relpath(p, os.path.join(folder, "out", "fill"))
                                for p in glob.glob(os.path.join(folder, "out", "fill", "**", "*.tif"), recursive=True))
            fresh_files = sorted(os.path.relpath(p, os.path.join(scratch, "fill"))
                                 for p in glob.glob(os.path.join(scratch, "fill", "**", "*.tif"), recursive=True))
            self.assertEqual(mine_files, fresh_files, night)
            self.assertIn(os.path.join("calendar-1M", "ndvi_2004-10-01.tif"), mine_files)
            for name in mine_files:
                mine = g.Open(os.path.join(folder, "out", "fill", name))
                fresh = g.Open(os.path.join(scratch, "fill", name))
                np.testing.assert_array_equal(mine.ReadAsArray(), fresh.ReadAsArray(), "%s (%s)" % (name, night))
                self.assertEqual(mine.GetMetadataItem("KALENDS_PERIOD_DAYS_COVERED"),
                                 fresh.GetMetadataItem("KALENDS_PERIOD_DAYS_COVERED"), name)

class UnchangedMeansTheSameMetadata(kt.TempDirTestCase):
    def test_a_file_whose_band_metadata_moved_is_rewritten(self):
        # A composite of 30 September after one of 22 September (16-day median step) cuts the
        # earlier one to 8 days and gives the period of day 273 16 covered days instead of 8. A
        # seasons layer whose pixels stay the same (observed_2021: every value observed) had
        # been kept as "unchanged" with KALENDS_DAYS_COVERED 8: only pixels were compared.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "metadata")
        inputs = os.path.join(folder, "inputs")
        os.makedirs(inputs)
        dates = ["2021-05-01", "2021-05-17", "2021-06-02", "2021-06-18", "2021-07-04", "2021-07-20", "2021-08-05",
                 "2021-08-21", "2021-09-06", "2021-09-22"]
        rng = np.random.default_rng(3)
        for date in dates + ["2021-09-30"]:
            path = os.path.join(folder, date + ".tif")
            kt.write_raster(path, rng.uniform(0.2, 0.8, (6, 6)).astype(np.float32),
                            geotransform=(20.0, 0.01, 0, 1.0, 0, -0.01), epsg=4326)
        for date in dates:
            shutil.move(os.path.join(folder, date + ".tif"), os.path.join(inputs, "ndvi_%s.tif" % date))
        job = write_job(folder,
                        '[job]\nout = "out"\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n[[step]]\nid = "fill"\n'
                        'do = "fill"\ninput = "ndvi"\n[[step]]\nid = "seasons"\ndo = "seasons"\ninput = "fill"\n'
                        'period = "16d"\n')
        self.assertEqual(run(job).returncode, 0)
        shutil.move(os.path.join(folder, "2021-09-30.tif"), os.path.join(inputs, "ndvi_2021-09-30.tif"))
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        scratch = os.path.join(folder, "scratch")
        self.assertEqual(run(job, "--out", scratch).returncode, 0)
        names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(folder, "out", "seasons", "*.tif")))
        self.assertIn("ndvi_observed_2021.tif", names)
        for name in names:
            mine = g.Open(os.path.join(folder, "out", "seasons", name))
            fresh = g.Open(os.path.join(scratch, "seasons", name))
            for b in range(1, mine.RasterCount + 1):
                self.assertEqual(mine.GetRasterBand(b).GetMetadata(), fresh.GetRasterBand(b).GetMetadata(),
                                 "%s band %d" % (name, b))

class ArrivalsDuringARun(kt.TempDirTestCase):
    def test_a_composite_that_arrives_while_a_step_runs_is_new_to_the_next_run(self):
        # Real MODIS NDVI (alaska-ndvi/masked30). The last composite lands while the fill step
        # runs. The step recorded the files it read as listed at its end, the late one among
        # them, so the next run took it for read: its year was never redone, its output never
        # made, and status said done.
        source = kt.shared_path("alaska-ndvi", "masked30")
        folder = os.path.join(self.tmp, "late")
        inputs = os.path.join(folder, "inputs")
        os.makedirs(inputs)
        late = "ndvi_2009-09-14.tif"
        for path in sorted(glob.glob(os.path.join(source, "ndvi_*.tif"))):
            if os.path.basename(path) != late:
                shutil.copy(path, inputs)
        job = write_job(folder,
                        '[job]\nout = "out"\nthreads = 1\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n[[step]]\n'
                        'id = "fill"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\nreach = 183\n')
        log = os.path.join(folder, "run.jsonl")
        process = run_until_a_step_starts(["run", job], log)
        # Delivered whole, as a download tool renames a finished file: a copy in progress can be
        # read half-written (exit 2, "may be truncated"), which is another test's case.
        shutil.copy(os.path.join(source, late), os.path.join(inputs, ".arriving.partial"))
        os.replace(os.path.join(inputs, ".arriving.partial"), os.path.join(inputs, late))
        with open(log) as f:
            if '"step_finished"' in f.read():
                process.communicate(timeout=300)
                self.skipTest("the step ended before the composite arrived")
        _, stderr = process.communicate(timeout=300)
        with open(log) as f:
            self.assertEqual(process.returncode, 0, stderr + f.read())
        status = kt.run_kalends(["status", job])
        fill = [l for l in status.stdout.splitlines() if l.startswith("fill")][0]
        self.assertIn("stale", fill)
        self.assertIn("1 new", fill)
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("recomputing the years it reaches: 2009", done.stdout)
        self.assertTrue(os.path.exists(os.path.join(folder, "out", "fill", late)))
        self.assertEqual(run(job, "--out", os.path.join(folder, "scratch")).returncode, 0)
        g = kt.gdal()
        for path in sorted(glob.glob(os.path.join(folder, "scratch", "fill", "ndvi_*.tif"))):
            mine = g.Open(path.replace(os.path.join(folder, "scratch"), os.path.join(folder, "out"))).ReadAsArray()
            np.testing.assert_array_equal(mine, g.Open(path).ReadAsArray(), path)

    def test_a_composite_rewritten_while_a_step_reads_it_is_not_left_out_as_damaged(self):
        # With --skip-bad, a composite re-delivered in place during the run had been read half
        # written (or found replaced), called damaged and left out: its old outputs stayed, its
        # year was not redone, and the file was recorded as bad. It is a failure of the step now,
        # as without --skip-bad: nothing written, nothing recorded as skipped.
        source = kt.shared_path("alaska-ndvi", "masked30")
        folder = os.path.join(self.tmp, "redelivered")
        inputs = os.path.join(folder, "inputs")
        os.makedirs(inputs)
        for path in sorted(glob.glob(os.path.join(source, "ndvi_*.tif"))):
            shutil.copy(path, inputs)
        job = write_job(folder,
                        '[job]\nout = "out"\nthreads = 1\n[inputs.ndvi]\nstack = "inputs/ndvi_*.tif"\n[[step]]\n'
                        'id = "fill"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\n')
        log = os.path.join(folder, "run.jsonl")
        process = run_until_a_step_starts(["run", job, "--skip-bad"], log)
        target = os.path.join(inputs, "ndvi_2008-07-11.tif")
        with open(target, "r+b") as f:  # the first part of a slow copy over it
            f.truncate(os.path.getsize(target) // 3)
        with open(log) as f:
            if '"step_finished"' in f.read():
                process.communicate(timeout=300)
                self.skipTest("the step ended before the composite was rewritten")
        _, stderr = process.communicate(timeout=300)
        with open(log) as f:
            said = stderr + f.read()
        self.assertEqual(process.returncode, 2, said)
        self.assertIn("ndvi_2008-07-11.tif: changed while this run read it", said)
        db = sqlite3.connect(os.path.join(folder, "out", ".kalends", "state.sqlite"))
        self.assertEqual(db.execute("SELECT COUNT(*) FROM skipped").fetchone()[0], 0)
        db.close()
        self.assertFalse(glob.glob(os.path.join(folder, "out", "fill", "*.tif")))


class TwoJobFilesOneFolder(kt.TempDirTestCase):
    def test_a_second_job_file_writing_the_same_folder_is_told(self):
        # Two job files with one 'out' take each other's steps as their own (status of one lists
        # only its steps; a step id in both is redone by each, night after night): nothing had
        # been said. A renamed job file, or a copy of the same text, is the same job.
        folder = os.path.join(self.tmp, "shared")
        first = small_dated_job(folder)
        second = os.path.join(folder, "other.toml")
        with open(first) as f:
            text = f.read()
        with open(second, "w") as f:
            f.write(text.replace('id = "fill"', 'id = "smooth"') + "lambda = 100\n")
        done = run(first)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("another job file", done.stdout + done.stderr)
        done = run(second)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: this output folder was last run by another job file, %s" % os.path.realpath(first),
                      done.stdout)
        done = run(first, "--log", "json")
        finished = json.loads(done.stdout.strip().splitlines()[-1])
        self.assertEqual(len(finished["notes"]), 1, done.stdout)
        self.assertIn("last run by another job file, %s" % os.path.realpath(second), finished["notes"][0])
        done = run(first)
        self.assertNotIn("another job file", done.stdout + done.stderr)
        copy = os.path.join(folder, "copy.toml")
        shutil.copy(first, copy)
        renamed = os.path.join(folder, "renamed.toml")
        self.assertNotIn("another job file", run(copy).stdout)
        os.rename(first, renamed)
        os.remove(copy)
        self.assertNotIn("another job file", run(renamed).stdout)


class Faults(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        # 160 px: each output GeoTIFF is larger than the whole state database (the disk test).
        cls.job = make_job(os.path.join(cls.tmp, "job"), size=160)
        done = run(cls.job, "--out", os.path.join(cls.tmp, "reference"))
        assert done.returncode == 0, done.stderr
        cls.reference = content(os.path.join(cls.tmp, "reference"))
        t0 = time.monotonic()
        run(cls.job, "--out", os.path.join(cls.tmp, "timing"))
        cls.duration = time.monotonic() - t0

    def test_killed_at_random_moments_then_rerun_gives_the_same_outputs(self):
        rng = random.Random(11)
        out = os.path.join(self.tmp, "killed")
        g = kt.gdal()
        for attempt in range(8):
            process = subprocess.Popen([kt.KALENDS_BIN, "-q", "run", self.job, "--out", out],
                                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            time.sleep(rng.uniform(0.05, max(0.1, self.duration)))
            process.send_signal(signal.SIGKILL)
            process.wait()
            # No file under a final name is partial: each one opens and reads whole.
            for path in glob.glob(os.path.join(out, "**", "*.tif"), recursive=True):
                ds = g.Open(path)
                self.assertIsNotNone(ds.ReadAsArray(), path)
        done = run(self.job, "--out", out)
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(glob.glob(os.path.join(out, "**", ".*.partial"), recursive=True), [])
        got = content(out)
        self.assertEqual(sorted(got), sorted(self.reference))
        for key in got:
            self.assertEqual(got[key], self.reference[key], key)

    def test_a_killed_run_leaves_its_log_lines(self):
        # Each event line is written out as it happens (a log file is not a terminal, so
        # standard output is block-buffered): when the first step's line appears the run is
        # still going, and after SIGKILL every line in the file is whole JSON. Without the
        # flush the file stayed empty until the run ended, and a killed run left nothing.
        out = os.path.join(self.tmp, "logged")
        log = os.path.join(self.tmp, "run.jsonl")
        with open(log, "w") as f:
            process = subprocess.Popen([kt.KALENDS_BIN, "run", self.job, "--out", out, "--log", "json"],
                                       stdout=f, stderr=subprocess.DEVNULL)
        seen_while_running = None
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            with open(log) as f:
                text = f.read()
            if '"step_finished"' in text:
                seen_while_running = process.poll() is None
                break
            if process.poll() is not None:
                break
            time.sleep(0.005)
        process.send_signal(signal.SIGKILL)
        process.wait()
        self.assertTrue(seen_while_running, "no step_finished line while the run was going")
        with open(log) as f:
            events = [json.loads(line) for line in f.read().splitlines()]
        self.assertEqual(events[0]["event"], "step_started")
        self.assertIn({"fill": "step_finished"}, [{e["step"]: e["event"]} for e in events])

    def test_a_stopped_run_says_so_and_status_says_interrupted(self):
        # SIGTERM (a service stop, `timeout`) during the fill: one line on stderr, a last JSON
        # `finished` event with exit code 143, and the process dies of the signal; the next run
        # equals a run from scratch. A stopped run had left no trace in the log.
        out = os.path.join(self.tmp, "stopped")
        self.assertEqual(run(self.job, "--out", out).returncode, 0)
        with open(self.job) as f:
            text = f.read()
        self.assertIn('"auto"', text)
        edited = os.path.join(os.path.dirname(self.job), "stopped-job.toml")   # its paths are relative
        with open(edited, "w") as f:   # another lambda, so that the fill is redone
            f.write(text.replace('"auto"', "2.5", 1))
        log = os.path.join(self.tmp, "stopped.jsonl")
        process = run_until_a_step_starts(["run", edited, "--out", out], log)
        time.sleep(min(0.3, self.duration / 10))
        if process.poll() is not None:
            self.skipTest("the run ended before it could be stopped")
        process.send_signal(signal.SIGTERM)
        _, stderr = process.communicate(timeout=60)
        self.assertEqual(process.returncode, -signal.SIGTERM, stderr)
        self.assertIn("kalends: stopped by SIGTERM", stderr)
        with open(log) as f:
            events = [json.loads(line) for line in f.read().splitlines()]
        self.assertEqual(events[-1], {"event": "finished", "exit_code": 143, "error": "stopped by SIGTERM"})
        # status says the fill was interrupted (a step is marked when a run starts it), whether or
        # not the stop left .partial files; it had said "stale" and exited 0.
        status = kt.run_kalends(["status", edited, "--out", out])
        self.assertEqual(status.returncode, 1, status.stdout)
        self.assertIn("interrupted", [l for l in status.stdout.splitlines() if l.startswith("fill")][0])
        done = run(edited, "--out", out)
        self.assertIn("stopped while running last time", done.stdout)
        self.assertEqual(done.returncode, 0, done.stderr)
        scratch = os.path.join(self.tmp, "stopped-scratch")
        self.assertEqual(run(edited, "--out", scratch).returncode, 0)
        self.assertEqual(content(out), content(scratch))
        # A run stopped while it wrote a step leaves hidden .partial files (made here by hand, as
        # the window is short): `status` says the step was interrupted, not that inputs changed.
        with open(os.path.join(out, "fill", ".ndvi_2021-01-01.tif.partial"), "w") as f:
            f.write("half")
        status = kt.run_kalends(["status", self.job, "--out", out])
        line = [l for l in status.stdout.splitlines() if l.startswith("fill")][0]
        self.assertIn("interrupted", line)
        self.assertIn("before that: lambda 2.5 -> auto", line)

    def test_status_reads_a_state_left_mid_transaction(self):
        # A process killed inside a transaction of the state database leaves a hot journal,
        # which a read-only reader cannot roll back: `status` had failed with "attempt to write a
        # readonly database" until the next run. With no run going it recovers the journal.
        out = os.path.join(self.tmp, "hot-journal")
        self.assertEqual(run(self.job, "--out", out).returncode, 0)
        database = os.path.join(out, ".kalends", "state.sqlite")
        killed = subprocess.run(["/usr/bin/python3", "-c",
                                 "import os, sqlite3\n"
                                 "db = sqlite3.connect(%r, isolation_level=None)\n"
                                 "db.execute('PRAGMA cache_size = 1')\n"   # pages spill to the file
                                 "db.execute('BEGIN IMMEDIATE')\n"
                                 "db.execute(\"UPDATE steps SET status = 'half' WHERE id = 'fill'\")\n"
                                 "for i in range(200):\n"
                                 "    db.execute(\"INSERT INTO inputs VALUES ('x' || hex(randomblob(3000)), 1, 1, 'x')\")\n"
                                 "os._exit(0)\n" % database], capture_output=True, text=True)
        self.assertEqual(killed.returncode, 0, killed.stderr)
        if not os.path.exists(database + "-journal"):
            self.skipTest("SQLite left no journal here")
        status = kt.run_kalends(["status", self.job, "--out", out])
        self.assertEqual(status.returncode, 0, status.stderr)
        line = [l for l in status.stdout.splitlines() if l.startswith("fill")][0]
        self.assertIn(" done ", line)   # the last committed state, not 'half'

    def test_more_threads_than_cores_keep_the_json_log_clean(self):
        # threads = 64 on a machine with fewer cores: TBB had warned on standard error in every
        # run ("the number of workers is currently limited"), which a cron line's 2>&1 put into
        # the JSON log. Every line of standard output and error together is now JSON, and the
        # outputs are those of the default threads (they never depend on the threads).
        if (os.cpu_count() or 1) >= 64:
            self.skipTest("64 or more cores: no oversubscription to check")
        out = os.path.join(self.tmp, "threads64")
        done = run(self.job, "--out", out, "--log", "json", "--threads", "64")
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(done.stderr, "")
        for line in done.stdout.splitlines():
            json.loads(line)
        got = content(out)
        for key in self.reference:
            self.assertEqual(got[key], self.reference[key], key)

    def test_a_full_device_is_named(self):
        # A 1 MiB tmpfs (needs root to mount; skipped otherwise): the write fails, and the one
        # line says the device is full, not only GDAL's "TIFFAppendToStrip: Write error".
        small = os.path.join(self.tmp, "small-device")
        os.makedirs(small)
        mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1M", "tmpfs", small],
                                 capture_output=True, text=True)
        if mounted.returncode != 0:
            self.skipTest("cannot mount a small tmpfs here: " + mounted.stderr.strip())
        try:
            done = run(self.job, "--out", os.path.join(small, "out"))
        finally:
            subprocess.run(["umount", small], capture_output=True)
        self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
        line = done.stderr.strip().splitlines()[-1]
        print("\n  " + line)
        self.assertIn("no space left on the device", line)

    def test_an_older_kalends_is_refused_a_state_a_newer_one_wrote(self):
        # A downgrade had rerun every step with the older methods ("program version changed"),
        # and left the newer version's extra files beside the older outputs. The state keeps
        # the newest version that wrote it; an older one is refused before it changes anything.
        import sqlite3
        folder = os.path.join(self.tmp, "downgrade")
        job = small_dated_job(folder)
        self.assertEqual(run(job).returncode, 0)
        version = subprocess.run([kt.KALENDS_BIN, "--version"], capture_output=True, text=True).stdout.split()[-1]
        state = os.path.join(folder, "out", ".kalends", "state.sqlite")
        with sqlite3.connect(state) as db:
            self.assertEqual(db.execute("SELECT value FROM program WHERE key = 'newest_version'").fetchall(),
                             [(version,)])
            # As a later release would leave it.
            major, minor, patch = (int(v) for v in version.split("."))
            newer = "%d.%d.%d" % (major, minor + 1, 0)
            db.execute("UPDATE program SET value = ? WHERE key = 'newest_version'", (newer,))
        outputs = {p: os.stat(p).st_mtime_ns for p in glob.glob(os.path.join(folder, "out", "fill", "*"))}
        for extra in ([], ["--dry-run"]):
            done = run(job, *extra)
            self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
            self.assertIn("%s: written by kalends %s, which is newer than this one (%s)" % (state, newer, version),
                          done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertEqual({p: os.stat(p).st_mtime_ns for p in glob.glob(os.path.join(folder, "out", "fill", "*"))},
                         outputs)
        # A plan and a shard's run are refused too (a shard keeps a state of its own, which had
        # let an older kalends run every shard, refused only at --finalize).
        done = kt.run_kalends(["plan", job, "--shards", "1"])
        self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
        self.assertIn("which is newer than this one", done.stderr)
        # status still reads it, and says why runs are refused (exit 1, as for a failed step).
        status = kt.run_kalends(["status", job])
        self.assertEqual(status.returncode, 1, status.stdout + status.stderr)
        self.assertRegex(status.stdout, r"(?m)^program +kalends +refused +the state was written by kalends %s"
                         % re.escape(newer))
        # A dry run on a state without the mark changes nothing, not even the mark.
        with sqlite3.connect(state) as db:
            db.execute("DROP TABLE program")
        self.assertEqual(run(job, "--dry-run").returncode, 0)
        with sqlite3.connect(state) as db:
            self.assertEqual(db.execute("SELECT name FROM sqlite_master WHERE name = 'program'").fetchall(), [])

    def test_a_shard_a_newer_kalends_ran_is_not_stitched(self):
        # A shard keeps a state of its own: one a newer kalends wrote had been called done by
        # status and stitched by --finalize, mixing the versions' strips.
        import sqlite3
        folder = os.path.join(self.tmp, "newer-shard")
        job = small_dated_job(folder)
        self.assertEqual(kt.run_kalends(["plan", job, "--shards", "1"]).returncode, 0)
        self.assertEqual(run(job, "--shard", "1").returncode, 0)
        shard_state = glob.glob(os.path.join(folder, "out", ".kalends", "shards", "*", ".kalends", "state.sqlite"))
        self.assertEqual(len(shard_state), 1)
        with sqlite3.connect(shard_state[0]) as db:
            db.execute("UPDATE program SET value = '99.0.0' WHERE key = 'newest_version'")
        status = kt.run_kalends(["status", job])
        self.assertIn("written by kalends 99.0.0, newer than this one", status.stdout)
        # Listed as refused, like a newer state of the job's own, and a monitoring script sees exit 1.
        shard_line = [line for line in status.stdout.splitlines() if "99.0.0" in line]
        self.assertEqual(len(shard_line), 1, status.stdout)
        self.assertIn("refused", shard_line[0])
        self.assertEqual(status.returncode, 1, status.stdout + status.stderr)
        done = run(job, "--finalize")
        self.assertEqual(done.returncode, 4, done.stdout + done.stderr)
        self.assertIn("written by kalends 99.0.0", done.stderr)
        # Not "run them again": this kalends would refuse that too.
        self.assertIn("finalize with that kalends, or remove the shard's .kalends/state.sqlite", done.stderr)
        self.assertFalse(glob.glob(os.path.join(folder, "out", "fill", "*.tif")))

    def test_a_second_run_on_the_same_folder_is_refused(self):
        out = os.path.join(self.tmp, "locked")
        first = subprocess.Popen([kt.KALENDS_BIN, "-q", "run", self.job, "--out", out],
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        for _ in range(100):   # until the first run holds the lock
            if os.path.exists(os.path.join(out, ".kalends", "lock")):
                break
            time.sleep(0.02)
        time.sleep(0.1)
        second = run(self.job, "--out", out)
        first.wait()
        self.assertEqual(second.returncode, 1, second.stderr)
        self.assertIn("another kalends run", second.stderr)
        self.assertEqual(len(second.stderr.strip().splitlines()), 1)

    def test_a_waiting_run_says_what_it_waits_for(self):
        # --wait had waited in silence: a cron log showed nothing for as long as it waited.
        import fcntl
        out = os.path.join(self.tmp, "waited")
        os.makedirs(os.path.join(out, ".kalends"))
        lock = os.path.join(out, ".kalends", "lock")
        with open(lock, "w") as f:
            f.write("4242")
        fd = os.open(lock, os.O_RDWR)
        fcntl.flock(fd, fcntl.LOCK_EX)  # another run holds the folder
        errors = os.path.join(self.tmp, "waited.err")
        with open(errors, "w") as f:
            waiting = subprocess.Popen([kt.KALENDS_BIN, "-q", "run", self.job, "--out", out, "--wait"],
                                       stdout=subprocess.DEVNULL, stderr=f)
        said = ""
        for _ in range(300):
            with open(errors) as f:
                said = f.read()
            if said or waiting.poll() is not None:
                break
            time.sleep(0.05)
        self.assertIsNone(waiting.poll(), said)
        os.close(fd)
        self.assertEqual(waiting.wait(timeout=300), 0)
        self.assertIn("note: waiting for the run (pid 4242) that holds %s to end" % out, said)
        # The log collectors' event gives the pid as a number (it had been a string).
        with open(lock, "w") as f:
            f.write("4242")  # the run above wrote its own
        fd = os.open(lock, os.O_RDWR)
        fcntl.flock(fd, fcntl.LOCK_EX)
        logged = os.path.join(self.tmp, "waited.json")
        with open(logged, "w") as f:
            waiting = subprocess.Popen([kt.KALENDS_BIN, "run", self.job, "--out", out, "--wait", "--log", "json"],
                                       stdout=f, stderr=subprocess.DEVNULL)
        first = None
        for _ in range(300):
            with open(logged) as f:
                lines = f.read().splitlines()
            if lines or waiting.poll() is not None:
                first = json.loads(lines[0]) if lines else None
                break
            time.sleep(0.05)
        os.close(fd)
        self.assertEqual(waiting.wait(timeout=300), 0)
        self.assertEqual(first, {"event": "waiting", "out": out, "pid": 4242})

    def test_a_file_size_limit_below_the_state_database_is_refused_before_any_step(self):
        # A limit below the state database's size had let every step work and publish, then fail
        # to record it ("state database: disk I/O error"), later steps not reached.
        out = os.path.join(self.tmp, "limited")
        shutil.copytree(os.path.join(self.tmp, "reference"), out, symlinks=True)
        database = os.path.join(out, ".kalends", "state.sqlite")
        limit = os.path.getsize(database) // 2
        before = os.path.getmtime(database)

        def small_limit():
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

        done = run(self.job, "--out", out, preexec=small_limit)
        self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
        lines = done.stderr.strip().splitlines()
        self.assertEqual(len(lines), 1, done.stderr)
        self.assertIn("state.sqlite: the file-size limit (ulimit -f) of %d KiB" % (limit >> 10), lines[0])
        self.assertNotIn("ran", done.stdout)
        self.assertEqual(os.path.getmtime(database), before)

    def test_a_state_database_outgrowing_a_file_size_limit_names_the_limit(self):
        # A first run under a limit the database outgrows (guarded only below its size) had
        # failed with "state database: disk I/O error", which sent the user to the disk.
        folder = os.path.join(self.tmp, "outgrown")
        os.makedirs(os.path.join(folder, "layers"))
        for k in range(60):
            date = datetime.date(2021, 1, 1) + datetime.timedelta(days=8 * k)
            kt.write_raster(os.path.join(folder, "layers", "ndvi_%s.tif" % date.isoformat()),
                            np.full((4, 4), 0.5, np.float32), geotransform=(30.0, 0.01, 0, -1.0, 0, -0.01), epsg=4326)
        job = write_job(folder,
                        '[job]\nout = "out"\n[inputs.ndvi]\nstack = "layers/*.tif"\n[[step]]\nid = "fill"\ndo = "fill"\n'
                        'input = "ndvi"\nevery = "1M"\n[[step]]\ndo = "seasons"\ninput = "fill"\n')

        def limit():
            resource.setrlimit(resource.RLIMIT_FSIZE, (70 << 10, 70 << 10))

        done = run(job, preexec=limit)
        self.assertEqual(done.returncode, 1, done.stdout + done.stderr)
        self.assertIn("state database: disk I/O error (a file-size limit, ulimit -f, of 70 KiB is set: raise it)",
                      done.stderr)
        done = run(job)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        # Another database error under a large limit does not blame the limit.
        database = os.path.join(folder, "out", ".kalends", "state.sqlite")
        with open(database, "r+b") as f:
            f.write(b"not a database at all" * 10)

        def large_limit():
            resource.setrlimit(resource.RLIMIT_FSIZE, (1 << 40, 1 << 40))

        done = run(job, preexec=large_limit)
        self.assertNotEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertIn("state database", done.stderr)
        self.assertNotIn("ulimit", done.stderr)

    def test_a_failing_disk_stops_cleanly_and_the_next_run_resumes(self):
        out = os.path.join(self.tmp, "full")
        # A file-size limit above the whole state database of a finished run but below every
        # output GeoTIFF: the outputs cannot be written, the database can.
        reference = os.path.join(self.tmp, "reference")
        database = os.path.getsize(os.path.join(reference, ".kalends", "state.sqlite"))
        smallest = min(os.path.getsize(p) for p in glob.glob(os.path.join(reference, "fill", "*.tif")))
        limit = database + (16 << 10)
        if smallest <= limit:
            self.skipTest("outputs (%d bytes) too small to fail before the database (%d)" % (smallest, database))

        def small_disk():
            # SIGXFSZ at its default (subprocess restores it), which kills a process writing past
            # the limit: kalends ignores it itself, so the write fails with EFBIG like a full disk
            # (it had died of the signal without a word).
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

        failed = run(self.job, "--out", out, preexec=small_disk)
        self.assertEqual(failed.returncode, 1, failed.stdout + failed.stderr)
        print("\n  " + failed.stderr.strip().splitlines()[-1])
        self.assertIn("kalends: ", failed.stderr)
        db = sqlite3.connect(os.path.join(out, ".kalends", "state.sqlite"))
        self.assertEqual(db.execute("SELECT status FROM steps WHERE id = 'fill'").fetchone()[0], "failed")
        db.close()
        done = run(self.job, "--out", out)
        self.assertEqual(done.returncode, 0, done.stderr)
        got = content(out)
        for key in self.reference:
            self.assertEqual(got[key], self.reference[key], key)


class BadInput(kt.TempDirTestCase):
    """Each bad input: exit 2, one line naming the file and the problem, earlier outputs untouched;
    with --skip-bad: exit 3, the file listed and recorded in the state database."""

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.folder = os.path.join(cls.tmp, "job")
        cls.job = make_job(cls.folder, years=1, size=64)
        done = run(cls.job)
        assert done.returncode == 0, done.stderr
        cls.out = os.path.join(cls.folder, "out")

    def check(self, break_input, words, skippable=True):
        stack = os.path.join(self.folder, "stack")
        backup = os.path.join(self.tmp, "backup")
        shutil.rmtree(backup, ignore_errors=True)
        shutil.copytree(stack, backup)
        before = content(self.out)
        times = mtimes(self.out)
        try:
            culprit = break_input(stack)
            done = run(self.job)
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            # The headline tells a failed night from one that left bad inputs out (both had
            # said "done with problems").
            self.assertIn("kalends run: failed ->", done.stdout)
            line = done.stderr.strip().splitlines()
            self.assertEqual(len(line), 1, done.stderr)
            print("\n  " + line[0])
            self.assertIn(os.path.basename(culprit), line[0])
            for w in words:
                self.assertIn(w, line[0])
            self.assertEqual(content(self.out), before)
            self.assertEqual(mtimes(self.out), times)
            status = kt.run_kalends(["status", self.job])
            self.assertEqual(status.returncode, 1, status.stdout)   # a step failed
            self.assertIn(" failed ", status.stdout)
            if skippable:
                skipped = run(self.job, "--skip-bad", "--out", os.path.join(self.tmp, "skip"))
                self.assertEqual(skipped.returncode, 3, skipped.stdout + skipped.stderr)
                self.assertIn("kalends run: done, bad inputs left out ->", skipped.stdout)
                self.assertIn("skipped input", skipped.stdout)
                self.assertIn(os.path.basename(culprit), skipped.stdout)
                db = sqlite3.connect(os.path.join(self.tmp, "skip", ".kalends", "state.sqlite"))
                rows = db.execute("SELECT path FROM skipped").fetchall()
                db.close()
                self.assertIn(culprit, [r[0] for r in rows])
                # While the bad file is unchanged, status and the next nightly run see every
                # step done (not "its inputs changed"), and still name the file.
                skip = os.path.join(self.tmp, "skip")
                status = kt.run_kalends(["status", self.job, "--out", skip])
                self.assertEqual(status.returncode, 0, status.stderr)
                steps = [l for l in status.stdout.splitlines() if not l.startswith("input ")]
                self.assertTrue(steps and all(" done " in l for l in steps), status.stdout)
                self.assertIn(os.path.basename(culprit), status.stdout)
                again = run(self.job, "--skip-bad", "--out", skip)
                self.assertEqual(again.returncode, 3, again.stdout + again.stderr)
                self.assertNotIn(" ran ", again.stdout)
                self.assertIn(os.path.basename(culprit), again.stdout)
        finally:
            shutil.rmtree(stack)
            shutil.copytree(backup, stack)
            shutil.rmtree(os.path.join(self.tmp, "skip"), ignore_errors=True)

    def ndvi(self, stack, i):
        return sorted(glob.glob(os.path.join(stack, "ndvi", "ndvi_*.tif")))[i]

    def test_corrupt_geotiff(self):
        def corrupt(stack):
            path = self.ndvi(stack, 5)
            with open(path, "r+b") as f:
                f.truncate(os.path.getsize(path) // 2)
            return path
        self.check(corrupt, ["corrupt"])

    def test_grid_differs(self):
        def regrid(stack):
            path = self.ndvi(stack, 3)
            kt.write_raster(path, np.zeros((10, 10), np.int16), geotransform=(0, 250, 0, 0, 0, -250), epsg=32736)
            return path
        self.check(regrid, ["grid"])

    def test_grid_of_the_oldest_composite_differs(self):
        # The stack is judged by the grid most of its files share, not by its first file: an
        # oldest composite on another grid is the one named (and skipped), not every good one.
        def regrid(stack):
            path = self.ndvi(stack, 0)
            kt.write_raster(path, np.zeros((10, 10), np.int16), geotransform=(0, 250, 0, 0, 0, -250), epsg=32736)
            return path
        self.check(regrid, ["grid is 10 x 10 px, that of the rest of the stack"])
        # The JSON log reports how long the failed step took (its 24 files opened: over 0 ms).
        stack = os.path.join(self.folder, "stack")
        backup = os.path.join(self.tmp, "backup-json")
        shutil.copytree(stack, backup)
        try:
            regrid(stack)
            done = run(self.job, "--log", "json")
            step = [json.loads(l) for l in done.stdout.splitlines() if '"step_finished"' in l][0]
            self.assertEqual(step["action"], "failed")
            self.assertGreater(step["seconds"], 0)
        finally:
            shutil.rmtree(stack)
            shutil.copytree(backup, stack)

    def test_two_grids_without_a_majority_are_refused_whole(self):
        # Half the files on one grid, half on another: which is right cannot be told, so no file
        # is named bad and --skip-bad skips none (it had dropped half the stack, exit 3).
        stack = os.path.join(self.folder, "stack")
        backup = os.path.join(self.tmp, "backup-tie")
        shutil.copytree(stack, backup)
        try:
            files = sorted(glob.glob(os.path.join(stack, "ndvi", "ndvi_*.tif")))
            if len(files) % 2:
                os.remove(files.pop(0))
            for path in files[len(files) // 2:]:
                kt.write_raster(path, np.zeros((10, 10), np.int16), geotransform=(0, 250, 0, 0, 0, -250), epsg=32736)
            done = run(self.job, "--skip-bad", "--out", os.path.join(self.tmp, "tie"))
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            self.assertIn("none is shared by most of them", done.stderr)
            self.assertNotIn("skipped input", done.stdout)
        finally:
            shutil.rmtree(stack)
            shutil.copytree(backup, stack)
            shutil.rmtree(os.path.join(self.tmp, "tie"), ignore_errors=True)

    def test_crs_differs(self):
        def reproject(stack):
            path = self.ndvi(stack, 4)
            g = kt.gdal()
            ds = g.Open(path, 1)
            from osgeo import osr
            srs = osr.SpatialReference()
            srs.ImportFromEPSG(32636)
            ds.SetProjection(srs.ExportToWkt())
            ds = None
            return path
        self.check(reproject, ["coordinate reference system"])

    def test_missing_qa_partner(self):
        def drop_qa(stack):
            path = self.ndvi(stack, 6)
            os.remove(os.path.join(stack, "qa", os.path.basename(path).replace("ndvi_", "qa_")))
            return path
        self.check(drop_qa, ["no QA layer"])

    def test_duplicate_date(self):
        def duplicate(stack):
            path = self.ndvi(stack, 2)
            copy = os.path.join(os.path.dirname(path), os.path.basename(path).replace("-", ""))  # ndvi_YYYYMMDD.tif
            shutil.copy(path, copy)
            return copy
        self.check(duplicate, ["duplicate date"])

    def test_values_all_outside_the_valid_range(self):
        def rescale(stack):
            path = self.ndvi(stack, 7)
            g = kt.gdal()
            ds = g.Open(path, 1)
            ds.GetRasterBand(1).SetScale(1.0)   # a forgotten scale factor
            ds = None
            return path
        self.check(rescale, ["outside the valid range"])

    def test_unparsable_date(self):
        def rename(stack):
            path = self.ndvi(stack, 1)
            bad = os.path.join(os.path.dirname(path), "ndvi_2021-13-40.tif")
            os.rename(path, bad)
            return bad
        self.check(rename, ["'2021-13-40' in the file name is not a calendar date"])


if __name__ == "__main__":
    unittest.main(verbosity=2)
