"""kalends fill on bad input: exit code 2, one clear line on stderr, nothing written.

Each case runs twice: into a fresh output folder (no final *.tif and no fill-summary.json may
appear there), and into a folder holding the outputs of an earlier good run (they must stay
byte-identical, and no file may be added). The message must be one line starting
`kalends: `, name the offending file (its base name at least) or option, and say what is wrong
(one of a few keywords per case). The messages are printed for the record.

The inputs are small invented GeoTIFFs written with Python GDAL (mechanics only).

Run: /usr/bin/python3 -m unittest -v tests/reference/test_bad_input.py
"""

import glob
import os
import shutil
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

WIDTH, HEIGHT = 64, 48
GEOTRANSFORM = (500000.0, 30.0, 0.0, 7000000.0, 0.0, -30.0)
EPSG = 32736
DATES = ["2020-01-01", "2020-01-17", "2020-02-02", "2020-02-18", "2020-03-05"]


def write_layer(path, seed, width=WIDTH, height=HEIGHT, geotransform=GEOTRANSFORM, epsg=EPSG):
    rng = np.random.default_rng(seed)
    values = (0.3 + 0.1 * rng.random((height, width))).astype(np.float32)
    values[rng.random((height, width)) < 0.2] = np.nan
    kt.write_raster(path, values, geotransform=geotransform, epsg=epsg, nodata=float("nan"))


def write_stack(folder, dates=DATES, prefix="ndvi_"):
    os.makedirs(folder, exist_ok=True)
    for i, date in enumerate(dates):
        write_layer(os.path.join(folder, "%s%s.tif" % (prefix, date)), seed=i)


def write_qa(folder, dates=DATES):
    os.makedirs(folder, exist_ok=True)
    for i, date in enumerate(dates):
        qa = np.random.default_rng(100 + i).integers(0, 4, (HEIGHT, WIDTH)).astype(np.uint8)
        kt.write_raster(os.path.join(folder, "qa_%s.tif" % date), qa,
                        geotransform=GEOTRANSFORM, epsg=EPSG)


def snapshot(folder):
    """{relative path: bytes} of every file under folder."""
    files = {}
    for root, _, names in os.walk(folder):
        for name in names:
            path = os.path.join(root, name)
            with open(path, "rb") as f:
                files[os.path.relpath(path, folder)] = f.read()
    return files


class BadInput(kt.TempDirTestCase):

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        kt.require_binary(kt.KALENDS_BIN)
        cls.good = os.path.join(cls.tmp, "good")
        write_stack(cls.good)
        cls.qa = os.path.join(cls.tmp, "qa")
        write_qa(cls.qa)
        # An earlier good run: its outputs must survive every failed run into the same folder.
        cls.previous = os.path.join(cls.tmp, "previous")
        cls.previous_done = kt.run_kalends(["-q", "fill", os.path.join(cls.good, "*.tif"),
                                            "--out", cls.previous, "--lambda", "10"])
        cls.previous_files = snapshot(cls.previous) if cls.previous_done.returncode == 0 else {}
        cls.counter = 0

    def setUp(self):
        self.assertEqual(self.previous_done.returncode, 0, self.previous_done.stderr)
        self.assertGreater(len([p for p in self.previous_files if p.endswith(".tif")]), 0)

    def variant(self, name):
        """A copy of the good stack to spoil."""
        folder = os.path.join(self.tmp, name)
        shutil.copytree(self.good, folder)
        return folder

    def check_fails(self, args, names, keywords, label):
        """Runs `kalends fill ARGS --out DIR` into a fresh and into a used folder."""
        type(self).counter += 1
        fresh = os.path.join(self.tmp, "out-fresh-%d" % self.counter, "nested")
        used = os.path.join(self.tmp, "out-used-%d" % self.counter)
        shutil.copytree(self.previous, used)
        messages = []
        for out in (fresh, used):
            done = kt.run_kalends(["fill"] + list(args) + ["--out", out])
            print("\n[%s] rc %d stderr: %s" % (label, done.returncode, done.stderr.rstrip("\n")))
            self.assertEqual(done.returncode, 2, "%s: stderr %r" % (label, done.stderr))
            lines = done.stderr.rstrip("\n").split("\n")
            self.assertEqual(len(lines), 1, "%s: stderr is not one line: %r" % (label, done.stderr))
            line = lines[0]
            self.assertTrue(line.startswith("kalends: "), "%s: %r" % (label, line))
            self.assertTrue(any(n in line for n in names),
                            "%s: message names none of %s: %r" % (label, names, line))
            self.assertTrue(any(k.lower() in line.lower() for k in keywords),
                            "%s: message has none of %s: %r" % (label, keywords, line))
            messages.append(line)
        # Fresh folder: not even created, or removed again with the parent the run created.
        self.assertFalse(os.path.exists(os.path.dirname(fresh)), "%s: output folder left behind" % label)
        # Fresh folder: nothing under a final name (and no temporary left behind).
        if os.path.isdir(fresh):
            finals = glob.glob(os.path.join(fresh, "**", "*.tif"), recursive=True)
            self.assertEqual(finals, [], "%s: outputs written" % label)
            self.assertFalse(os.path.exists(os.path.join(fresh, "fill-summary.json")), label)
            leftovers = [f for f in snapshot(fresh) if f.endswith(".partial")]
            self.assertEqual(leftovers, [], "%s: temporaries left behind" % label)
        # Used folder: the earlier outputs are byte-identical and nothing was added.
        after = snapshot(used)
        self.assertEqual(sorted(after), sorted(self.previous_files), "%s: files changed" % label)
        for path, content in self.previous_files.items():
            self.assertTrue(after[path] == content, "%s: %s was modified" % (label, path))
        return messages

    # -----------------------------------------------------------------------------------------

    def test_grid_size_mismatch(self):
        folder = self.variant("size")
        write_layer(os.path.join(folder, "ndvi_2020-02-02.tif"), 7, width=WIDTH + 1)
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-02-02.tif"],
                         ["grid", "size", "px"], "grid size")

    def test_geotransform_mismatch(self):
        folder = self.variant("geotransform")
        shifted = (GEOTRANSFORM[0] + 30.0,) + GEOTRANSFORM[1:]
        write_layer(os.path.join(folder, "ndvi_2020-02-18.tif"), 7, geotransform=shifted)
        messages = self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-02-18.tif"],
                                    ["georeferenc", "geotransform", "origin", "pixel size"], "geotransform")
        # Where and by how much (a bare "differs" had not said why a file 1e-5 px off is refused).
        self.assertIn("origin (500030, 7000000) differs from that of", messages[0])
        self.assertIn("(500000, 7000000) by 1 px", messages[0])

    def test_a_date_without_georeferencing_is_named_as_such(self):
        folder = self.variant("no-georeferencing")
        values = np.full((HEIGHT, WIDTH), 0.3, np.float32)
        kt.write_raster(os.path.join(folder, "ndvi_2020-02-18.tif"), values)
        messages = self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-02-18.tif"],
                                    ["no georeferencing"], "no georeferencing")
        self.assertIn("has no georeferencing, ", messages[0])

    def test_crs_mismatch(self):
        folder = self.variant("crs")
        write_layer(os.path.join(folder, "ndvi_2020-01-17.tif"), 7, epsg=32735)  # zone 35S
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-01-17.tif"],
                         ["coordinate reference", "crs", "projection", "spatial reference"], "crs")

    def test_a_date_without_a_crs_or_stored_south_up_is_named_as_such(self):
        # Both had been reported as something else: "coordinate reference system differs", and
        # an origin some pixels away.
        folder = self.variant("no-crs")
        write_layer(os.path.join(folder, "ndvi_2020-01-17.tif"), 7, epsg=None)
        messages = self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-01-17.tif"],
                                    ["coordinate reference"], "no crs")
        self.assertIn("states no coordinate reference system, ", messages[0])
        folder = self.variant("south-up")
        south_up = (GEOTRANSFORM[0], 30.0, 0.0, GEOTRANSFORM[3] - HEIGHT * 30.0, 0.0, 30.0)
        write_layer(os.path.join(folder, "ndvi_2020-01-17.tif"), 7, geotransform=south_up)
        messages = self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-01-17.tif"],
                                    ["south-up"], "south-up")
        self.assertIn("is stored south-up while ", messages[0])

    def test_a_stack_placed_by_ground_control_points_is_refused(self):
        # GCPs without a geotransform had been read as a bare pixel grid: the fill wrote its
        # outputs without georeferencing and did not see dates whose points differ.
        g = kt.gdal()
        folder = os.path.join(self.tmp, "gcps")
        os.makedirs(folder)
        srs = g.osr.SpatialReference()
        srs.ImportFromEPSG(EPSG)
        for i, date in enumerate(DATES):
            ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, "ndvi_%s.tif" % date), WIDTH, HEIGHT, 1,
                                                   g.GDT_Float32)
            ds.GetRasterBand(1).WriteArray(np.full((HEIGHT, WIDTH), 0.3 + 0.01 * i, np.float32))
            x0, y0 = GEOTRANSFORM[0], GEOTRANSFORM[3]
            gcps = [g.GCP(x0, y0, 0, 0, 0), g.GCP(x0 + 30 * WIDTH, y0, 0, WIDTH, 0),
                    g.GCP(x0, y0 - 30 * HEIGHT, 0, 0, HEIGHT)]
            ds.SetGCPs(gcps, srs.ExportToWkt())
            ds = None
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_"], ["ground control points"], "gcps")

    def test_duplicate_dates(self):
        folder = self.variant("duplicate")
        write_layer(os.path.join(folder, "ndvi_20200101.tif"), 7)  # also 2020-01-01
        self.check_fails([os.path.join(folder, "*.tif")],
                         ["ndvi_20200101.tif", "ndvi_2020-01-01.tif"], ["duplicate"],
                         "duplicate dates")

    @unittest.skipUnless(hasattr(os, "geteuid") and os.geteuid() == 0 and shutil.which("setpriv"),
                         "needs root to run kalends as another user")
    def test_a_folder_the_user_may_not_read(self):
        # Run as 'nobody' on a folder closed to it: the message had been "filesystem error:
        # status: Permission denied [...]" with exit 1.
        import subprocess
        folder = os.path.join(self.tmp, "closed")
        shutil.copytree(self.good, folder)
        os.chmod(self.tmp, 0o755)
        os.chmod(folder, 0)
        # The same stack in a job: it had said "no file matches this pattern".
        job = os.path.join(self.tmp, "closed.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "%s"\n[inputs.n]\nstack = "%s"\n[[step]]\nid = "fill"\ndo = "fill"\ninput = "n"\n'
                    % (os.path.join(self.tmp, "job-out"), os.path.join(folder, "*.tif")))
        os.chmod(self.tmp, 0o777)
        as_nobody = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", kt.KALENDS_BIN]
        try:
            done = subprocess.run(as_nobody + ["fill", os.path.join(folder, "*.tif"), "--out", os.path.join(self.tmp, "o")],
                                  capture_output=True, text=True, timeout=60)
            in_job = subprocess.run(as_nobody + ["run", job], capture_output=True, text=True, timeout=60)
        finally:
            os.chmod(folder, 0o755)
            os.chmod(self.tmp, 0o700)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: %s: Permission denied" % os.path.join(folder, "*.tif"))
        self.assertEqual(in_job.returncode, 2, in_job.stdout + in_job.stderr)
        self.assertIn("cannot list the files of this pattern (%s: Permission denied)" % folder, in_job.stderr)

    @unittest.skipUnless(hasattr(os, "geteuid") and os.geteuid() == 0 and shutil.which("setpriv"),
                         "needs root to run kalends as another user")
    def test_a_subfolder_the_user_may_not_read_is_named(self):
        # extract and report walk a folder of outputs: a subfolder closed to the user had given
        # "a path: Permission denied", naming nothing.
        import subprocess
        out = os.path.join(self.tmp, "walked")
        done = kt.run_kalends(["-q", "fill", os.path.join(self.good, "*.tif"), "--out", out, "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        closed = os.path.join(out, "closed")
        os.makedirs(closed)
        points = os.path.join(out, "points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\nA,0,0,2020-03-01\n")
        os.chmod(self.tmp, 0o777)
        os.chmod(closed, 0)
        as_nobody = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", kt.KALENDS_BIN]
        try:
            runs = [subprocess.run(as_nobody + command, capture_output=True, text=True, timeout=60)
                    for command in (["extract", out, "--points", points, "--out", os.path.join(self.tmp, "w.csv")],
                                    ["report", out, "--html", os.path.join(self.tmp, "w.html")])]
        finally:
            os.chmod(closed, 0o755)
            os.chmod(self.tmp, 0o700)
        for done in runs:
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(done.stderr.strip(), "kalends: %s: cannot read this folder: Permission denied" % closed)

    def test_damaged_headers_are_refused_before_any_output(self):
        # Found by fuzzing the inputs (one file of a copy of the good stack each): a stored scale
        # of NaN made its date wholly missing, exit 0; a pixel size of 0 or a NaN origin went
        # into the outputs; complex pixels were read as their real part; all with exit 0.
        g = kt.gdal()
        spoiled = "ndvi_%s.tif" % DATES[1]

        def spoil(name, edit):
            folder = self.variant(name)
            ds = g.Open(os.path.join(folder, spoiled), g.GA_Update)
            edit(ds)
            ds = None
            return folder

        folder = spoil("scale-nan", lambda ds: ds.GetRasterBand(1).SetScale(float("nan")))
        self.check_fails([os.path.join(folder, "*.tif")], [spoiled], ["a scale factor of nan"], "scale NaN")
        folder = spoil("pixel-size-0", lambda ds: ds.SetGeoTransform((GEOTRANSFORM[0], 0, 0, GEOTRANSFORM[3], 0, 0)))
        self.check_fails([os.path.join(folder, "*.tif")], [spoiled], ["places no pixel"], "pixel size 0")
        folder = spoil("origin-nan", lambda ds: ds.SetGeoTransform((float("nan"),) + GEOTRANSFORM[1:]))
        self.check_fails([os.path.join(folder, "*.tif")], [spoiled], ["places no pixel"], "origin NaN")
        folder = self.variant("complex")
        ds = g.GetDriverByName("GTiff").Create(os.path.join(folder, spoiled), WIDTH, HEIGHT, 1, g.GDT_CFloat32)
        ds.SetGeoTransform(GEOTRANSFORM)
        ds.SetProjection(g.Open(os.path.join(folder, "ndvi_%s.tif" % DATES[0])).GetProjection())
        ds.GetRasterBand(1).WriteArray(np.full((HEIGHT, WIDTH), 0.4 + 5j, np.complex64))
        ds = None
        self.check_fails([os.path.join(folder, "*.tif")], [spoiled], ["complex numbers"], "complex")
        # A folder named like a raster had been "not recognized as a supported file format".
        folder = self.variant("folder-named-tif")
        os.makedirs(os.path.join(folder, "ndvi_2020-04-01.tif"))
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-04-01.tif"], ["is a folder, not a raster"],
                         "folder")

    def test_a_tiny_file_declaring_a_huge_raster_is_refused_before_any_output(self):
        # Found by fuzzing: 2 KB files whose header says 200,000 px a side open in GDAL, and a
        # fill made outputs of that size before its first read failed; giving up, it wrote
        # gigabytes of empty tiles (half a minute). One pixel of each file is read first now, so
        # no output is begun (watched while it runs: the old outputs lived for seconds).
        import struct
        import subprocess
        g = kt.gdal()
        folder = os.path.join(self.tmp, "declares-huge")
        os.makedirs(folder)
        srs = g.Open(os.path.join(self.good, "ndvi_%s.tif" % DATES[0])).GetProjection()
        for date in DATES:
            path = os.path.join(folder, "ndvi_%s.tif" % date)
            ds = g.GetDriverByName("GTiff").Create(path, WIDTH, HEIGHT, 1, g.GDT_Float32)
            ds.SetGeoTransform(GEOTRANSFORM)
            ds.SetProjection(srs)
            ds.GetRasterBand(1).Fill(0.4)
            ds = None
            data = bytearray(open(path, "rb").read())
            self.assertEqual(bytes(data[:4]), b"II*\x00")  # classic little-endian TIFF, as GDAL writes
            ifd = struct.unpack("<I", data[4:8])[0]
            for i in range(struct.unpack("<H", data[ifd:ifd + 2])[0]):
                entry = ifd + 2 + 12 * i
                if struct.unpack("<H", data[entry:entry + 2])[0] in (256, 257):  # ImageWidth, ImageLength
                    data[entry + 2:entry + 4] = struct.pack("<H", 4)  # LONG
                    data[entry + 8:entry + 12] = struct.pack("<I", 200000)
            with open(path, "wb") as f:
                f.write(data)
        self.assertEqual(g.Open(path).RasterXSize, 200000)
        out = os.path.join(self.tmp, "declares-huge-out")
        process = subprocess.Popen([kt.KALENDS_BIN, "fill", os.path.join(folder, "*.tif"), "--out", out,
                                    "--threads", "1"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        begun = []
        while process.poll() is None:
            begun += glob.glob(os.path.join(out, ".*.partial"))
        stderr = process.communicate(timeout=300)[1]
        self.assertEqual(process.returncode, 2, stderr)
        self.assertIn("ndvi_%s.tif: cannot read pixels" % DATES[0], stderr)
        self.assertEqual(begun, [])
        self.assertFalse(os.path.exists(out))
        done = kt.run_kalends(["seasons", os.path.join(folder, "*.tif"), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("ndvi_%s.tif: cannot read pixels" % DATES[0], done.stderr)
        # inspect had said "out of memory: give a smaller --memory budget" (it has none).
        done = kt.run_kalends(["inspect", path])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("%s: cannot read pixels" % path, done.stderr)

    def test_unparsable_date(self):
        folder = self.variant("nodate")
        write_layer(os.path.join(folder, "ndvi_latest.tif"), 7)
        line = self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_latest.tif"], ["date"],
                                "no date in name")[0]
        # fill has no --date: the advice had been "give --date" to a command that refuses it.
        self.assertIn("rename it to carry its date", line)
        self.assertNotIn("give --date for", line)

    def test_a_pattern_whose_folder_is_a_file(self):
        # 'ndvi_2020-01-01.tif/*.tif' (a file's name typed as the folder): it had said only that
        # no file matches.
        line = self.check_fails([os.path.join(self.good, "ndvi_2020-01-01.tif", "*.tif")], ["ndvi_2020-01-01.tif"],
                                ["no file matches"], "folder is a file")[0]
        self.assertIn("ndvi_2020-01-01.tif is a file, not a folder", line)

    def test_a_single_undated_file(self):
        # One file is read as a stack of its bands, dated by their metadata; with one band and no
        # date anywhere the message had listed the metadata it looked for, not what to do.
        folder = os.path.join(self.tmp, "single")
        os.makedirs(folder)
        write_layer(os.path.join(folder, "ndvi_latest.tif"), 7)
        line = self.check_fails([os.path.join(folder, "ndvi_latest.tif")], ["ndvi_latest.tif"], ["date"],
                                "single undated file")[0]
        self.assertIn("no date in the file name", line)
        self.assertIn("rename it to carry its date", line)

    def test_unreadable_file(self):
        folder = self.variant("garbage")
        with open(os.path.join(folder, "ndvi_2020-03-21.tif"), "wb") as f:
            f.write(np.random.default_rng(1).integers(0, 256, 5000, dtype=np.uint8).tobytes())
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-03-21.tif"],
                         ["open", "read", "recogni", "format", "corrupt"], "random bytes")

    def test_netcdf_connection_names_the_wrong_part(self):
        # NETCDF:"file":variable: a missing file, a variable the file lacks (its variables
        # listed), and a file that is not NetCDF each say which part is wrong.
        folder = self.variant("netcdf")
        nc = os.path.join(folder, "two.nc")
        g = kt.gdal()
        src = os.path.join(folder, "ndvi_2020-01-01.tif")
        g.Translate(nc, src, format="netCDF")
        self.check_fails(['NETCDF:"%s":ndvi' % os.path.join(folder, "none.nc")], ["none.nc"], ["no such file"],
                         "netcdf: missing file")
        self.check_fails(['NETCDF:"%s":tas' % nc], ["two.nc"], ["no such variable"], "netcdf: missing variable")
        garbage = os.path.join(folder, "garbage.nc")
        with open(garbage, "wb") as f:
            f.write(np.random.default_rng(2).integers(0, 256, 300, dtype=np.uint8).tobytes())
        self.check_fails(['NETCDF:"%s":tas' % garbage], ["garbage.nc"], ["cannot be read as NETCDF"],
                         "netcdf: not a NetCDF file")

    def test_netcdf_times_that_are_no_dates(self):
        # Found with UndefinedBehaviorSanitizer: a time that is NaN or the variable's fill value
        # (9.97e36 for doubles, a record never written) overflowed a cast and was named a date
        # 292 billion years off; an origin whose seconds overflowed an int moved every date 68
        # years back, exit 0; an origin of "00:00:." said only "stod".
        import scipy.io
        folder = os.path.join(self.tmp, "netcdf-times")
        os.makedirs(folder)
        cases = {"fill": ([18000, 9.969209968386869e36, 18060], "days since 1950-01-01",
                          "time value 9.96921e+36 is no date"),
                 "nan": ([18000, float("nan"), 18060], "days since 1950-01-01", "time value nan is no date"),
                 "seconds": ([18000, 18030, 18060], "days since 1950-01-01 00:00:99999999999", "unreadable"),
                 "dot": ([18000, 18030, 18060], "days since 1950-01-01 00:00:.", "unreadable")}
        for name, (times, units, expected) in cases.items():
            path = os.path.join(folder, name + ".nc")
            nc = scipy.io.netcdf_file(path, "w")
            nc.createDimension("time", len(times))
            nc.createDimension("y", 4)
            nc.createDimension("x", 5)
            t = nc.createVariable("time", "f8", ("time",))
            t[:] = times
            t.units = units
            t.calendar = "standard"
            nc.createVariable("tas", "f4", ("time", "y", "x"))[:] = np.full((len(times), 4, 5), 20, np.float32)
            nc.close()
            done = kt.run_kalends(["inspect", 'NETCDF:"%s":tas' % path])
            self.assertEqual(done.returncode, 2, (name, done.stdout, done.stderr))
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn(path, done.stderr)
            self.assertIn(expected, done.stderr)

    def test_truncated_netcdf(self):
        # The netCDF library reads the missing end of a cut classic file as zeros and says
        # nothing: GDAL then gives band times of 0 (the time origin) and pixels of 0. Files
        # written by another library (scipy.io.netcdf_file: classic and 64-bit offset, record
        # dimension, one or two record variables, float and byte) are read whole, and refused
        # once cut by a few bytes; so is the real NetCDF of ../shared/data cut anywhere.
        import scipy.io
        folder = os.path.join(self.tmp, "netcdf-cut")
        os.makedirs(folder)
        files = []
        for version in (1, 2):
            for kind in ("f4", "b"):
                for with_time in (True, False):
                    path = os.path.join(folder, "v%d_%s_%s.nc" % (version, kind, "t" if with_time else "n"))
                    nc = scipy.io.netcdf_file(path, "w", version=version)
                    nc.createDimension("time", None)
                    nc.createDimension("y", 6)
                    nc.createDimension("x", 5)
                    if with_time:
                        t = nc.createVariable("time", "f8", ("time",))
                        t.units = "days since 2001-01-01"
                        t.standard_name = "time"
                        t[:7] = np.arange(7) * 16.0
                    v = nc.createVariable("ndvi", kind, ("time", "y", "x"))
                    v[:7] = (np.random.default_rng(version).random((7, 6, 5)) * 100).astype(kind)
                    nc.close()
                    files.append((path, with_time))
        for path, with_time in files:
            # Without a time variable the file is one record variable alone, whose byte records
            # carry no padding; it has no dates, so only `inspect`'s reason is looked at.
            done = kt.run_kalends(["inspect", 'NETCDF:"%s":ndvi' % path])
            self.assertNotIn("cut short", done.stderr, path)
            if with_time:
                self.assertEqual(done.returncode, 0, "%s whole: %s" % (path, done.stderr))
            with open(path, "rb") as f:
                data = f.read()
            # Float data ends unpadded, so 4 bytes fewer is short; byte records may end in padding.
            cut = path.replace(".nc", "-cut.nc")
            with open(cut, "wb") as f:
                f.write(data[:len(data) - (4 if "_f4_" in path else 8)])
            name = os.path.basename(cut)
            if with_time:
                self.check_fails(['NETCDF:"%s":ndvi' % cut], [name], ["cut short"], "cut " + name)
            else:
                done = kt.run_kalends(["inspect", 'NETCDF:"%s":ndvi' % cut])
                self.assertEqual(done.returncode, 2, done.stderr)
                self.assertEqual(done.stderr.count("\n"), 1, done.stderr)
                self.assertIn(name + ": is cut short", done.stderr)
        real = os.path.join(kt.SHARED_DATA, "monthly-temperature", "bcsd_obs_1999.nc")
        if os.path.exists(real):
            with open(real, "rb") as f:
                data = f.read()
            for keep in (20000, 60000, len(data) - 100):
                cut = os.path.join(folder, "bcsd-%d.nc" % keep)
                with open(cut, "wb") as f:
                    f.write(data[:keep])
                self.check_fails(['NETCDF:"%s":tas' % cut], [os.path.basename(cut)], ["cut short"],
                                 "real NetCDF cut at %d" % keep)
                # A pattern of such files names the damaged one, not a missing variable.
                self.check_fails(['NETCDF:"%s":tas' % os.path.join(folder, "bcsd-%d*.nc" % keep)],
                                 [os.path.basename(cut)], ["cut short"], "pattern, cut at %d" % keep)

    def test_out_in_the_inputs_folder_is_refused_and_users_files_are_kept(self):
        # --out naming the stack's own folder: the outputs would have replaced the inputs (and
        # removed the other years' inputs as outputs of dates no longer in the stack). Refused,
        # exit 2, naming --out; the folder is unchanged.
        folder = self.variant("in-place")
        before = snapshot(folder)
        done = kt.run_kalends(["fill", os.path.join(folder, "ndvi_2020-0[12]*.tif"), "--out", folder])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--out: '%s' holds the input files themselves" % folder, done.stderr)
        self.assertEqual(snapshot(folder), before)
        # The same for the QA layers' folder.
        done = kt.run_kalends(["fill", os.path.join(self.good, "*.tif"), "--qa", os.path.join(self.qa, "*.tif"),
                               "--keep", "bits0-1 in 0,1", "--out", self.qa])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("holds the QA files themselves", done.stderr)
        # A raster of the user's in the output folder, named like an output of a date the stack
        # does not hold, is no output of a fill (no kalends metadata): it stays. A former
        # output of such a date, made from the same input, goes.
        out = os.path.join(self.tmp, "users-raster")
        shutil.copytree(self.previous, out)
        mine = os.path.join(out, "ndvi_2019-12-31.tif")
        write_layer(mine, seed=5)
        fewer = self.variant("fewer-dates")
        done = kt.run_kalends(["-q", "fill", os.path.join(fewer, "*.tif"), "--out", out, "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        dropped = sorted(glob.glob(os.path.join(fewer, "ndvi_*.tif")))[-1]
        os.remove(dropped)
        done = kt.run_kalends(["-q", "fill", os.path.join(fewer, "*.tif"), "--out", out, "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertTrue(os.path.exists(mine))
        self.assertFalse(os.path.exists(os.path.join(out, os.path.basename(dropped))))

    def test_a_users_raster_under_an_output_name_is_not_replaced(self):
        # A raster of the user's that happens to carry an output's name (no KALENDS_VERSION):
        # replacing it would lose it. Refused, exit 2 (the choice of --out, as an --out naming a
        # file; it had been 1, which is kept for failed writes), nothing written.
        out = os.path.join(self.tmp, "users-named")
        os.makedirs(out)
        mine = os.path.join(out, "ndvi_2020-01-01.tif")
        kt.write_raster(mine, np.full((3, 3), 7, np.uint8))
        before = snapshot(out)
        done = kt.run_kalends(["fill", os.path.join(self.good, "*.tif"), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("ndvi_2020-01-01.tif: exists and was not written by kalends", done.stderr)
        self.assertEqual(snapshot(out), before)

    def test_a_folder_another_command_writes_into_is_refused(self):
        # Two commands publishing the same names into one folder would mix their outputs. The
        # folder is held (flock, as kalends holds it) by this test while kalends tries.
        import fcntl
        out = os.path.join(self.tmp, "held")
        shutil.copytree(self.previous, out)
        holder = os.open(out, os.O_RDONLY)
        try:
            fcntl.flock(holder, fcntl.LOCK_EX | fcntl.LOCK_NB)
            for command in (["fill", os.path.join(self.good, "*.tif"), "--lambda", "10"],
                            ["seasons", self.previous]):
                done = kt.run_kalends(command + ["--out", out])
                self.assertEqual(done.returncode, 1, done.stderr)
                self.assertIn("another kalends command is writing into or reading this folder", done.stderr)
                self.assertEqual(snapshot(out), self.previous_files)
        finally:
            os.close(holder)
        done = kt.run_kalends(["-q", "fill", os.path.join(self.good, "*.tif"), "--lambda", "10", "--out", out])
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_a_folder_left_half_published_is_refused_until_written_again(self):
        # An OutputSet renames its finished files one at a time; a run killed among the renames
        # leaves some outputs new and some old. Its marker stays, and readers refuse the folder
        # (the kill itself, milliseconds wide, is not timed here: the marker is placed by hand).
        out = os.path.join(self.tmp, "half")
        shutil.copytree(self.previous, out)
        self.assertFalse(os.path.exists(os.path.join(out, ".kalends-publishing")))  # a finished run's
        open(os.path.join(out, ".kalends-publishing"), "w").close()
        points = os.path.join(self.tmp, "half-points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude,date\nA,0,0,2020-03-01\n")
        for command in (["seasons", out, "--out", os.path.join(self.tmp, "half-seasons")],
                        ["extract", out, "--points", points, "--out", os.path.join(self.tmp, "half.csv")]):
            done = kt.run_kalends(command)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
            self.assertIn("%s: a kalends run was stopped while replacing its outputs here" % out, done.stderr)
        # While the writer is at work (it holds the folder, as every kalends writer does with
        # flock), the reader is told so: it had been told to run the writer again.
        import fcntl
        held = os.open(out, os.O_RDONLY)
        try:
            fcntl.flock(held, fcntl.LOCK_EX)
            done = kt.run_kalends(["seasons", out, "--out", os.path.join(self.tmp, "half-seasons")])
        finally:
            os.close(held)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("%s: another kalends command is replacing its outputs here now; run again when it ends" % out,
                      done.stderr)
        done = kt.run_kalends(["-q", "fill", os.path.join(self.good, "*.tif"), "--out", out, "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertFalse(os.path.exists(os.path.join(out, ".kalends-publishing")))
        done = kt.run_kalends(["-q", "seasons", out, "--out", os.path.join(self.tmp, "half-seasons")])
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_truncated_geotiff_half(self):
        # The header (IFD at the start, as GDAL writes it) survives: the file opens, and the
        # pixels cannot be read. Checked here with GDAL, so the case is the one intended.
        folder = self.variant("truncated")
        path = os.path.join(folder, "ndvi_2020-02-02.tif")
        with open(path, "rb") as f:
            data = f.read()
        with open(path, "wb") as f:
            f.write(data[:len(data) // 2])
        gdal = kt.gdal()
        ds = gdal.Open(path)
        self.assertEqual((ds.RasterXSize, ds.RasterYSize), (WIDTH, HEIGHT))
        with self.assertRaises(RuntimeError):
            ds.GetRasterBand(1).ReadAsArray()
        ds = None
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-02-02.tif"],
                         ["read", "truncat", "corrupt"], "truncated (opens, pixels unreadable)")
        # With a calendar its folder is made too, and removed with the output folder.
        self.check_fails([os.path.join(folder, "*.tif"), "--every", "1M"], ["ndvi_2020-02-02.tif"],
                         ["read", "truncat", "corrupt"], "truncated, with a calendar")

    def test_geotiff_cut_in_its_georeferencing_tags(self):
        # Cut inside the GeoTIFF keys' text (the CRS name): the file opens, GDAL warns that the
        # tags are corrupt and ignores them, so the file has no CRS. It had been named as a CRS
        # that differs from the rest of the stack; it is named as damaged.
        folder = self.variant("cut-tags")
        path = os.path.join(folder, "ndvi_2020-02-02.tif")
        with open(path, "rb") as f:
            at = f.read().find(b"WGS 84")
        self.assertGreater(at, 0)
        os.truncate(path, at + 3)
        gdal = kt.gdal()
        gdal.PushErrorHandler("CPLQuietErrorHandler")
        try:
            ds = gdal.Open(path)
            self.assertEqual(ds.GetProjection(), "")            # the case intended: CRS lost
            self.assertIn("corrupt", gdal.GetLastErrorMsg())
            ds = None
        finally:
            gdal.PopErrorHandler()
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-02-02.tif"], ["is damaged"],
                         "GeoTIFF tags cut")

    def test_a_users_text_file_under_an_output_name_is_not_replaced(self):
        # fill-summary.json of the user's in the output folder (notes, say): refused, exit 2,
        # kept; it had been replaced silently. An earlier fill's is replaced.
        out = os.path.join(self.tmp, "users-text")
        os.makedirs(out)
        with open(os.path.join(out, "fill-summary.json"), "w") as f:
            f.write("my notes\n")
        done = kt.run_kalends(["fill", os.path.join(self.good, "*.tif"), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("fill-summary.json: exists and was not written by kalends", done.stderr)
        with open(os.path.join(out, "fill-summary.json")) as f:
            self.assertEqual(f.read(), "my notes\n")
        done = kt.run_kalends(["-q", "fill", os.path.join(self.good, "*.tif"), "--out", self.previous + "-again"])
        self.assertEqual(done.returncode, 0, done.stderr)
        done = kt.run_kalends(["-q", "fill", os.path.join(self.good, "*.tif"), "--out", self.previous + "-again"])
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_georeferencing_tags_cut_anywhere_are_never_a_grid_mismatch(self):
        # A file cut inside its tags at any length: GDAL warns of corrupt tags or of an IO error
        # reading one (GeoTiePoints, GeoKeyDirectory), or cannot open it. It must never be
        # named as a grid or CRS that differs (which --skip-bad would act on); at some lengths
        # it had been.
        folder = self.variant("cut-anywhere")
        path = os.path.join(folder, "ndvi_2020-02-02.tif")
        with open(path, "rb") as f:
            data = f.read()
        checked = 0
        for cut in range(150, min(len(data), 700), 10):
            with open(path, "wb") as f:
                f.write(data[:cut])
            done = kt.run_kalends(["inspect", os.path.join(folder, "*.tif"), "--quick"])
            if done.returncode == 0:
                continue   # a cut GDAL reads past (the pixels come later)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertNotIn("differs from that of", done.stderr, cut)
            checked += 1
        self.assertGreater(checked, 5)

    def test_command_line_mistakes_are_named(self):
        # A mistyped command or option: one line naming it, exit 2 (CLI11 had said "A
        # subcommand is required" or "The following arguments were not expected: 3 --lamda").
        for args, expected in ((["fil"], "kalends: unknown command 'fil'; the commands: inspect, fill"),
                               ([], "kalends: give a command: inspect, fill"),
                               (["fill", "x/*.tif", "--out", "o", "--lamda", "3"],
                                "kalends: fill: unknown option '--lamda'"),
                               (["fill", "--lamda", "3", "x/*.tif"], "kalends: fill: unknown option '--lamda'"),
                               (["index", "--red", "r.tif", "--offset", "-0.1", "--out", "o"],
                                "kalends: index: --nir is required"),
                               # CLI11's own wording had shown through: "Could not convert: --seed =
                               # abc", "Value 2.5 not in range 0 to 4096", "The following argument was
                               # not expected: y".
                               (["validate", "x/*.tif", "--out", "o", "--seed", "abc"],
                                "kalends: validate: --seed: 'abc' is not a whole number"),
                               (["fill", "x/*.tif", "--out", "o", "--threads", "2.5"],
                                "kalends: fill: --threads: '2.5' is not a whole number from 0 to 4096"),
                               (["fill", "x/*.tif", "y", "--out", "o"],
                                "kalends: fill: unexpected argument 'y' (kalends fill --help says what it takes)"),
                               (["fill", "x/*.tif", "--out", "o", "--threads"], "kalends: fill: --threads: needs a value"),
                               (["fill", "x/*.tif", "--out", "o", "--out", "p"], "kalends: fill: --out: given more than once"),
                               (["fill", "x/*.tif", "--out", "o", "--envelope", "lower"],
                                "kalends: fill: --envelope: 'lower' is not one of none, upper"),
                               (["fill", "x/*.tif", "--out", "o", "--smooth=abc"],
                                "kalends: fill: --smooth: is a switch and takes no value, or true or false ('abc' given)"),
                               # Found by fuzzing: an argument longer than a file name can be (255
                               # bytes) had ended in "terminate called ... File name too long", and
                               # a whole-number option of 30,000 digits in a crash (the stack).
                               (["fill", "x/*.tif", "--out", "o", "a" * 256],
                                "kalends: fill: unexpected argument 'aaaa"),
                               (["fill", "x/*.tif", "--out", "o", "--order", "1" * 30000],
                                "kalends: fill: --order: '1111"),
                               # An empty value ("$EVERY" unset in a script) had been taken as the
                               # option not given: no calendar written, exit 0.
                               (["fill", "a" * 300 + "/*.tif", "--out", "o"], "kalends: " + "a" * 300),
                               (["fill", "x/*.tif", "--out", "o", "--every", ""],
                                "kalends: --every: needs a value ('' given)"),
                               (["fill", "x/*.tif", "--out", "o", "--nodata", ""],
                                "kalends: --nodata: needs a value ('' given)")):
            done = kt.run_kalends(args)
            self.assertEqual(done.returncode, 2, (args, done.stderr))
            self.assertEqual(done.stdout, "")
            lines = done.stderr.strip().splitlines()
            self.assertEqual(len(lines), 1, done.stderr)
            self.assertTrue(lines[0].startswith(expected), (args, lines[0]))

    def test_a_pattern_the_shell_expanded_is_named(self):
        # `kalends fill ndvi/*.tif` unquoted: the shell passes every file. CLI11 listed them as
        # "arguments not expected", without saying why; the pattern needs quotes.
        files = sorted(glob.glob(os.path.join(self.good, "*.tif")))
        done = kt.run_kalends(["fill"] + files + ["--out", os.path.join(self.tmp, "expanded")])
        self.assertEqual(done.returncode, 2, done.stderr)
        lines = done.stderr.strip().splitlines()
        self.assertEqual(len(lines), 1, done.stderr)
        self.assertIn("%d more files than the command takes" % (len(files) - 1), lines[0])
        self.assertIn("needs quotes", lines[0])
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "expanded")))

    def test_truncated_geotiff_header(self):
        # Cut inside the header: the file no longer opens.
        folder = self.variant("truncated-header")
        path = os.path.join(folder, "ndvi_2020-01-17.tif")
        with open(path, "rb") as f:
            data = f.read()
        with open(path, "wb") as f:
            f.write(data[:60])
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-01-17.tif"],
                         ["open", "read", "truncat", "corrupt", "recogni"],
                         "truncated (header cut)")

    def test_missing_qa_partner(self):
        qa = os.path.join(self.tmp, "qa-missing")
        shutil.copytree(self.qa, qa)
        os.remove(os.path.join(qa, "qa_2020-02-18.tif"))
        self.check_fails([os.path.join(self.good, "*.tif"), "--qa", os.path.join(qa, "*.tif"),
                          "--keep", "bits0-1 in 0,1"], ["ndvi_2020-02-18.tif", "2020-02-18"],
                         ["qa"], "missing QA partner")

    def test_bad_keep_rule(self):
        self.check_fails([os.path.join(self.good, "*.tif"), "--qa", os.path.join(self.qa, "*.tif"),
                          "--keep", "bits0-1 between 0,1"], ["--keep"],
                         ["expected", "rule", "keep"], "bad keep rule")

    def test_a_keep_rule_beyond_the_qa_width_is_refused(self):
        # The QA here is 8-bit. A value no 8-bit QA can hold had been taken: 'value == 300'
        # dropped every observation (exit 0), 'value != 300' kept all. A negative number (a
        # stored -1 of signed QA) is written as its unsigned bits, and the message says so.
        for rule, keyword in (("value == 300", "beyond the 8-bit QA values"),
                              ("value != 300", "beyond the 8-bit QA values"),
                              ("bit 8 == 0", "beyond the 8-bit QA values"),
                              ("value != -1", "-1 is 65535 in 16-bit QA, 255 in 8-bit")):
            with self.subTest(rule=rule):
                self.check_fails([os.path.join(self.good, "*.tif"), "--qa", os.path.join(self.qa, "*.tif"),
                                  "--keep", rule], ["--keep"], [keyword], rule)

    def test_a_keep_rule_is_checked_against_every_qa_file(self):
        # A QA stack that mixes 16-bit files and one 8-bit file: the width check had read the
        # first file only, so 'bit 8 == 0' passed and the 8-bit date, whose bit 8 is always 0,
        # kept every observation, clouds included (exit 0).
        qa = os.path.join(self.tmp, "qa_mixed_width")
        os.makedirs(qa, exist_ok=True)
        for i, date in enumerate(DATES):
            values = np.random.default_rng(100 + i).integers(0, 4, (HEIGHT, WIDTH))
            last = i == len(DATES) - 1
            kt.write_raster(os.path.join(qa, "qa_%s.tif" % date),
                            values.astype(np.uint8 if last else np.uint16),
                            geotransform=GEOTRANSFORM, epsg=EPSG)
        self.check_fails([os.path.join(self.good, "*.tif"), "--qa", os.path.join(qa, "*.tif"),
                          "--keep", "bit 8 == 0"], ["--keep", "qa_%s.tif" % DATES[-1]],
                         ["beyond the 8-bit QA values"], "mixed QA widths")

    def test_a_name_that_leaves_the_output_folder_is_refused_by_every_command(self):
        # '--name ../x' had written seasons', index's, diurnal's and suitability's layers into
        # the folder above --out (exit 0); fill refused it already.
        folder = os.path.join(self.tmp, "names")
        for band, value in (("red", 0.1), ("nir", 0.4), ("tmin", 18.0), ("tmax", 30.0)):
            for date in DATES[:3]:
                os.makedirs(os.path.join(folder, band), exist_ok=True)
                kt.write_raster(os.path.join(folder, band, "%s_%s.tif" % (band, date)),
                                np.full((HEIGHT, WIDTH), value, np.float32), geotransform=GEOTRANSFORM, epsg=EPSG)
        inputs = {b: os.path.join(folder, b, "*.tif") for b in ("red", "nir", "tmin", "tmax")}
        commands = {
            "fill": ["fill", os.path.join(self.good, "*.tif")],
            "seasons": ["seasons", self.previous],
            "index": ["index", "--red", inputs["red"], "--nir", inputs["nir"]],
            "diurnal": ["diurnal", "--tmin", inputs["tmin"], "--tmax", inputs["tmax"], "--units", "celsius"],
            "suitability": ["suitability", "--tmin", inputs["tmin"], "--tmax", inputs["tmax"], "--units", "celsius"],
        }
        for command, args in commands.items():
            # "*" and " " found by fuzzing: outputs named "*_2021-01-01.tif" read back as a pattern.
            for name in ("../away", "a/b", ".hidden", "*", " "):
                with self.subTest(command=command, name=name):
                    out = os.path.join(folder, "out_" + command)
                    done = kt.run_kalends(args + ["--out", out, "--name", name])
                    self.assertEqual(done.returncode, 2, done.stderr)
                    self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
                    self.assertIn("--name '%s': must be a plain name" % name, done.stderr)
                    self.assertEqual([f for f in os.listdir(folder) if f.startswith("away")], [])
                    self.assertFalse(os.path.exists(out))

    def test_a_fill_output_cut_short_is_refused_by_report_and_extract(self):
        # report had drawn the unreadable date as a gap and counted it "without a value" (exit 0);
        # extract had named the file twice, in GDAL's words. Both now say what seasons says.
        filled = os.path.join(self.tmp, "cut-short")
        shutil.copytree(self.previous, filled)
        cut = os.path.join(filled, "ndvi_%s.tif" % DATES[2])
        with open(cut, "rb") as f:
            head = f.read(3000)
        with open(cut, "wb") as f:
            f.write(head)
        points = os.path.join(self.tmp, "cut-short-points.csv")
        with open(points, "w") as f:
            f.write("id,x,y,date\nA,%f,%f,%s\n" % (GEOTRANSFORM[0] + 300, GEOTRANSFORM[3] - 300, DATES[2]))
        page = os.path.join(self.tmp, "cut-short.html")
        table = os.path.join(self.tmp, "cut-short.csv")
        for args, written in ((["report", filled, "--html", page, "--pixels", "10,10"], page),
                              (["extract", filled, "--points", points, "--x-column", "x", "--y-column", "y",
                                "--crs", "EPSG:%d" % EPSG, "--out", table], table)):
            with self.subTest(command=args[0]):
                done = kt.run_kalends(args)
                self.assertEqual(done.returncode, 2, done.stderr)
                lines = done.stderr.strip().splitlines()
                self.assertEqual(len(lines), 1, done.stderr)
                self.assertIn("ndvi_%s.tif: cannot read pixels" % DATES[2], lines[0])
                self.assertIn("the file may be truncated or corrupt", lines[0])
                self.assertEqual(lines[0].count("ndvi_%s.tif" % DATES[2]), 1, lines[0])
                self.assertFalse(os.path.exists(written))

    def test_a_date_a_century_from_the_rest_is_refused(self):
        # ndvi_9999-12-31.tif among 2020's dates had made a time grid of about 180,000 steps
        # (1.3 GB for a tiny stack) and left pixels unfitted, exit 0.
        folder = os.path.join(self.tmp, "far-date")
        shutil.copytree(self.good, folder)
        shutil.copy(os.path.join(folder, "ndvi_%s.tif" % DATES[0]), os.path.join(folder, "ndvi_9999-12-31.tif"))
        self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_9999-12-31.tif", "ndvi_%s.tif" % DATES[-1]],
                         ["years after the date before it", "taken for a wrong date"], "a date far from the rest")

    def test_an_empty_file_an_impossible_day_and_a_place_that_is_no_disk_are_named_as_such(self):
        # Each had a message about something else: "not recognized as a supported file format",
        # "expected YYYY-MM-DD" (of a text in that form), "no space left on the device".
        folder = self.variant("empty-file")
        open(os.path.join(folder, "ndvi_2020-01-17.tif"), "w").close()
        messages = self.check_fails([os.path.join(folder, "*.tif")], ["ndvi_2020-01-17.tif"],
                                    ["is empty"], "empty file")
        self.assertIn("is empty (0 bytes)", messages[0])
        done = kt.run_kalends(["inspect", os.path.join(self.good, "ndvi_%s.tif" % DATES[0]), "--date", "2000-02-30"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--date '2000-02-30': is not a calendar date (no such day)", done.stderr)
        points = os.path.join(self.tmp, "proc-points.csv")
        with open(points, "w") as f:
            f.write("id,x,y\nA,%f,%f\n" % (GEOTRANSFORM[0] + 300, GEOTRANSFORM[3] - 300))
        done = kt.run_kalends(["extract", os.path.join(self.good, "ndvi_%s.tif" % DATES[0]), "--points", points,
                               "--x-column", "x", "--y-column", "y", "--crs", "EPSG:%d" % EPSG,
                               "--date-column", "", "--out", "/proc/kalends-test.csv"])
        self.assertNotEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("no space left", done.stderr)

    def test_pattern_matches_nothing(self):
        self.check_fails([os.path.join(self.good, "*.nope")], ["*.nope"],
                         ["no file", "match"], "empty pattern")

    def test_empty_input(self):
        self.check_fails([""], ["the input"], ["is empty"], "empty input")

    def test_unknown_method(self):
        self.check_fails([os.path.join(self.good, "*.tif"), "--method", "kriging"],
                         ["--method", "kriging"], ["unknown", "method"], "unknown method")
        # With an option of a known method, the misspelt name had been reported as that option
        # not applying ("--lambda: applies to the whittaker method only; the methods here: whitaker").
        self.check_fails([os.path.join(self.good, "*.tif"), "--method", "whitaker", "--lambda", "10"],
                         ["--method", "'whitaker'"], ["unknown method"], "misspelt method")
        done = kt.run_kalends(["validate", os.path.join(self.good, "*.tif"), "--out", os.path.join(self.tmp, "v-typo"),
                               "--methods", "whitaker,harmonic", "--lambda", "10"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--methods: unknown method 'whitaker' (known: whittaker, harmonic, spacetime)", done.stderr)

    def test_option_values_out_of_range(self):
        # Each was once taken silently (or, --band 0, crashed): now refused by the option's name.
        stack = os.path.join(self.good, "*.tif")
        cases = [(["--max-gap", "-1"], "--max-gap", "no limit"),
                 (["--reach", "-1"], "--reach", "whole series"),
                 (["--scale", "0"], "--scale", "every value 0"),
                 # NaN had emptied every output (replacing earlier ones), inf filled them with inf.
                 (["--scale", "nan"], "--scale", "finite number"),
                 (["--scale", "inf"], "--scale", "finite number"),
                 (["--offset", "nan"], "--offset", "finite number"),
                 (["--valid-range", "nan,1"], "--valid-range minimum", "must be a number"),
                 (["--band", "0"], "--band", "numbered from 1"),
                 (["--qa", os.path.join(self.qa, "*.tif"), "--keep", "bits0-1 in 0,1", "--qa-band", "0"],
                  "--qa-band", "numbered from 1"),
                 (["--method", "spacetime", "--season-smoothing", "-1"], "--season-smoothing", "0 or more"),
                 # inf had been taken, and every filled value came out without an sd (NaN).
                 (["--method", "spacetime", "--space-smoothing", "inf"], "--space-smoothing", "positive (finite)"),
                 (["--method", "spacetime", "--time-smoothing", "inf"], "--time-smoothing", "positive (finite)"),
                 (["--method", "spacetime", "--climate-smoothing", "inf"], "--climate-smoothing", "positive (finite)"),
                 (["--subset", "0,0,5"], "--subset", "COLUMN,ROW,WIDTH,HEIGHT"),
                 (["--subset", "0,0,5,5", "--tiles", "x/{tile}/"], "--subset", "tile set"),
                 (["--subset", "2,2,0,5"], "region", "at least 1 px"),
                 # An option of another method would do nothing (the default method is whittaker).
                 (["--harmonics", "2"], "--harmonics", "applies to the harmonic method only"),
                 (["--method", "harmonic", "--lambda", "10"], "--lambda", "applies to the whittaker method only"),
                 (["--never-observed", "leave"], "--never-observed", "applies to the spacetime method only"),
                 # Read by whittaker and harmonic; spacetime had taken and ignored them.
                 (["--method", "spacetime", "--max-gap", "20"], "--max-gap",
                  "applies to the whittaker and harmonic methods only"),
                 (["--method", "spacetime", "--max-extrapolation", "0"], "--max-extrapolation",
                  "applies to the whittaker and harmonic methods only"),
                 (["--memory", "1K"], "--memory", "below 1 MiB"),
                 # Found by fuzzing: inf and 2^64 had been taken (a cast out of range).
                 (["--memory", "inf"], "--memory", "more than any machine has"),
                 # A wisdom file no run can write had been taken, the timings silently not kept.
                 (["--method", "spacetime", "--fft-wisdom", "/nonexistent-kalends/w"], "--fft-wisdom",
                  "the folder '/nonexistent-kalends' does not exist"),
                 (["--memory", "18446744073709551616"], "--memory", "more than any machine has"),
                 # A lambda of 1e16 or inf had crashed, 1e25 filled every gap with about 0, and
                 # an infinite range searched for ever.
                 (["--lambda", "1e16"], "--lambda", "and 1e10"),
                 (["--lambda", "inf"], "--lambda", "and 1e10"),
                 (["--lambda-range", "1,inf"], "--lambda-range", "<= 1e10"),
                 (["--lambda-range", "1e20,1e30"], "--lambda-range", "<= 1e10"),
                 # 1e-100 had overflowed the sd of plain NDVI and stopped the fill with exit 1 and
                 # "fill method 'whittaker' returned an sd of inf".
                 (["--lambda", "1e-100"], "--lambda", "between 1e-6 and 1e10"),
                 (["--lambda", "1e-7"], "--lambda", "between 1e-6 and 1e10"),
                 (["--lambda-range", "1e-9,1"], "--lambda-range", "1e-6 <= min"),
                 # A decimal comma (German or French settings) is named as the likely cause.
                 (["--valid-range", "-0,2,1,0"], "--valid-range", "write decimals with a point"),
                 # NaN and -2 had been taken as no limit.
                 (["--max-extrapolation", "nan"], "--max-extrapolation", "-1 (no limit)"),
                 (["--max-extrapolation", "-2"], "--max-extrapolation", "-1 (no limit)")]
        for extra, name, keyword in cases:
            with self.subTest(option=name):
                self.check_fails([stack] + extra, [name], [keyword], name)


class Wording(kt.TempDirTestCase):
    def test_an_out_typed_with_a_slash_is_not_doubled(self):
        # "filled/" as typed had given "filled//calendar-1M" and "filled//fill-summary.json".
        good = os.path.join(self.tmp, "good")
        write_stack(good)
        done = kt.run_kalends(["fill", os.path.join(good, "*.tif"), "--out", os.path.join(self.tmp, "filled") + "/",
                               "--every", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn(os.path.join(self.tmp, "filled", "calendar-1M"), done.stdout + done.stderr)
        self.assertNotIn("//", done.stdout + done.stderr)

    def test_an_error_naming_a_file_with_control_characters_is_one_line(self):
        # A newline in a name had split the one-line error, and a terminal escape (ESC [31m)
        # reached the terminal as a command.
        folder = os.path.join(self.tmp, "odd\nname \x1b[31mred")
        os.makedirs(folder)
        done = kt.run_kalends(["fill", os.path.join(folder, "*.tif"), "--out", os.path.join(self.tmp, "o")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.splitlines()), 1, done.stderr)
        self.assertNotIn("\x1b", done.stderr)
        self.assertIn("odd\\nname \\x1b[31mred", done.stderr)

    def test_a_write_past_a_file_size_limit_names_the_limit(self):
        # GDAL's "TIFFAppendToStrip:Write error at scanline 0" alone had sent the user to the
        # disk; the limit (EFBIG, as SIGXFSZ is ignored) is named. Nothing is left behind.
        import resource
        import subprocess
        good = os.path.join(self.tmp, "good-limit")
        write_stack(good)
        out = os.path.join(self.tmp, "limited")

        def small_files():
            resource.setrlimit(resource.RLIMIT_FSIZE, (4096, 4096))

        done = subprocess.run([kt.KALENDS_BIN, "fill", os.path.join(good, "*.tif"), "--out", out, "--compress", "none"],
                              capture_output=True, text=True, timeout=120, preexec_fn=small_files)
        self.assertEqual(done.returncode, 1, done.stderr)
        self.assertEqual(len(done.stderr.splitlines()), 1, done.stderr)
        self.assertIn("(a file-size limit, ulimit -f, of 4 KiB is set: raise it)", done.stderr)
        self.assertFalse(os.path.exists(out) and glob.glob(os.path.join(out, "*.tif")), os.listdir(out) if os.path.exists(out) else [])

    def test_every_date_marks_help_gives_the_mid_month_rule(self):
        # Version 0.3.24 reads dates on their months' 14th to 16th as middles; the help of all
        # five commands had still said "else start".
        for command in ("fill", "seasons", "suitability", "diurnal", "extract"):
            done = kt.run_kalends([command, "--help"])
            self.assertEqual(done.returncode, 0, done.stderr)
            text = " ".join(done.stdout.split())
            self.assertIn("middle where they are their 14th to 16th, else start", text, command)

    def test_a_wisdom_cache_that_is_no_plain_file_is_passed_over(self):
        # A FIFO named fftw-wisdom in the cache had made a spacetime fill wait for ever.
        import subprocess
        good = os.path.join(self.tmp, "good-fifo")
        write_stack(good)
        cache = os.path.join(self.tmp, "fifo-cache")
        os.makedirs(cache)
        for name in ("fftw-wisdom", "fftw-wisdom.single"):
            os.mkfifo(os.path.join(cache, name))
        env = dict(os.environ, KALENDS_CACHE_DIR=cache)
        done = subprocess.run([kt.KALENDS_BIN, "-q", "fill", os.path.join(good, "*.tif"), "--out",
                               os.path.join(self.tmp, "fifo-out"), "--method", "spacetime", "--threads", "1"],
                              capture_output=True, text=True, timeout=120, env=env)
        self.assertEqual(done.returncode, 0, done.stderr)


class SeasonsOptionsOutOfRange(kt.TempDirTestCase):
    def test_a_period_too_long_and_the_flag_band_are_named(self):
        # --period 365d had failed with "harmonic analysis needs at least 4 periods a year" and
        # exit 1; --band 3 of a fill's outputs (the flag codes) had been averaged into layers.
        good = os.path.join(self.tmp, "good")
        write_stack(good)
        filled = os.path.join(self.tmp, "filled")
        kt.run_fill_ok(self, [os.path.join(good, "*.tif"), "--out", filled, "--every", "1M"])
        # The calendar means' flag band too (their flags mean something else, but are codes).
        calendar = os.path.join(filled, "calendar-1M")
        done = kt.run_kalends(["seasons", calendar, "--out", os.path.join(self.tmp, "out"), "--band", "3"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--band 3: is the flag band", done.stderr)
        for command, extra, name, keyword in (
                ("seasons", ["--period", "365d"], "--period '365d'", "at most 121 days"),
                ("seasons", ["--period", "122d"], "--period '122d'", "at least 4 periods a year"),
                ("seasons", ["--band", "3"], "--band 3", "flag band"),
                ("suitability", ["--band", "3", "--model", "r0-2013"], "--band 3", "flag band")):
            with self.subTest(command=command, option=name):
                option = "--temperature" if command == "suitability" else None
                args = [command] + ([option] if option else []) + [filled, "--out", os.path.join(self.tmp, "out")]
                done = kt.run_kalends(args + extra)
                self.assertEqual(done.returncode, 2, done.stderr)
                lines = done.stderr.strip().splitlines()
                self.assertEqual(len(lines), 1, done.stderr)
                self.assertIn(name, lines[0])
                self.assertIn(keyword, lines[0])
                self.assertFalse(os.path.exists(os.path.join(self.tmp, "out")))
        done = kt.run_kalends(["-q", "seasons", filled, "--out", os.path.join(self.tmp, "s121"), "--period", "121d"])
        self.assertEqual(done.returncode, 0, done.stderr)

    def test_a_folder_of_two_stacks_names_them(self):
        # Two fills into one folder (docs/outputs.md allows it): seasons and suitability of the
        # folder had said "duplicate date ... (also evi_...)" or "grid ... of the rest of the stack".
        mixed = os.path.join(self.tmp, "mixed")
        write_stack(mixed)
        write_stack(mixed, prefix="evi_")
        for args in (["seasons", mixed], ["suitability", "--temperature", mixed, "--model", "r0-2013"]):
            with self.subTest(command=args[0]):
                done = kt.run_kalends(args + ["--out", os.path.join(self.tmp, "out")])
                self.assertEqual(done.returncode, 2, done.stderr)
                lines = done.stderr.strip().splitlines()
                self.assertEqual(len(lines), 1, done.stderr)
                self.assertIn("holds the files of 2 stacks (evi, ndvi)", lines[0])
                self.assertIn(os.path.join(mixed, "evi_*.tif"), lines[0])


class ValidateWithNothingToWithhold(kt.TempDirTestCase):
    """kalends validate transplants one date's missing cells onto another: a stack whose dates
    all miss the same cells (sea, the outside of a boundary) or none gives it nothing to score."""

    def refused(self, mask, keywords):
        folder = os.path.join(self.tmp, "stack-%d" % int(mask.sum()))
        os.makedirs(folder)
        for i, date in enumerate(DATES):
            values = (0.3 + 0.1 * np.random.default_rng(i).random((HEIGHT, WIDTH))).astype(np.float32)
            values[mask] = np.nan
            kt.write_raster(os.path.join(folder, "ndvi_%s.tif" % date), values, geotransform=GEOTRANSFORM,
                            epsg=EPSG, nodata=float("nan"))
        out = os.path.join(self.tmp, "validation-%d" % int(mask.sum()))
        pattern = os.path.join(folder, "*.tif")
        done = kt.run_kalends(["validate", pattern, "--out", out, "--methods", "whittaker"])
        self.assertEqual(done.returncode, 2, done.stderr)
        lines = done.stderr.rstrip("\n").split("\n")
        self.assertEqual(len(lines), 1, done.stderr)
        self.assertIn(pattern, lines[0])
        for k in keywords:
            self.assertIn(k, lines[0])
        self.assertFalse(os.path.exists(os.path.join(out, "report.json")))

    def test_a_method_named_twice(self):
        done = kt.run_kalends(["validate", os.path.join(self.tmp, "*.nope"), "--out", os.path.join(self.tmp, "v"),
                               "--methods", "whittaker,harmonic,whittaker"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--methods: 'whittaker' is named twice", done.stderr)

    def test_the_same_mask_on_every_date(self):
        sea = np.zeros((HEIGHT, WIDTH), dtype=bool)
        sea[:, :20] = True
        self.refused(sea, ["every date misses the same cells", "nothing to score"])

    def test_no_missing_value(self):
        self.refused(np.zeros((HEIGHT, WIDTH), dtype=bool), ["no date has missing values"])



class StacksOfTwoNames(kt.TempDirTestCase):
    def test_a_pattern_over_files_of_two_names_says_so(self):
        # 'm/*.tif' over ndvi_ and evi_ files had been read as one stack named after the first
        # file, every output renamed, with no word (inputs.md: a stack is named after what its
        # files share before their date).
        folder = os.path.join(self.tmp, "mixed")
        write_stack(folder, DATES[:2], prefix="ndvi_")
        write_stack(folder, DATES[2:], prefix="evi_")
        pattern = os.path.join(folder, "*.tif")
        message = "its files have 2 names before their dates (evi: 3 files, ndvi: 2 files): read as one stack, named 'evi'"
        done = kt.run_kalends(["inspect", pattern])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn(message, done.stdout)
        done = kt.run_kalends(["fill", pattern, "--out", os.path.join(self.tmp, "mixed-out"), "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn(message, done.stderr)
        # One name: nothing said.
        done = kt.run_kalends(["fill", os.path.join(folder, "evi_*.tif"), "--out", os.path.join(self.tmp, "evi-out"),
                               "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("names before their dates", done.stderr)

if __name__ == "__main__":
    unittest.main(verbosity=2)
