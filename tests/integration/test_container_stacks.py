"""Stacks whose files hold the value and its QA together.

Distributors often deliver one NetCDF (or HDF) file per date holding several variables, the
index and its QA side by side; exports from other tools deliver one GeoTIFF per date with the
QA as a second band. kalends reads one variable of every file of a pattern written inside
GDAL's own connection string ('NETCDF:"nc/*.nc":ndvi'), and the QA from any band (--qa-band).
The check: the real Alaska NDVI (observed/, MOD13A1) and a QA layer, written once per date as
NetCDF files with both variables, once as two-band GeoTIFFs and once as GeoTIFF pairs by GDAL,
fill to identical outputs; a `kalends run` job over the NetCDF files reruns nothing when
nothing changed and reruns when a file arrives; bad containers give one line naming the file.
"""
import glob
import os
import subprocess
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def write_netcdf(path, variables, options=(), column0=0):
    """One NetCDF file holding each 2-D array of `variables` (name -> array) on a lon/lat grid,
    written with GDAL's multidimensional API (the classic API writes one variable per file).
    options=["FORMAT=NC4"]: a NetCDF-4 file, which is HDF5 inside. column0: the grid's first column
    in the whole (for tiles)."""
    g = kt.gdal()
    ds = g.GetDriverByName("netCDF").CreateMultiDimensional(path, [], list(options))
    root = ds.GetRootGroup()
    height, width = next(iter(variables.values())).shape
    axes = []
    for name, size, first, step, units in (("lat", height, 64.995, -0.01, "degrees_north"),
                                           ("lon", width, -147.995 + 0.01 * column0, 0.01, "degrees_east")):
        dim = root.CreateDimension(name, None, None, size)
        axis = root.CreateMDArray(name, [dim], g.ExtendedDataType.Create(g.GDT_Float64))
        axis.Write(np.array([first + step * k for k in range(size)]))
        axis.CreateAttribute("units", [], g.ExtendedDataType.CreateString()).Write(units)
        axes.append(dim)
    for name, array in variables.items():
        gdal_type = g.GDT_Float32 if array.dtype == np.float32 else g.GDT_Byte
        var = root.CreateMDArray(name, axes, g.ExtendedDataType.Create(gdal_type))
        var.Write(array)
    ds = None


class ContainerStacks(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        observed = sorted(glob.glob(os.path.join(kt.shared_path("alaska-ndvi", "observed"), "ndvi_*.tif")))[:16]
        assert len(observed) == 16
        g = kt.gdal()
        rng = np.random.default_rng(5)
        cls.nc = os.path.join(cls.tmp, "nc")
        cls.tif = os.path.join(cls.tmp, "tif")
        cls.h5 = os.path.join(cls.tmp, "h5")
        for folder in (cls.nc, cls.h5, os.path.join(cls.tif, "ndvi"), os.path.join(cls.tif, "qa")):
            os.makedirs(folder)
        cls.dates = []
        for path in observed:
            date = os.path.basename(path)[len("ndvi_"):-len(".tif")]
            cls.dates.append(date)
            ds = g.Open(path)
            ndvi = ds.GetRasterBand(1).ReadAsArray().astype(np.float32)
            ds = None
            # QA: bit 0 set on a tenth of the cells (invented: a check of the mechanics).
            qa = (rng.random(ndvi.shape) < 0.1).astype(np.uint8)
            write_netcdf(os.path.join(cls.nc, "veg_%s.nc" % date.replace("-", "")), {"ndvi": ndvi, "qa": qa})
            write_netcdf(os.path.join(cls.h5, "veg_%s.h5" % date.replace("-", "")), {"ndvi": ndvi, "qa": qa},
                         ["FORMAT=NC4"])
        # The GeoTIFF pairs are what GDAL itself reads from each NetCDF variable.
        for path in sorted(glob.glob(os.path.join(cls.nc, "*.nc"))):
            date = os.path.basename(path)[4:12]
            for var in ("ndvi", "qa"):
                g.Translate(os.path.join(cls.tif, var, "%s_%s.tif" % (var, date)), 'NETCDF:"%s":%s' % (path, var))
        # Two-band GeoTIFFs: the value in band 1, its QA in band 2.
        cls.two_band = os.path.join(cls.tmp, "two-band")
        os.makedirs(cls.two_band)
        for path in sorted(glob.glob(os.path.join(cls.nc, "*.nc"))):
            date = os.path.basename(path)[4:12]
            g.BuildVRT(os.path.join(cls.tmp, "pair.vrt"),
                       [os.path.join(cls.tif, var, "%s_%s.tif" % (var, date)) for var in ("ndvi", "qa")],
                       separate=True)
            g.Translate(os.path.join(cls.two_band, "ndvi_%s.tif" % date), os.path.join(cls.tmp, "pair.vrt"),
                        outputType=g.GDT_Float32)
        # The same files cut into two tiles, west and east of column 50.
        cls.tiles = os.path.join(cls.tmp, "tiles")
        for path in sorted(glob.glob(os.path.join(cls.tif, "ndvi", "*.tif"))):
            date = os.path.basename(path)[5:13]
            arrays = {}
            for var in ("ndvi", "qa"):
                ds = g.Open(os.path.join(cls.tif, var, "%s_%s.tif" % (var, date)))
                arrays[var] = ds.GetRasterBand(1).ReadAsArray()
                ds = None
            for tile, columns in (("h01", slice(0, 50)), ("h02", slice(50, 100))):
                os.makedirs(os.path.join(cls.tiles, tile), exist_ok=True)
                write_netcdf(os.path.join(cls.tiles, tile, "veg_%s.nc" % date),
                             {var: np.ascontiguousarray(a[:, columns]) for var, a in arrays.items()},
                             column0=columns.start)
        cls.pattern = 'NETCDF:"%s":ndvi' % os.path.join(cls.nc, "*.nc")
        cls.qa_pattern = 'NETCDF:"%s":qa' % os.path.join(cls.nc, "*.nc")

    def assert_same_outputs(self, folder, reference, names, georeferencing=False):
        for name in names:
            a, b = kt.read_output(os.path.join(folder, name)), kt.read_output(os.path.join(reference, name))
            for band in ("value", "sd", "flag"):
                np.testing.assert_array_equal(a[band], b[band], err_msg=name + " " + band)
            if georeferencing:
                self.assertEqual(a["geotransform"], b["geotransform"])

    def test_fill_equals_the_same_values_as_geotiffs(self):
        from_nc = os.path.join(self.tmp, "out-nc")
        from_tif = os.path.join(self.tmp, "out-tif")
        kt.run_fill_ok(self, [self.pattern, "--qa", self.qa_pattern, "--keep", "bit 0 == 0", "--out", from_nc])
        kt.run_fill_ok(self, [os.path.join(self.tif, "ndvi", "*.tif"), "--qa", os.path.join(self.tif, "qa", "*.tif"),
                              "--keep", "bit 0 == 0", "--out", from_tif, "--name", "ndvi"])
        names = kt.final_outputs(from_nc)
        self.assertEqual(names, ["ndvi_%s.tif" % d for d in self.dates])  # named after the variable
        self.assertEqual(kt.final_outputs(from_tif), names)
        self.assert_same_outputs(from_nc, from_tif, names, georeferencing=True)
        # The QA of the NetCDF files was read: a tenth of the observed values masked.
        summary = kt.read_summary(from_nc)
        self.assertGreater(summary["masked_by_qa"], 0.05 * summary["observed"])

    def test_the_hdf5_form_reads_the_same_values(self):
        # GDAL's HDF5 driver names a variable HDF5:"f.h5"://ndvi; the date is still the file's.
        pattern = 'HDF5:"%s"://%%s' % os.path.join(self.h5, "*.h5")
        done = kt.run_kalends(["inspect", pattern % "ndvi", "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("16 dates of 'ndvi'", done.stdout)
        self.assertIn("from file name", done.stdout)
        from_h5 = os.path.join(self.tmp, "out-h5")
        from_tif = os.path.join(self.tmp, "out-tif-h5")
        kt.run_fill_ok(self, [pattern % "ndvi", "--qa", pattern % "qa", "--keep", "bit 0 == 0", "--out", from_h5])
        kt.run_fill_ok(self, [os.path.join(self.tif, "ndvi", "*.tif"), "--qa", os.path.join(self.tif, "qa", "*.tif"),
                              "--keep", "bit 0 == 0", "--out", from_tif])
        names = kt.final_outputs(from_h5)
        self.assertEqual(names, kt.final_outputs(from_tif))
        self.assert_same_outputs(from_h5, from_tif, names)  # the HDF5 driver reads no lon/lat grid

    def test_qa_in_a_second_band_equals_the_geotiff_pairs(self):
        two = os.path.join(self.tmp, "out-two-band")
        pairs = os.path.join(self.tmp, "out-pairs")
        both = os.path.join(self.two_band, "*.tif")
        kt.run_fill_ok(self, [both, "--band", "1", "--qa", both, "--qa-band", "2", "--keep", "bit 0 == 0", "--out", two])
        kt.run_fill_ok(self, [os.path.join(self.tif, "ndvi", "*.tif"), "--qa", os.path.join(self.tif, "qa", "*.tif"),
                              "--keep", "bit 0 == 0", "--out", pairs])
        names = kt.final_outputs(two)
        self.assertEqual(names, kt.final_outputs(pairs))
        self.assert_same_outputs(two, pairs, names)
        self.assertGreater(kt.read_summary(two)["masked_by_qa"], 0)
        self.assertEqual(kt.read_output(os.path.join(two, names[0]))["metadata"]["KALENDS_QA"],
                         both + " band 2 keep: bit 0 == 0")
        # Band 0 is refused by name, before anything is written.
        for option in ("--band", "--qa-band"):
            out = os.path.join(self.tmp, "band0")
            done = kt.run_kalends(["fill", both, "--qa", both, "--keep", "bit 0 == 0", option, "0", "--out", out])
            self.assertEqual(done.returncode, 2, option)
            self.assertIn("%s 0: bands are numbered from 1" % option, done.stderr)
            self.assertFalse(os.path.exists(out))

    def test_tiles_of_container_files_equal_the_whole(self):
        tiled = os.path.join(self.tmp, "out-tiles")
        whole = os.path.join(self.tmp, "out-whole")
        files = os.path.join(self.tiles, "h*", "*.nc")
        kt.run_fill_ok(self, ['NETCDF:"%s":ndvi' % files, "--qa", 'NETCDF:"%s":qa' % files, "--keep", "bit 0 == 0",
                              "--tiles", os.path.join(self.tiles, "{tile}", ""), "--mosaic", "--out", tiled])
        kt.run_fill_ok(self, [self.pattern, "--qa", self.qa_pattern, "--keep", "bit 0 == 0", "--out", whole])
        names = kt.final_outputs(whole)
        for tile, columns in (("h01", slice(0, 50)), ("h02", slice(50, 100))):
            self.assertEqual(kt.final_outputs(os.path.join(tiled, tile)), names)  # named after the variable
            for name in names:
                a = kt.read_output(os.path.join(tiled, tile, name))
                b = kt.read_output(os.path.join(whole, name))
                for band in ("value", "sd", "flag"):
                    np.testing.assert_array_equal(a[band], b[band][:, columns], err_msg=tile + " " + name)

    def test_a_job_reruns_only_when_a_file_arrives(self):
        folder = os.path.join(self.tmp, "job")
        live = os.path.join(folder, "nc")
        os.makedirs(live)
        files = sorted(glob.glob(os.path.join(self.nc, "*.nc")))
        for path in files[:-1]:
            os.symlink(path, os.path.join(live, os.path.basename(path)))
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n\n[inputs.ndvi]\nstack = \'NETCDF:"nc/*.nc":ndvi\'\n'
                    'qa = \'NETCDF:"nc/*.nc":qa\'\nkeep = "bit 0 == 0"\n\n[[step]]\ndo = "fill"\ninput = "ndvi"\n')

        def run():
            done = subprocess.run([kt.KALENDS_BIN, "run", job], capture_output=True, text=True, timeout=300)
            self.assertEqual(done.returncode, 0, done.stderr)
            return done.stdout

        first = run()
        self.assertRegex(first, r"fill\s+ran")
        self.assertEqual(len(kt.final_outputs(os.path.join(folder, "out", "fill"))), len(files) - 1)
        self.assertIn("nothing new, nothing done", run())
        os.symlink(files[-1], os.path.join(live, os.path.basename(files[-1])))
        self.assertRegex(run(), r"fill\s+ran")
        self.assertEqual(len(kt.final_outputs(os.path.join(folder, "out", "fill"))), len(files))

    def test_a_job_reads_the_qa_band(self):
        folder = os.path.join(self.tmp, "job-two-band")
        os.makedirs(folder)
        job = os.path.join(folder, "job.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n\n[inputs.ndvi]\nstack = "%s"\nqa = "%s"\nqa_band = 2\nkeep = "bit 0 == 0"\n\n'
                    '[[step]]\ndo = "fill"\ninput = "ndvi"\n' % (os.path.join(self.two_band, "*.tif"),
                                                                   os.path.join(self.two_band, "*.tif")))
        done = subprocess.run([kt.KALENDS_BIN, "run", job], capture_output=True, text=True, timeout=300)
        self.assertEqual(done.returncode, 0, done.stderr)
        summary = kt.read_summary(os.path.join(folder, "out", "fill"))
        self.assertGreater(summary["masked_by_qa"], 0.05 * summary["observed"])
        with open(job) as f:
            text = f.read()
        with open(job, "w") as f:
            f.write(text.replace("qa_band = 2", "qa_band = 0"))
        done = subprocess.run([kt.KALENDS_BIN, "run", job], capture_output=True, text=True, timeout=300)
        self.assertEqual(done.returncode, 2)
        self.assertIn("bands are numbered from 1", done.stderr)

    def test_bad_containers_are_one_line_naming_the_file(self):
        out = os.path.join(self.tmp, "bad")
        # A plain pattern over files with several variables: the line shows the form to use.
        done = kt.run_kalends(["fill", os.path.join(self.nc, "*.nc"), "--out", out])
        self.assertEqual(done.returncode, 2)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("holds several variables; read one from every file with a pattern such as 'NETCDF:\"%s\":ndvi'"
                      % os.path.join(self.nc, "*.nc"), done.stderr)
        # A variable one of the files lacks: the line names that file.
        odd = os.path.join(self.tmp, "odd")
        os.makedirs(odd)
        for path in sorted(glob.glob(os.path.join(self.nc, "*.nc")))[:3]:
            os.symlink(path, os.path.join(odd, os.path.basename(path)))
        write_netcdf(os.path.join(odd, "veg_20990101.nc"), {"evi": np.zeros((100, 100), np.float32),
                                                            "qa": np.zeros((100, 100), np.uint8)})
        done = kt.run_kalends(["fill", 'NETCDF:"%s":ndvi' % os.path.join(odd, "*.nc"), "--out", out])
        self.assertEqual(done.returncode, 2)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertTrue(done.stderr.startswith("kalends: %s: " % os.path.join(odd, "veg_20990101.nc")), done.stderr)
        # No file matches.
        done = kt.run_kalends(["fill", 'NETCDF:"%s":ndvi' % os.path.join(self.tmp, "none", "*.nc"), "--out", out])
        self.assertEqual(done.returncode, 2)
        self.assertIn("no file matches this pattern", done.stderr)
        self.assertFalse(os.path.exists(out))


def write_time_axis_netcdf(path, times, units, values):
    """One NetCDF file with a CF time axis (`times` in `units`) and a float32 variable 'ndvi' of
    shape (time, lat, lon), by GDAL's multidimensional API."""
    g = kt.gdal()
    ds = g.GetDriverByName("netCDF").CreateMultiDimensional(path, [], [])
    root = ds.GetRootGroup()
    dims = [root.CreateDimension("time", "TEMPORAL", None, len(times))]
    axis = root.CreateMDArray("time", dims, g.ExtendedDataType.Create(g.GDT_Float64))
    axis.Write(np.array(times, float))
    axis.CreateAttribute("units", [], g.ExtendedDataType.CreateString()).Write(units)
    for name, size, first, step, unit in (("lat", values.shape[1], 64.995, -0.01, "degrees_north"),
                                          ("lon", values.shape[2], -147.995, 0.01, "degrees_east")):
        dim = root.CreateDimension(name, None, None, size)
        a = root.CreateMDArray(name, [dim], g.ExtendedDataType.Create(g.GDT_Float64))
        a.Write(np.array([first + step * k for k in range(size)]))
        a.CreateAttribute("units", [], g.ExtendedDataType.CreateString()).Write(unit)
        dims.append(dim)
    root.CreateMDArray("ndvi", dims, g.ExtendedDataType.Create(g.GDT_Float32)).Write(values.astype(np.float32))
    ds = None


class TimeZones(kt.TempDirTestCase):
    def test_hourly_records_on_a_zones_clock_are_written_in_utc_and_days_keep_their_day(self):
        # A CF origin with a zone (UDUNITS allows "hours since 2019-03-01 00:00:00 -06:00"):
        # hourly records are instants, and every time kalends writes is UTC (outputs.md), so they
        # move to UTC (value 1 is 07:00 UTC, as Python's datetime converts it); they had kept the
        # zone's clock, labelled UTC, six hours off. Daily stamps at local midnight keep their
        # day (inputs.md). Invented values.
        import datetime as dt
        rng = np.random.default_rng(8)
        hourly = os.path.join(self.tmp, "hourly.nc")
        write_time_axis_netcdf(hourly, range(6), "hours since 2019-03-01 00:00:00 -06:00",
                               rng.uniform(0.2, 0.6, (6, 3, 4)))
        zone = dt.timezone(dt.timedelta(hours=-6))
        expected = [(dt.datetime(2019, 3, 1, tzinfo=zone) + dt.timedelta(hours=k)).astimezone(dt.timezone.utc)
                    for k in range(6)]
        out = os.path.join(self.tmp, "hourly-fill")
        done = kt.run_kalends(["-q", "fill", 'NETCDF:"%s":ndvi' % hourly, "--out", out, "--lambda", "1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(sorted(os.path.basename(p) for p in glob.glob(os.path.join(out, "ndvi_*.tif"))),
                         ["ndvi_%s.tif" % t.strftime("%Y-%m-%dT%H%M") for t in expected])
        g = kt.gdal()
        first = g.Open(os.path.join(out, "ndvi_%s.tif" % expected[0].strftime("%Y-%m-%dT%H%M")))
        self.assertEqual(first.GetMetadataItem("KALENDS_DATE"), expected[0].strftime("%Y-%m-%dT%H:%M:%SZ"))
        first = None
        # The same hours one record per file: the file at local midnight has no time of day of its
        # own, but moves with the others (it had kept the zone's clock: hour 24 before hour 22).
        hours = [0, 1, 2, 22, 23, 24, 25]
        folder = os.path.join(self.tmp, "hourly-files")
        os.makedirs(folder)
        for h in hours:
            write_time_axis_netcdf(os.path.join(folder, "tas_h%03d.nc" % h), [h],
                                   "hours since 2019-03-01 00:00:00 -06:00", rng.uniform(0.2, 0.6, (1, 3, 4)))
        out = os.path.join(self.tmp, "hourly-files-fill")
        done = kt.run_kalends(["-q", "fill", 'NETCDF:"%s":ndvi' % os.path.join(folder, "*.nc"), "--out", out,
                               "--lambda", "1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        utc = [(dt.datetime(2019, 3, 1, tzinfo=zone) + dt.timedelta(hours=h)).astimezone(dt.timezone.utc) for h in hours]
        self.assertEqual(sorted(os.path.basename(p) for p in glob.glob(os.path.join(out, "ndvi_*.tif"))),
                         sorted("ndvi_%s.tif" % t.strftime("%Y-%m-%dT%H%M") for t in utc))
        for h, t in zip(hours, utc):
            ds = g.Open(os.path.join(out, "ndvi_%s.tif" % t.strftime("%Y-%m-%dT%H%M")))
            self.assertIn("tas_h%03d.nc" % h, ds.GetMetadataItem("KALENDS_SOURCE"))
            ds = None
        daily = os.path.join(self.tmp, "daily.nc")
        write_time_axis_netcdf(daily, [0, 16, 32, 48], "days since 2000-01-01 00:00:00 +05:00",
                               rng.uniform(0.2, 0.6, (4, 3, 4)))
        out = os.path.join(self.tmp, "daily-fill")
        done = kt.run_kalends(["-q", "fill", 'NETCDF:"%s":ndvi' % daily, "--out", out, "--lambda", "1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertEqual(sorted(os.path.basename(p) for p in glob.glob(os.path.join(out, "ndvi_*.tif"))),
                         ["ndvi_%s.tif" % (dt.date(2000, 1, 1) + dt.timedelta(days=d)).isoformat()
                          for d in (0, 16, 32, 48)])


class VariablesOfMoreDimensions(kt.TempDirTestCase):
    def test_a_fourth_dimension_and_a_zarr_array_are_named_for_what_they_are(self):
        # A NetCDF variable of (time, depth, lat, lon) had been refused as "duplicate date" (GDAL
        # gives a band per time and depth), and a 3-D Zarr array, which GDAL opens only with the
        # extra dimension's index, as "no such variable" above a list naming it. Invented data.
        g = kt.gdal()
        path = os.path.join(self.tmp, "depths.nc")
        ds = g.GetDriverByName("netCDF").CreateMultiDimensional(path, [], ["FORMAT=NC4"])
        root = ds.GetRootGroup()
        dims = []
        for name, size, values, units in (("time", 3, [0, 16, 32], "days since 2031-01-01"),
                                          ("depth", 2, [1, 2], "m"),
                                          ("lat", 4, [64.995 - 0.01 * k for k in range(4)], "degrees_north"),
                                          ("lon", 5, [-147.995 + 0.01 * k for k in range(5)], "degrees_east")):
            dim = root.CreateDimension(name, "TEMPORAL" if name == "time" else None, None, size)
            axis = root.CreateMDArray(name, [dim], g.ExtendedDataType.Create(g.GDT_Float64))
            axis.Write(np.array(values, float))
            axis.CreateAttribute("units", [], g.ExtendedDataType.CreateString()).Write(units)
            dims.append(dim)
        root.CreateMDArray("ndvi", dims, g.ExtendedDataType.Create(g.GDT_Float32)).Write(
            np.full((3, 2, 4, 5), 0.5, np.float32))
        del ds, root, dims, dim, axis  # the file is written once nothing holds it
        done = kt.run_kalends(["inspect", 'NETCDF:"%s":ndvi' % path])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("has the dimensions time, depth besides its grid", done.stderr)
        if g.GetDriverByName("Zarr") is None:
            self.skipTest("no Zarr driver in this GDAL")
        three = os.path.join(self.tmp, "three.nc")
        write_time_axis_netcdf(three, [0, 16, 32], "days since 2031-01-01", np.full((3, 4, 5), 0.5))
        store = os.path.join(self.tmp, "three.zarr")
        g.MultiDimTranslate(store, three, format="Zarr")
        done = kt.run_kalends(["inspect", 'ZARR:"%s":/ndvi' % store])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("GDAL cannot read this variable as a raster", done.stderr)
        self.assertNotIn("no such variable", done.stderr)


class ZippedStack(kt.TempDirTestCase):
    def test_a_pattern_inside_a_zip_reads_as_the_files_unpacked(self):
        # '/vsizip/stack.zip/ndvi_*.tif': the pattern had been matched against local folders
        # ("the folder /vsizip/stack.zip does not exist"). Its entries are now listed through
        # GDAL, and the fill equals that of the same files unpacked. A job refuses such an input
        # at its line (it checks each input file for changes). Invented data.
        import zipfile
        rng = np.random.default_rng(6)
        plain = os.path.join(self.tmp, "plain")
        os.makedirs(plain)
        archive = os.path.join(self.tmp, "stack.zip")
        with zipfile.ZipFile(archive, "w") as z:
            for k in range(6):
                name = "ndvi_2031-%02d-01.tif" % (k + 1)
                values = rng.uniform(0.2, 0.6, (5, 7)).astype(np.float32)
                values[rng.random(values.shape) < 0.3] = np.nan
                kt.write_raster(os.path.join(plain, name), values)
                z.write(os.path.join(plain, name), name)
            z.writestr("readme.txt", "not a raster")
        outs = {}
        for label, pattern in (("plain", os.path.join(plain, "ndvi_*.tif")), ("zip", "/vsizip/%s/ndvi_*.tif" % archive)):
            outs[label] = os.path.join(self.tmp, "out-" + label)
            done = kt.run_kalends(["-q", "fill", pattern, "--out", outs[label], "--lambda", "10"])
            self.assertEqual(done.returncode, 0, done.stderr)
        names = sorted(os.path.basename(p) for p in glob.glob(os.path.join(outs["plain"], "ndvi_*.tif")))
        self.assertEqual(len(names), 6)
        self.assertEqual(names, sorted(os.path.basename(p) for p in glob.glob(os.path.join(outs["zip"], "ndvi_*.tif"))))
        for name in names:
            a = kt.gdal().Open(os.path.join(outs["plain"], name)).ReadAsArray()
            b = kt.gdal().Open(os.path.join(outs["zip"], name)).ReadAsArray()
            np.testing.assert_array_equal(a, b)
        # Gzipped files one by one: /vsigzip/ wraps each, so the pattern is the local files'.
        import gzip
        zipped = os.path.join(self.tmp, "gz")
        os.makedirs(zipped)
        for name in names:
            with open(os.path.join(plain, name), "rb") as f, gzip.open(os.path.join(zipped, name + ".gz"), "wb") as g:
                g.write(f.read())
        done = kt.run_kalends(["inspect", "/vsigzip/%s/ndvi_*.tif.gz" % zipped])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("6 dates of 'ndvi'", done.stdout)
        done = kt.run_kalends(["inspect", "/vsizip/%s/ndvi_*.tif" % os.path.join(self.tmp, "none.zip")])
        self.assertEqual(done.returncode, 2)
        self.assertIn("cannot be read (no such archive", done.stderr)
        done = kt.run_kalends(["inspect", "/vsizip/%s/evi_*.tif" % archive])
        self.assertEqual(done.returncode, 2)
        self.assertIn("no file matches this pattern (listed inside /vsizip/%s)" % archive, done.stderr)
        job = os.path.join(self.tmp, "zip.toml")
        with open(job, "w") as f:
            f.write('[job]\nout = "out"\n[inputs.ndvi]\nstack = "/vsizip/%s/ndvi_*.tif"\n'
                    '[[step]]\ndo = "fill"\ninput = "ndvi"\n' % archive)
        done = kt.run_kalends(["run", job])
        self.assertEqual(done.returncode, 2)
        self.assertIn("zip.toml:4: 'stack' inside /vsizip/: a job checks each input file", done.stderr)


if __name__ == "__main__":
    unittest.main(verbosity=2)
