"""kalends grid against Python GDAL and numpy.

- On the real projected raster ../shared/data/landsat7-bands/L7_ETMs.tif (Landsat 7 ETM+, UTM
  25S): kalends grid to EPSG:4326 at a coarser resolution equals gdal.Warp with the same
  options (average resampling, float32, NaN nodata), cell for cell.
- Area-weighted means: aggregating by an integer factor on the raster's own grid equals a
  numpy block mean of the cells with data (gdalwarp -r average skips nodata; GDAL docs).
- A kalends fill output: the flag band takes the mode, filled_share is the share of cells with
  a value whose flag is 1 or 2 (numpy on the same blocks).
- Clipping to a polygon (GeoJSON, read by OGR): cells outside are NaN, inside unchanged.
- The output is a Cloud Optimized GeoTIFF with overviews and the band descriptions.
Run: /usr/bin/python3 -m unittest -v tests/reference/test_grid_gdal.py
"""

import glob
import json
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def run_grid_ok(testcase, args):
    done = kt.run_kalends(["-q", "grid"] + list(args))
    testcase.assertEqual(done.returncode, 0, done.stderr)


def write_named_bands(path, named_arrays, metadata=None, band_metadata=None):
    """A float32 GeoTIFF on an invented UTM 36S grid (100 m cells), one named band per array,
    NaN nodata, as kalends writes its layers."""
    g = kt.gdal()
    from osgeo import osr
    h, w = named_arrays[0][1].shape
    ds = g.GetDriverByName("GTiff").Create(path, w, h, len(named_arrays), g.GDT_Float32)
    ds.SetGeoTransform((300000.0, 100.0, 0, 8000000.0, 0, -100.0))
    srs = osr.SpatialReference()
    srs.ImportFromEPSG(32736)
    ds.SetProjection(srs.ExportToWkt())
    for b, (name, array) in enumerate(named_arrays, 1):
        band = ds.GetRasterBand(b)
        band.WriteArray(array)
        band.SetDescription(name)
        band.SetNoDataValue(float("nan"))
        for key, value in (band_metadata or {}).get(b, {}).items():
            band.SetMetadataItem(key, value)
    for key, value in (metadata or {}).items():
        ds.SetMetadataItem(key, value)
    ds = None


def write_study_area(path, epsg, ring):
    """A GeoJSON study area (invented): one polygon, its ring in the coordinates of EPSG:epsg."""
    with open(path, "w") as f:
        json.dump({"type": "FeatureCollection",
                   "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::%d" % epsg}},
                   "features": [{"type": "Feature", "properties": {"name": "invented"},
                                 "geometry": {"type": "Polygon", "coordinates": [ring]}}]}, f)


class GridAgainstGdalWarp(kt.TempDirTestCase):
    def test_a_layer_with_overviews_is_averaged_from_its_own_cells(self):
        # A downloaded COG, or a kalends output gridded again, has overviews; built by nearest
        # neighbour (gdaladdo's default) they are a thinned sample. The warp had read them for a
        # coarser grid: the "average" of 4 x 4 cells was one cell of the 1/4 overview (up to
        # 0.45 off here). Checked against numpy block means. Invented data.
        g = kt.gdal()
        rng = np.random.default_rng(11)
        values = rng.uniform(0.0, 0.9, size=(64, 64)).astype(np.float32)
        path = os.path.join(self.tmp, "overviews", "layer.tif")
        os.makedirs(os.path.dirname(path))
        kt.write_raster(path, values, geotransform=(500000.0, 30.0, 0, 9000000.0, 0, -30.0), epsg=32736,
                        nodata=float("nan"), description="value")
        ds = g.Open(path, g.GA_Update)
        ds.BuildOverviews("NEAREST", [2, 4])
        ds = None
        for resample, reduce in (("average", np.mean), ("max", np.max)):
            out = os.path.join(self.tmp, "overviews", resample)
            run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "120",
                               "--extent", "500000,8998080,501920,9000000", "--resample", resample])
            written = g.Open(os.path.join(out, "layer.tif"))
            mine = written.GetRasterBand(1).ReadAsArray()
            expected = reduce(values.reshape(16, 4, 16, 4), axis=(1, 3))
            np.testing.assert_allclose(mine, expected, rtol=1e-6, err_msg=resample)


    def test_landsat_to_geographic_equals_gdal_warp(self):
        g = kt.gdal()
        source = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        extent = [-34.93, -8.07, -34.83, -7.98]  # covers the scene (about 35 W, 8 S)
        resolution = 0.001  # about 110 m, ~4 source pixels
        out = os.path.join(self.tmp, "landsat")
        run_grid_ok(self, [source, "--out", out, "--crs", "EPSG:4326", "--resolution", str(resolution),
                           "--extent", ",".join(str(v) for v in extent)])
        mine = g.Open(os.path.join(out, "L7_ETMs.tif"))
        # overviewLevel NONE (gdalwarp -ovr NONE): the scene has overviews, and a warp that reads
        # them averages their cells, not the scene's (kalends did before version 0.3.21).
        ref = g.Warp("", source, format="MEM", dstSRS="EPSG:4326", xRes=resolution, yRes=resolution,
                     outputBounds=extent, resampleAlg="average", outputType=g.GDT_Float32,
                     dstNodata=float("nan"), overviewLevel="NONE")
        self.assertEqual((mine.RasterXSize, mine.RasterYSize, mine.RasterCount),
                         (ref.RasterXSize, ref.RasterYSize, ref.RasterCount))
        np.testing.assert_allclose(mine.GetGeoTransform(), ref.GetGeoTransform(), rtol=0, atol=1e-12)
        cells = 0
        for b in range(1, ref.RasterCount + 1):
            a, r = mine.GetRasterBand(b).ReadAsArray(), ref.GetRasterBand(b).ReadAsArray()
            np.testing.assert_array_equal(a, r)  # NaN where both have no data
            cells += int(np.isfinite(r).sum())
        self.assertGreater(cells, 6 * 1000)
        self.assertEqual(mine.GetMetadata("IMAGE_STRUCTURE").get("LAYOUT"), "COG")


    def test_an_extent_of_part_cells_is_moved_as_gdal_warp_moves_it_and_said(self):
        # gdalwarp -te with -tr makes whole cells from the west and north edges and moves the
        # east and south ones; kalends had done the same without a word, so the study grid ended
        # elsewhere than the user wrote.
        g = kt.gdal()
        layer = os.path.join(self.tmp, "part-cells", "layer.tif")
        os.makedirs(os.path.dirname(layer))
        write_named_bands(layer, (("value", np.arange(40 * 50, dtype=np.float32).reshape(40, 50)),))
        extent = [300000, 7996000, 304500, 8000000]  # 4500 m across (15 cells), 4000 m down (13.33)
        out = os.path.join(self.tmp, "part-cells-out")
        done = kt.run_kalends(["grid", layer, "--out", out, "--crs", "EPSG:32736", "--resolution", "300",
                               "--extent", ",".join(str(v) for v in extent)])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("--extent is not a whole number of 300 cells", done.stderr)
        self.assertIn("YMIN 7996000 to 7996100 (13.3333 cells rounded to 13)", done.stderr)
        self.assertNotIn("XMAX", done.stderr)
        mine = g.Open(os.path.join(out, "layer.tif"))
        ref = g.Warp("", layer, format="MEM", dstSRS="EPSG:32736", xRes=300, yRes=300, outputBounds=extent,
                     resampleAlg="average", outputType=g.GDT_Float32, dstNodata=float("nan"))
        self.assertEqual((mine.RasterXSize, mine.RasterYSize), (ref.RasterXSize, ref.RasterYSize))
        np.testing.assert_allclose(mine.GetGeoTransform(), ref.GetGeoTransform(), rtol=0, atol=1e-9)
        np.testing.assert_array_equal(mine.GetRasterBand(1).ReadAsArray(), ref.GetRasterBand(1).ReadAsArray())
        # Whole cells: no note.
        done = kt.run_kalends(["grid", layer, "--out", out + "-whole", "--crs", "EPSG:32736", "--resolution", "300",
                               "--extent", "300000,7996100,304500,8000000"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("whole number", done.stderr)
        # 30 arc seconds written as 0.0083333 over 0.4 degrees is 48.0002 cells: the edge moves
        # by 0.2 m, which is how the resolution was written, not a grid the user did not mean.
        done = kt.run_kalends(["grid", layer, "--out", out + "-arcsec", "--crs", "EPSG:4326", "--resolution",
                               "0.0083333", "--extent", "33.0,-18.2,33.4,-17.8"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("whole number", done.stderr)

    def test_scaled_digital_numbers_leave_as_physical_values(self):
        # A band stored as digital numbers with a scale (0.004, as many reflectance products) is
        # written as physical values: gdalwarp's average of the raw numbers, times the scale.
        # The output had kept the raw numbers and dropped the scale.
        g = kt.gdal()
        source = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        red = os.path.join(self.tmp, "red.tif")
        g.Translate(red, source, bandList=[3], format="GTiff")
        ds = g.Open(red, g.GA_Update)
        ds.GetRasterBand(1).SetScale(0.004)
        ds.GetRasterBand(1).SetOffset(-0.01)
        ds = None
        out = os.path.join(self.tmp, "scaled")
        run_grid_ok(self, [red, "--out", out, "--crs", "EPSG:31985", "--resolution", "57"])
        mine = g.Open(os.path.join(out, "red.tif"))
        band = mine.GetRasterBand(1)
        self.assertIn(band.GetScale(), (None, 1.0))
        self.assertIn(band.GetOffset(), (None, 0.0))
        plain = os.path.join(self.tmp, "red-plain.tif")   # the same numbers, no scale
        g.Translate(plain, source, bandList=[3], format="GTiff")
        ref = g.Warp("", plain, format="MEM", dstSRS="EPSG:31985", xRes=57, yRes=57, targetAlignedPixels=True,
                     resampleAlg="average", outputType=g.GDT_Float32, dstNodata=float("nan"))
        raw = ref.GetRasterBand(1).ReadAsArray().astype(np.float64)
        np.testing.assert_allclose(band.ReadAsArray(), raw * 0.004 - 0.01, rtol=1e-6, atol=1e-7)

    def test_an_extent_beside_the_data_is_nodata_and_metres_for_degrees_are_refused(self):
        g = kt.gdal()
        source = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        out = os.path.join(self.tmp, "beside")
        done = kt.run_kalends(["grid", source, "--out", out, "--crs", "EPSG:32725", "--resolution", "100",
                               "--extent", "100000,8000000,110000,8010000"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("have no value on the study grid", done.stderr)
        a = g.Open(os.path.join(out, "L7_ETMs.tif")).ReadAsArray()
        self.assertTrue(np.all(np.isnan(a)), "a grid beside the data must be nodata, not %s" % np.unique(a)[:5])
        # An extent in metres for a geographic --crs: refused, naming the latitude.
        done = kt.run_kalends(["grid", source, "--out", os.path.join(self.tmp, "degrees"), "--crs", "EPSG:4326",
                               "--resolution", "0.001", "--extent", "289000,9111000,298500,9120500"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--extent: latitude 9.111e+06 is beyond ±90 degrees", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "degrees")))


    def test_cells_too_large_for_the_data_are_named_as_such(self):
        # No extent or clip: a cell of 0.1 degree holds too little of the scene for GDAL's
        # average, and the layer comes out empty (as gdalwarp -r average gives it). The note had
        # asked whether an extent or clip, given nowhere, lay beside the data.
        source = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        done = kt.run_kalends(["grid", source, "--out", os.path.join(self.tmp, "coarse-cells"), "--crs",
                               "EPSG:4326", "--resolution", "0.1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("have no value on the study grid", done.stderr)
        self.assertIn("are the cells too large for the data", done.stderr)
        self.assertNotIn("extent or clip", done.stderr)

    def test_a_users_raster_under_an_output_name_is_not_replaced(self):
        # grid had replaced it silently (fill, seasons and compare refuse it). Its own outputs
        # (KALENDS_GRID_SOURCE) are replaced on a rerun.
        layer = os.path.join(self.tmp, "mine-in", "layer.tif")
        os.makedirs(os.path.dirname(layer))
        write_named_bands(layer, (("value", np.full((10, 10), 0.5, np.float32)),))
        out = os.path.join(self.tmp, "mine-out")
        os.makedirs(out)
        mine = os.path.join(out, "layer.tif")
        write_named_bands(mine, (("value", np.full((3, 3), 7, np.float32)),))
        with open(mine, "rb") as f:
            before = f.read()
        done = kt.run_kalends(["grid", layer, "--out", out, "--crs", "EPSG:32736", "--resolution", "200"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("layer.tif: exists and was not written by kalends", done.stderr)
        with open(mine, "rb") as f:
            self.assertEqual(f.read(), before)
        os.remove(mine)
        for _ in range(2):
            run_grid_ok(self, [layer, "--out", out, "--crs", "EPSG:32736", "--resolution", "200"])

    def test_sums_and_extremes_of_scaled_bands_are_those_of_the_values(self):
        # Stored numbers with a scale and offset (as surface temperature is delivered): a sum or
        # root mean square with an offset, and a minimum or maximum with a negative scale, must
        # be those of the physical values (numpy on 2 x 2 blocks). Scaling after the warp had
        # given, for the sum, the offset once instead of four times, and swapped min and max.
        rng = np.random.default_rng(1)
        stored = rng.integers(100, 200, (8, 8)).astype(np.int16)
        stored[0, 0] = -999
        g = kt.gdal()
        from osgeo import osr
        for name, (scale, offset) in (("pos", (0.02, -273.15)), ("neg", (-0.5, 100.0))):
            path = os.path.join(self.tmp, "scaled-" + name, "lst.tif")
            os.makedirs(os.path.dirname(path))
            ds = g.GetDriverByName("GTiff").Create(path, 8, 8, 1, g.GDT_Int16)
            ds.SetGeoTransform((300000.0, 100.0, 0, 8000000.0, 0, -100.0))
            srs = osr.SpatialReference()
            srs.ImportFromEPSG(32736)
            ds.SetProjection(srs.ExportToWkt())
            band = ds.GetRasterBand(1)
            band.WriteArray(stored)
            band.SetNoDataValue(-999)
            band.SetScale(scale)
            band.SetOffset(offset)
            ds = None
            physical = np.where(stored != -999, stored * scale + offset, np.nan)
            blocks = physical.reshape(4, 2, 4, 2).transpose(0, 2, 1, 3).reshape(4, 4, 4)
            for resample, reference in (("sum", np.nansum), ("max", np.nanmax), ("min", np.nanmin),
                                        ("rms", lambda x, axis: np.sqrt(np.nanmean(x ** 2, axis=axis)))):
                out = os.path.join(self.tmp, "scaled-%s-%s" % (name, resample))
                run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "200", "--extent",
                                   "300000,7999200,300800,8000000", "--resample", resample])
                got = g.Open(os.path.join(out, "lst.tif")).ReadAsArray()
                np.testing.assert_allclose(got, reference(blocks, axis=2), rtol=1e-5, err_msg=name + " " + resample)

    def test_semiannual_peak_days_average_on_a_half_year_circle(self):
        # The semi-annual harmonic peaks twice a year: days 2 and 181 are nearly in phase (the
        # circular mean on a 182.6-day circle, numpy: about 0.2, i.e. 182.8), not opposite. It
        # had been averaged on a 365.25-day circle: 91.5, the trough.
        days = np.full((2, 2), 100, np.float32)
        days[:, 0] = [2, 3]
        days[:, 1] = [181, 180]
        path = os.path.join(self.tmp, "semi", "ndvi_cycle_synoptic.tif")
        os.makedirs(os.path.dirname(path))
        write_named_bands(path, (("semiannual_peak_doy", days), ("annual_peak_doy", days)),
                          {"KALENDS_LAYER": "cycle descriptors of the synoptic cycle", "KALENDS_PERIOD": "1M"})
        out = os.path.join(self.tmp, "semi-out")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "200", "--extent",
                           "300000,7999800,300200,8000000"])
        ds = kt.gdal().Open(os.path.join(out, "ndvi_cycle_synoptic.tif"))
        cycle = 365.25 / 2
        angle = np.angle(np.mean(np.exp(2j * np.pi * (days - 1) / cycle)))
        expected = 1 + cycle * (angle % (2 * np.pi)) / (2 * np.pi)
        got = float(ds.GetRasterBand(1).ReadAsArray()[0, 0])
        self.assertAlmostEqual(got, float(expected), places=2)
        self.assertTrue(got < 5 or got > 178, got)

    def test_a_netcdf_variable_a_repeated_input_and_an_extent_in_degrees(self):
        # One variable of a NetCDF file (the real Maurer temperature) is gridded as
        # <file>_<variable>.tif; it had been refused as "no such file or folder". The same input
        # twice is named so, and an extent narrower than one cell (degrees for a metric CRS)
        # is refused as such, not with GDAL's "Attempt to create 0x0 dataset".
        source = 'NETCDF:"%s":tas' % kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        out = os.path.join(self.tmp, "netcdf-grid")
        run_grid_ok(self, [source, "--out", out, "--crs", "EPSG:4326", "--resolution", "0.25"])
        ds = kt.gdal().Open(os.path.join(out, "bcsd_obs_1999_tas.tif"))
        self.assertEqual(ds.RasterCount, 12)
        # Each band keeps its own metadata: the gridded file still says its dates (it had lost
        # them, and kalends could no longer read it as a stack).
        source_ds = kt.gdal().Open(source)
        for b in (1, 12):
            self.assertEqual(ds.GetRasterBand(b).GetMetadataItem("NETCDF_DIM_time"),
                             source_ds.GetRasterBand(b).GetMetadataItem("NETCDF_DIM_time"))
        # ... but not the source's fill value: the output's nodata is NaN, and a reader that
        # applies _FillValue or missing_value tags would take 1e20 for it.
        self.assertIsNotNone(source_ds.GetRasterBand(1).GetMetadataItem("_FillValue"))
        for key in ("_FillValue", "missing_value", "scale_factor", "add_offset"):
            self.assertIsNone(ds.GetRasterBand(1).GetMetadataItem(key), key)
        source_ds = None
        ds = None
        done = kt.run_kalends(["inspect", os.path.join(out, "bcsd_obs_1999_tas.tif"), "--quick"])
        self.assertEqual(done.returncode, 0, done.stderr)
        # An --out that is the input folder: the outputs would replace their own inputs.
        folder = os.path.join(self.tmp, "own-folder")
        os.makedirs(folder)
        write_named_bands(os.path.join(folder, "layer.tif"), (("value", np.full((10, 10), 0.5, np.float32)),),
                          {"KALENDS_VERSION": "0.3.13"})
        done = kt.run_kalends(["grid", folder, "--out", folder, "--crs", "EPSG:4326", "--resolution", "0.001"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("would write layer.tif over the input it is made from", done.stderr)
        self.assertEqual(kt.gdal().Open(os.path.join(folder, "layer.tif")).RasterXSize, 10)
        landsat = kt.shared_path("landsat7-bands", "L7_ETMs.tif")
        done = kt.run_kalends(["grid", landsat, landsat, "--out", os.path.join(self.tmp, "twice"), "--crs",
                               "EPSG:32725", "--resolution", "100"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("L7_ETMs.tif: is given twice", done.stderr)
        done = kt.run_kalends(["grid", landsat, "--out", os.path.join(self.tmp, "degrees-utm"), "--crs", "EPSG:32725",
                               "--resolution", "100", "--extent", "-34.9,-8.0,-34.8,-7.9"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--extent: is narrower than one cell of --resolution 100", done.stderr)

    def test_two_inputs_under_one_output_name_are_refused(self):
        # layer.tif in two folders given to one run: the second had replaced the first's output,
        # and the run said it wrote both. Refused before anything is written; their parent
        # folder keeps the two apart (a/layer.tif, b/layer.tif).
        for name, value in (("a", 1.0), ("b", 2.0)):
            os.makedirs(os.path.join(self.tmp, "two", name))
            write_named_bands(os.path.join(self.tmp, "two", name, "layer.tif"),
                              (("value", np.full((10, 10), value, np.float32)),))
        out = os.path.join(self.tmp, "two-out")
        done = kt.run_kalends(["grid", os.path.join(self.tmp, "two", "a"), os.path.join(self.tmp, "two", "b"),
                               "--out", out, "--crs", "EPSG:4326", "--resolution", "0.01"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("would be written as 'layer.tif'", done.stderr)
        self.assertFalse(os.path.exists(out))
        run_grid_ok(self, [os.path.join(self.tmp, "two"), "--out", out, "--crs", "EPSG:4326", "--resolution", "0.0005"])
        g = kt.gdal()
        for name, value in (("a", 1.0), ("b", 2.0)):
            a = g.Open(os.path.join(out, name, "layer.tif")).ReadAsArray()
            self.assertEqual(float(np.nanmax(a)), value)


class AreaWeightedMeans(kt.TempDirTestCase):
    def test_integer_factor_equals_numpy_block_means(self):
        g = kt.gdal()
        rng = np.random.default_rng(7)
        values = rng.normal(0.5, 0.2, size=(1040, 1100)).astype(np.float32)
        values[rng.random(values.shape) < 0.2] = np.nan
        values[:40, :40] = np.nan  # blocks without any data
        path = os.path.join(self.tmp, "layer.tif")
        pixel = 250.0
        kt.write_raster(path, values, geotransform=(500000.0, pixel, 0, 9000000.0, 0, -pixel), epsg=32736,
                        nodata=float("nan"), description="value")
        out = os.path.join(self.tmp, "coarse")
        extent = [500000.0, 9000000.0 - 1040 * pixel, 500000.0 + 1100 * pixel, 9000000.0]
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", str(2 * pixel),
                           "--extent", ",".join(repr(v) for v in extent)])
        ds = g.Open(os.path.join(out, "layer.tif"))
        mine = ds.GetRasterBand(1).ReadAsArray()
        with np.errstate(all="ignore"):
            import warnings
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                expected = np.nanmean(values.reshape(520, 2, 550, 2), axis=(1, 3))
        np.testing.assert_array_equal(np.isnan(mine), np.isnan(expected))
        np.testing.assert_allclose(mine[np.isfinite(mine)], expected[np.isfinite(expected)], rtol=1e-6)
        self.assertEqual(ds.GetRasterBand(1).GetDescription(), "value")
        self.assertGreaterEqual(ds.GetRasterBand(1).GetOverviewCount(), 1)  # a COG with overviews

    def test_flags_take_the_mode_and_filled_share_is_written(self):
        g = kt.gdal()
        rng = np.random.default_rng(3)
        h, w, f = 60, 90, 3
        # Each 3 x 3 block has one majority flag (5 or more of 9 cells), so the mode is unique.
        major = rng.integers(0, 4, size=(h // f, w // f))
        flags = np.repeat(np.repeat(major, f, 0), f, 1).astype(np.float32)
        minority = rng.integers(0, 4, size=flags.shape).astype(np.float32)
        pick = np.zeros((f, f), bool)
        pick[0, :] = True
        pick[1, 0] = True  # 4 of 9 cells may differ
        flags = np.where(np.tile(pick, (h // f, w // f)), minority, flags)
        value = np.where(flags == 3, np.nan, rng.random((h, w))).astype(np.float32)
        sd = np.where(flags == 3, np.nan, 0.01).astype(np.float32)
        path = os.path.join(self.tmp, "ndvi_2020-01-01.tif")
        write_named_bands(path, (("value", value), ("sd", sd), ("flag", flags)),
                          {"KALENDS_DATE": "2020-01-01"})   # as kalends fill writes it
        out = os.path.join(self.tmp, "flags")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "300",
                           "--extent", "300000,%r,%r,8000000" % (8000000.0 - h * 100, 300000.0 + w * 100)])
        ds = g.Open(os.path.join(out, "ndvi_2020-01-01.tif"))
        names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
        self.assertEqual(names, ["value", "sd", "flag", "filled_share"])
        blocks = flags.reshape(h // f, f, w // f, f).transpose(0, 2, 1, 3).reshape(h // f, w // f, f * f)
        # The flag is the one among the cells with a value (flags 0-2) covering most of the study
        # cell, 3 where none has one, so a study cell has a value exactly where its flag is not 3
        # (docs/outputs.md). Cells are whole here, so the largest count; ties go to the higher flag.
        got = ds.GetRasterBand(3).ReadAsArray()
        value_out = ds.GetRasterBand(1).ReadAsArray()
        ties = 0
        for i in range(h // f):
            for j in range(w // f):
                counts = np.bincount(blocks[i, j].astype(int), minlength=4)[:3]
                if counts.sum() == 0:
                    self.assertEqual(got[i, j], 3)
                    continue
                best = np.flatnonzero(counts == counts.max())
                ties += len(best) > 1
                self.assertEqual(int(got[i, j]), best.max(), (i, j, counts))
        self.assertLess(ties, blocks.shape[0] * blocks.shape[1] // 4)
        np.testing.assert_array_equal(np.isnan(value_out), got == 3)
        self.assertTrue((got == 3).any() and (got < 3).any())
        with_value = (blocks <= 2).sum(axis=2)
        filled = ((blocks == 1) | (blocks == 2)).sum(axis=2)
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(with_value > 0, filled / np.maximum(with_value, 1), np.nan)
        np.testing.assert_allclose(ds.GetRasterBand(4).ReadAsArray(), share, rtol=1e-6)
        # kalends extract reads the study grid's value, sd and flag as those of a fill output.
        points = os.path.join(self.tmp, "points.csv")
        cells = [(2, 3), (10, 7), (19, 29)]
        with open(points, "w") as f:
            f.write("id,x,y,date\n")
            for k, (row, col) in enumerate(cells):
                f.write("p%d,%r,%r,2020-01-01\n" % (k, 300000.0 + (col + 0.5) * 300, 8000000.0 - (row + 0.5) * 300))
        table = os.path.join(self.tmp, "table.csv")
        done = kt.run_kalends(["-q", "extract", out, "--points", points, "--out", table, "--x-column", "x",
                               "--y-column", "y", "--crs", "EPSG:32736"])
        self.assertEqual(done.returncode, 0, done.stderr)
        rows = kt.read_table(table)
        bands = [ds.GetRasterBand(b).ReadAsArray() for b in (1, 2, 3)]
        for k, (row, col) in enumerate(cells):
            got = rows[k]
            if np.isnan(bands[0][row, col]):
                self.assertEqual(got["ndvi"], "")
            else:
                self.assertAlmostEqual(float(got["ndvi"]), float(bands[0][row, col]), places=5)
                self.assertAlmostEqual(float(got["ndvi.sd"]), float(bands[1][row, col]), places=6)
            self.assertEqual(float(got["ndvi.flag"]), float(bands[2][row, col]))

    def test_a_cell_without_a_value_has_flag_3_whatever_the_resampling(self):
        # Nearest takes the value of the one cell under the centre, which may have none while
        # the flag counts the cells with a value: the cell had NaN with flag 0-2.
        rng = np.random.default_rng(3)
        value = (0.3 + 0.05 * rng.random((20, 20))).astype(np.float32)
        value[rng.random((20, 20)) < 0.4] = np.nan
        flags = np.where(np.isnan(value), 3, np.where(rng.random((20, 20)) < 0.5, 0, 2)).astype(np.float32)
        value = np.where(flags == 3, np.nan, value).astype(np.float32)
        def gridded(name, value, flags, resolution, extent, resample):
            """An invented fill output (value, sd, flag) put on a study grid; the output dataset."""
            path = os.path.join(self.tmp, name + "-in", "ndvi_2020-01-01.tif")
            os.makedirs(os.path.dirname(path))
            sd = np.where(np.isnan(value), np.nan, 0.01).astype(np.float32)
            write_named_bands(path, (("value", value), ("sd", sd), ("flag", flags)), {"KALENDS_DATE": "2020-01-01"})
            out = os.path.join(self.tmp, name + "-out")
            run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", resolution, "--extent",
                               extent, "--resample", resample])
            return kt.gdal().Open(os.path.join(out, "ndvi_2020-01-01.tif"))

        ds = gridded("nearest", value, flags, "250", "300000,7998000,302000,8000000", "nearest")
        v, f, share = (ds.GetRasterBand(b).ReadAsArray() for b in (1, 3, 4))
        self.assertTrue(np.isnan(v).any())
        np.testing.assert_array_equal(np.isnan(v), f == 3)
        self.assertTrue(np.all(np.isnan(share[np.isnan(v)])))
        # A sum picks up tiny weights of neighbouring cells where a whole block has no value:
        # such a cell (flag 3) has no value or sd either.
        holes = value.copy()
        holes[0:8, 0:8] = np.nan
        hole_flags = np.where(np.isnan(holes), 3, flags).astype(np.float32)
        ds = gridded("sum", holes, hole_flags, "300", "300000,7998200,301800,8000000", "sum")
        v, sd, f = (ds.GetRasterBand(b).ReadAsArray() for b in (1, 2, 3))
        self.assertTrue((f == 3).any())
        self.assertTrue(np.all(np.isnan(v[f == 3])) and np.all(np.isnan(sd[f == 3])))

    def test_a_sliver_of_a_cell_does_not_vote_for_the_flag(self):
        # An invented 8 x 8 fill output, 100 m cells: the study cell over the 3 x 3 cells at the
        # corner holds 5 observed (flag 0) and 4 filled (flag 2); the column beside it is filled.
        # A study grid shifted by 1 mm touches that column by a sliver: the flag must stay 0, as
        # the share of filled cells (4/9) says. GDAL's mode gave the sliver a whole vote.
        g = kt.gdal()
        flags = np.zeros((8, 8), np.float32)
        flags[0, 0:2] = 2
        flags[1, 0:2] = 2
        flags[:, 3] = 2
        value = np.where(flags == 2, 0.5, 0.2).astype(np.float32)
        path = os.path.join(self.tmp, "ndvi_2021-01-10.tif")
        write_named_bands(path, (("value", value), ("sd", np.full((8, 8), 0.01, np.float32)), ("flag", flags)),
                          {"KALENDS_DATE": "2021-01-10"})
        for shift in (0.0, 0.001):
            out = os.path.join(self.tmp, "sliver-%g" % shift)
            run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "300", "--extent",
                               "%r,7999400,%r,8000000" % (300000 + shift, 300600 + shift)])
            ds = g.Open(os.path.join(out, "ndvi_2021-01-10.tif"))
            self.assertEqual(ds.GetRasterBand(3).ReadAsArray()[0, 0], 0, shift)
            self.assertAlmostEqual(float(ds.GetRasterBand(4).ReadAsArray()[0, 0]), 4 / 9, places=4)

    def test_classes_take_the_mode_and_days_of_year_a_circular_mean(self):
        # Seasons' and compare's layers: a class band (CLASS_MEANINGS), the number of seasons and
        # days of year. A 2 x 2 block with peaks on days 360, 362, 3 and 5 lies around New Year:
        # its circular mean (mean of the angles' sines and cosines, e.g. Fisher 1993,
        # Statistical Analysis of Circular Data, from memory) is, for angles this close, nearly
        # the mean offset from the year's turn (day 366.25 = day 1 on a 365.25-day circle):
        # (-6.25 - 4.25 + 2 + 4) / 4 = -1.125, so day 365.125; an arithmetic mean says 182.5.
        g = kt.gdal()
        rng = np.random.default_rng(5)
        h, w, f = 40, 60, 2
        days = rng.uniform(1, 366, size=(h, w)).astype(np.float32)
        days[:2, :2] = [[360, 362], [3, 5]]
        days[5, 7] = np.nan
        classes = rng.integers(0, 4, size=(h, w)).astype(np.float32)
        seasons = rng.integers(0, 3, size=(h, w)).astype(np.float32)
        path = os.path.join(self.tmp, "ndvi_cycle_2020.tif")
        write_named_bands(path, (("main_peak_doy", days), ("year_specific_class", classes), ("seasons", seasons)),
                          band_metadata={2: {"CLASS_MEANINGS": "0: low, 1: 2: 3: high"}})
        out = os.path.join(self.tmp, "cycle")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "200",
                           "--extent", "300000,%r,%r,8000000" % (8000000.0 - h * 100, 300000.0 + w * 100)])
        ds = g.Open(os.path.join(out, "ndvi_cycle_2020.tif"))
        self.assertEqual(ds.GetRasterBand(2).GetMetadataItem("CLASS_MEANINGS"), "0: low, 1: 2: 3: high")

        def blocks(a):
            return a.reshape(h // f, f, w // f, f).transpose(0, 2, 1, 3).reshape(h // f, w // f, f * f)

        angle = 2 * np.pi * (blocks(days).astype(np.float64) - 1) / 365.25
        with np.errstate(invalid="ignore"):
            mean = np.arctan2(np.nanmean(np.sin(angle), axis=2), np.nanmean(np.cos(angle), axis=2))
        expected = 1 + 365.25 * np.mod(mean, 2 * np.pi) / (2 * np.pi)
        got = ds.GetRasterBand(1).ReadAsArray()
        np.testing.assert_allclose(got, expected, atol=1e-3)
        self.assertAlmostEqual(float(got[0, 0]), 365.125, delta=0.01)
        # Classes and counts stay whole numbers, one of each block's most frequent.
        for b, source in ((2, classes), (3, seasons)):
            got = ds.GetRasterBand(b).ReadAsArray()
            self.assertTrue(np.all(got == np.round(got)), b)
            for i in range(h // f):
                for j in range(w // f):
                    counts = np.bincount(blocks(source)[i, j].astype(int))
                    self.assertIn(int(got[i, j]), np.flatnonzero(counts == counts.max()).tolist(), (b, i, j))
            self.assertEqual(ds.GetRasterBand(b).GetMetadataItem("KALENDS_RESAMPLING"), "mode")


class Refusals(kt.TempDirTestCase):
    """Inputs the warper would place wrongly, refused before anything is written."""

    def layer(self, folder, name, geotransform=(300000.0, 100.0, 0, 8000000.0, 0, -100.0), epsg=32736, size=10):
        os.makedirs(folder, exist_ok=True)
        path = os.path.join(folder, name)
        kt.write_raster(path, np.full((size, size), 0.5, np.float32), geotransform=geotransform, epsg=epsg)
        return path

    def test_a_failing_layer_leaves_every_earlier_output_as_it_was(self):
        # The second run fails on a layer without georeferencing: the first run's outputs had
        # already been replaced by the second's (nearest instead of average) when it stopped.
        folder = os.path.join(self.tmp, "in")
        for name in ("a.tif", "b.tif"):
            self.layer(folder, name)
        out = os.path.join(self.tmp, "out")
        # What a killed run leaves: its COG and GDAL's overview file beside it, both swept.
        os.makedirs(out)
        for left in (".a.tif.partial", ".a.tif.partial.ovr.tmp"):
            with open(os.path.join(out, left), "w") as f:
                f.write("left by a killed run")
        run_grid_ok(self, [folder, "--out", out, "--crs", "EPSG:32736", "--resolution", "200"])
        self.assertEqual(sorted(os.listdir(out)), ["a.tif", "b.tif"])
        before = {n: open(os.path.join(out, n), "rb").read() for n in ("a.tif", "b.tif")}
        kt.write_raster(os.path.join(folder, "z.tif"), np.ones((10, 10), np.float32))
        done = kt.run_kalends(["grid", folder, "--out", out, "--crs", "EPSG:32736", "--resolution", "200",
                               "--resample", "nearest"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("z.tif: has no georeferencing", done.stderr)
        self.assertEqual({n: open(os.path.join(out, n), "rb").read() for n in ("a.tif", "b.tif")}, before)
        self.assertEqual(sorted(os.listdir(out)), ["a.tif", "b.tif"])

    def test_a_write_cut_short_is_never_published(self):
        # Under a file-size limit (as a full disk), the COG copy fails only while it is flushed:
        # the truncated file had been published with exit 0, and a job step recorded as done.
        import resource
        import subprocess
        rng = np.random.default_rng(0)
        folder = os.path.join(self.tmp, "big-in")
        os.makedirs(folder)
        kt.write_raster(os.path.join(folder, "big.tif"), rng.random((200, 200)).astype(np.float32),
                        geotransform=(500000, 10, 0, 4000000, 0, -10), epsg=32630)
        out = os.path.join(self.tmp, "big-out")
        limit = lambda: resource.setrlimit(resource.RLIMIT_FSIZE, (150 * 1024, 150 * 1024))
        done = subprocess.run([kt.KALENDS_BIN, "grid", folder, "--out", out, "--crs", "EPSG:32630", "--resolution", "5",
                               "--resample", "nearest"], capture_output=True, text=True, preexec_fn=limit)
        self.assertEqual(done.returncode, 1, done.stderr)
        self.assertIn("big.tif: cannot write", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(out, "big.tif")))
        self.assertEqual([n for n in os.listdir(out) if "partial" in n] if os.path.exists(out) else [], [])

    def test_ground_control_points_place_a_layer(self):
        # A raster placed by GCPs with their CRS (no geotransform) is gridded as gdal.Warp grids
        # it; the first version of the georeferencing check had refused it.
        g = kt.gdal()
        from osgeo import osr
        srs = osr.SpatialReference()
        srs.ImportFromEPSG(32630)
        path = os.path.join(self.tmp, "gcp.tif")
        ds = g.GetDriverByName("GTiff").Create(path, 20, 20, 1, g.GDT_Float32)
        ds.GetRasterBand(1).WriteArray(np.random.default_rng(0).random((20, 20)).astype(np.float32))
        ds.SetGCPs([g.GCP(500000, 4000000, 0, 0, 0), g.GCP(502000, 4000000, 0, 20, 0), g.GCP(500000, 3998000, 0, 0, 20),
                    g.GCP(502000, 3998000, 0, 20, 20)], srs.ExportToWkt())
        ds = None
        out = os.path.join(self.tmp, "gcp-out")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:4326", "--resolution", "0.005"])
        warped = g.Warp("", path, format="MEM", dstSRS="EPSG:4326", xRes=0.005, yRes=0.005, resampleAlg="average",
                        outputType=g.GDT_Float32, dstNodata=float("nan"), targetAlignedPixels=True)
        expected = warped.ReadAsArray()
        warped = None
        ds = g.Open(os.path.join(out, "gcp.tif"))
        got = ds.ReadAsArray()
        ds = None
        np.testing.assert_array_equal(got, expected)

    def test_a_layer_without_a_crs_is_refused(self):
        # It had been put wherever its numbers fell in any projected study CRS.
        path = self.layer(os.path.join(self.tmp, "nocrs"), "n.tif", epsg=None)
        done = kt.run_kalends(["grid", path, "--out", os.path.join(self.tmp, "o"), "--crs", "EPSG:32737",
                               "--resolution", "200"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("n.tif: states no CRS", done.stderr)
        self.assertFalse(os.path.exists(os.path.join(self.tmp, "o")))

    def test_a_layer_across_the_antimeridian_needs_an_extent(self):
        # An invented island district in UTM 60S astride 180 degrees: GDAL's extent for it in
        # EPSG:4326 had been one row around the globe, written without a word.
        path = self.layer(os.path.join(self.tmp, "am"), "lst.tif", (797750, 250, 0, 8146250, 0, -250), 32760, 180)
        done = kt.run_kalends(["grid", path, "--out", os.path.join(self.tmp, "am-out"), "--crs", "EPSG:4326",
                               "--resolution", "0.01"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("lst.tif: crosses the antimeridian", done.stderr)
        out = os.path.join(self.tmp, "am-extent")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:4326", "--resolution", "0.01", "--extent",
                           "179.7,-17.3,180.3,-16.7"])
        warped = kt.gdal().Warp("", path, format="MEM", dstSRS="EPSG:4326", xRes=0.01, yRes=0.01,
                                outputBounds=(179.7, -17.3, 180.3, -16.7), resampleAlg="average",
                                outputType=kt.gdal().GDT_Float32, dstNodata=float("nan"))
        expected = warped.ReadAsArray()
        warped = None
        ds = kt.gdal().Open(os.path.join(out, "lst.tif"))
        got = ds.ReadAsArray()
        ds = None
        self.assertEqual(got.shape, (60, 60))
        np.testing.assert_array_equal(np.isnan(got), np.isnan(expected))
        self.assertGreater(np.isfinite(got).sum(), 1000)
        # A layer far from the line is not refused.
        run_grid_ok(self, [self.layer(os.path.join(self.tmp, "mainland"), "m.tif"), "--out",
                           os.path.join(self.tmp, "m-out"), "--crs", "EPSG:4326", "--resolution", "0.01"])

    def test_a_clip_of_points_is_refused_naming_it(self):
        path = self.layer(os.path.join(self.tmp, "clip-in"), "c.tif")
        points = os.path.join(self.tmp, "points.geojson")
        with open(points, "w") as f:
            json.dump({"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {},
                       "geometry": {"type": "Point", "coordinates": [33.0, -18.0]}}]}, f)
        done = kt.run_kalends(["grid", path, "--out", os.path.join(self.tmp, "clip-out"), "--crs", "EPSG:4326",
                               "--resolution", "0.01", "--clip", points])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("points.geojson: feature 0 holds a Point geometry, not a polygon", done.stderr)
        # A collection (even of a polygon) and a feature without geometry: the warper's message
        # had named the layer.
        for name, geometry in (("collection", {"type": "GeometryCollection", "geometries": [
                                   {"type": "Polygon", "coordinates": [[[32, -19], [34, -19], [34, -17], [32, -19]]]}]}),
                               ("empty", None)):
            clip = os.path.join(self.tmp, name + ".geojson")
            with open(clip, "w") as f:
                json.dump({"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {},
                           "geometry": geometry}]}, f)
            done = kt.run_kalends(["grid", path, "--out", os.path.join(self.tmp, "clip-out"), "--crs", "EPSG:4326",
                                   "--resolution", "0.01", "--clip", clip])
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertIn("%s.geojson: feature 0 holds" % name, done.stderr)

    def test_a_study_grid_larger_than_the_machine_is_refused_before_it_is_made(self):
        # A clip far from the data (the whole bounding box is gridded): 22661 x 22547 cells of
        # UTM 33N at 30 m. The warp had crashed (SIGSEGV) under a memory limit, or grown to the
        # machine's whole memory without one. Run here under an address-space limit of 3 GiB
        # (resource.setrlimit, as `ulimit -v`), which GDAL's usable-memory figure honours.
        import resource
        import subprocess
        path = self.layer(os.path.join(self.tmp, "far-in"), "f.tif", geotransform=(500000.0, 30.0, 0, 4000000.0, 0, -30.0),
                          epsg=32633)
        clip = os.path.join(self.tmp, "far.geojson")
        with open(clip, "w") as f:
            json.dump({"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {},
                       "geometry": {"type": "Polygon", "coordinates": [[[100, 10], [101, 10], [101, 11],
                                                                         [100, 11], [100, 10]]]}}]}, f)
        out = os.path.join(self.tmp, "far-out")

        def limit():
            resource.setrlimit(resource.RLIMIT_AS, (3 << 30, 3 << 30))

        done = subprocess.run([kt.KALENDS_BIN, "grid", path, "--out", out, "--crs", "EPSG:32633", "--clip", clip], capture_output=True, text=True,
                              timeout=120, preexec_fn=limit)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertIn("f.tif: its study grid would be", done.stderr)
        self.assertIn("give an --extent, a coarser --resolution or a clip nearer the data", done.stderr)
        self.assertFalse(os.path.exists(out) and os.listdir(out), out)
        # With an --extent given, a smaller one (it had advised giving one).
        done = subprocess.run([kt.KALENDS_BIN, "grid", path, "--out", out, "--crs", "EPSG:32633", "--resolution", "1",
                               "--extent", "400000,3000000,700000,4100000"], capture_output=True, text=True,
                              timeout=120, preexec_fn=limit)
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("give a smaller --extent", done.stderr)

    def test_a_study_grid_is_of_areas_whatever_its_input_says(self):
        # An input marked AREA_OR_POINT=Point (a fill of a point-sampled stack) had carried Point
        # onto the new grid, whose cells are means over areas.
        path = self.layer(os.path.join(self.tmp, "point-in"), "p.tif")
        ds = kt.gdal().Open(path, 1)
        ds.SetMetadataItem("AREA_OR_POINT", "Point")
        ds = None
        out = os.path.join(self.tmp, "point-out")
        done = kt.run_kalends(["-q", "grid", path, "--out", out, "--crs", "EPSG:4326", "--resolution", "0.01"])
        self.assertEqual(done.returncode, 0, done.stderr)
        ds = kt.gdal().Open(os.path.join(out, "p.tif"))
        self.assertEqual(ds.GetMetadataItem("AREA_OR_POINT"), "Area")
        ds = None

    def test_an_sd_never_goes_negative_and_a_caution_is_shown(self):
        # Lanczos overshoots: an invented fill output whose sd jumps from 0 to 0.2 had come out
        # with sds below 0. Suitability's caution, kept in the files, is shown on the console.
        value = np.full((20, 20), 0.4, np.float32)
        sd = np.where(np.arange(20)[None, :] % 4 < 2, 0.0, 0.2).repeat(20, 0).reshape(20, 20).astype(np.float32)
        flags = np.where(sd > 0, 2, 0).astype(np.float32)
        path = os.path.join(self.tmp, "lanczos-in", "ndvi_2020-01-01.tif")
        os.makedirs(os.path.dirname(path))
        write_named_bands(path, (("value", value), ("sd", sd), ("flag", flags)),
                          {"KALENDS_DATE": "2020-01-01", "KALENDS_CAUTION": "Caution: invented for this test."})
        out = os.path.join(self.tmp, "lanczos-out")
        done = kt.run_kalends(["-q", "grid", path, "--out", out, "--crs", "EPSG:32736", "--resolution", "30",
                               "--resample", "lanczos"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("Caution: invented for this test.", done.stderr)
        ds = kt.gdal().Open(os.path.join(out, "ndvi_2020-01-01.tif"))
        gridded = ds.GetRasterBand(2).ReadAsArray()
        ds = None
        self.assertGreaterEqual(np.nanmin(gridded), 0.0)
        self.assertGreater(np.nanmax(gridded), 0.15)
        # Gridded again with cubic, its filled_share (averaged like the values) stays a share.
        again = os.path.join(self.tmp, "lanczos-again")
        done = kt.run_kalends(["-q", "grid", out, "--out", again, "--crs", "EPSG:32736", "--resolution", "10",
                               "--resample", "cubic"])
        self.assertEqual(done.returncode, 0, done.stderr)
        ds = kt.gdal().Open(os.path.join(again, "ndvi_2020-01-01.tif"))
        names = [ds.GetRasterBand(b).GetDescription() for b in range(1, ds.RasterCount + 1)]
        share = ds.GetRasterBand(names.index("filled_share") + 1).ReadAsArray()
        ds = None
        self.assertGreaterEqual(np.nanmin(share), 0.0)
        self.assertLessEqual(np.nanmax(share), 1.0)


class Clipping(kt.TempDirTestCase):
    def test_cells_outside_the_study_area_are_nodata(self):
        g = kt.gdal()
        values = np.arange(100 * 80, dtype=np.float32).reshape(80, 100)
        path = os.path.join(self.tmp, "layer.tif")
        kt.write_raster(path, values, geotransform=(0.0, 1000.0, 0, 80000.0, 0, -1000.0), epsg=32736)
        area = os.path.join(self.tmp, "area.geojson")
        # The left half of the raster: x from 0 to 50 km (an invented study area).
        write_study_area(area, 32736, [[0, 0], [50000, 0], [50000, 80000], [0, 80000], [0, 0]])
        out = os.path.join(self.tmp, "clipped")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:32736", "--resolution", "1000",
                           "--extent", "0,0,100000,80000", "--clip", area])
        ds = g.Open(os.path.join(out, "layer.tif"))  # kept open while its band is read
        mine = ds.GetRasterBand(1).ReadAsArray()
        self.assertTrue(np.isnan(mine[:, 50:]).all())
        np.testing.assert_array_equal(mine[:, :50], values[:, :50])

    def test_a_clip_keeps_the_cells_on_multiples_of_the_resolution(self):
        # Without --extent the cells lie on multiples of the resolution (gdalwarp -tap), with a
        # clip too, so that layers clipped to different areas (or not) stack cell on cell. With a
        # clip the grid had started at the polygon's corner. Compared with GDAL's own warp.
        g = kt.gdal()
        path = os.path.join(self.tmp, "utm.tif")
        kt.write_raster(path, np.arange(50 * 50, dtype=np.float32).reshape(50, 50),
                        geotransform=(400000.0, 1000.0, 0, 7000000.0, 0, -1000.0), epsg=32606)
        area = os.path.join(self.tmp, "quad.geojson")
        write_study_area(area, 32606, [[410000, 6955000], [440000, 6960000], [435000, 6990000],
                                       [412000, 6985000], [410000, 6955000]])
        out = os.path.join(self.tmp, "aligned")
        run_grid_ok(self, [path, "--out", out, "--crs", "EPSG:4326", "--resolution", "0.01", "--clip", area])
        mine = g.Open(os.path.join(out, "utm.tif"))
        x0, dx, _, y0, _, dy = mine.GetGeoTransform()
        for v in (x0, y0):
            self.assertAlmostEqual(v / 0.01, round(v / 0.01), places=6)
        ref = g.Warp("", path, format="MEM", dstSRS="EPSG:4326", xRes=0.01, yRes=0.01, targetAlignedPixels=True,
                     cutlineDSName=area, cropToCutline=True, resampleAlg="average", outputType=g.GDT_Float32,
                     dstNodata=float("nan"))
        self.assertEqual((mine.RasterXSize, mine.RasterYSize), (ref.RasterXSize, ref.RasterYSize))
        np.testing.assert_allclose(mine.GetGeoTransform(), ref.GetGeoTransform(), rtol=0, atol=1e-12)
        np.testing.assert_array_equal(mine.GetRasterBand(1).ReadAsArray(), ref.GetRasterBand(1).ReadAsArray())
        # A resolution of 0 is a slip, not GDAL's choice.
        done = kt.run_kalends(["grid", path, "--out", os.path.join(self.tmp, "zero"), "--crs", "EPSG:4326",
                               "--resolution", "0"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("--resolution: must be positive", done.stderr)

    def test_an_output_folder_inside_the_input_folder_is_not_read_again(self):
        # grid FOLDER --out FOLDER/study, run twice (a nightly job): the second run grids the
        # same layers into the same files, not its own outputs into FOLDER/study/study; and a
        # layer gridded before keeps its one filled_share band (averaged), with no second one
        # made from its mode flags.
        folder = os.path.join(self.tmp, "layers")
        os.makedirs(folder)
        rng = np.random.default_rng(3)
        flags = rng.integers(0, 3, (40, 80)).astype(np.float32)
        write_named_bands(os.path.join(folder, "ndvi_2021-03-01.tif"),
                          [("value", rng.random((40, 80), dtype=np.float32)), ("sd", np.full((40, 80), 0.1, np.float32)),
                           ("flag", flags)])
        out = os.path.join(folder, "study")
        for _ in range(2):
            done = kt.run_kalends(["grid", folder, "--out", out, "--crs", "EPSG:32736", "--resolution", "400"])
            self.assertEqual(done.returncode, 0, done.stderr)
            self.assertIn("1 layer on a", done.stdout)
        self.assertEqual(sorted(os.listdir(out)), ["ndvi_2021-03-01.tif"])
        g = kt.gdal()
        once = g.Open(os.path.join(out, "ndvi_2021-03-01.tif"))
        names = [once.GetRasterBand(b).GetDescription() for b in range(1, once.RasterCount + 1)]
        self.assertEqual(names, ["value", "sd", "flag", "filled_share"])
        twice = os.path.join(self.tmp, "coarser")
        run_grid_ok(self, [out, "--out", twice, "--crs", "EPSG:32736", "--resolution", "800"])
        again = g.Open(os.path.join(twice, "ndvi_2021-03-01.tif"))
        self.assertEqual([again.GetRasterBand(b).GetDescription() for b in range(1, again.RasterCount + 1)], names)
        # 800 m cells hold 2 x 2 of the 400 m ones: their filled_share is the mean of those.
        fine = once.GetRasterBand(4).ReadAsArray().astype(np.float64)
        coarse = again.GetRasterBand(4).ReadAsArray()
        np.testing.assert_allclose(coarse, fine.reshape(5, 2, 10, 2).mean(axis=(1, 3)), rtol=0, atol=1e-6)

    def test_a_missing_study_area_is_refused(self):
        path = os.path.join(self.tmp, "small.tif")
        kt.write_raster(path, np.ones((10, 10), np.float32), geotransform=(0, 1, 0, 10, 0, -1), epsg=32736)
        out = os.path.join(self.tmp, "refused")
        done = kt.run_kalends(["grid", path, "--out", out, "--crs", "EPSG:4326", "--clip",
                               os.path.join(self.tmp, "no-such-area.gpkg")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("no-such-area.gpkg", done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertFalse(glob.glob(os.path.join(out, "*.tif")))
        # A study area without a feature: refused, naming the file (not the raster).
        empty = os.path.join(self.tmp, "empty.geojson")
        with open(empty, "w") as f:
            json.dump({"type": "FeatureCollection", "features": []}, f)
        done = kt.run_kalends(["grid", path, "--out", out, "--crs", "EPSG:4326", "--clip", empty])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("empty.geojson: holds no feature", done.stderr)
        # An extent beside the data is written, with a note saying so.
        done = kt.run_kalends(["grid", path, "--out", out, "--crs", "EPSG:4326", "--extent", "10,10,11,11",
                               "--resolution", "0.1"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("1 of 1 layers have no value on the study grid", done.stderr)
        # A layer whose first band alone is empty (a month without suitability): it has values,
        # and had been counted among the layers without one.
        months = os.path.join(self.tmp, "months.tif")
        g = kt.gdal()
        ds = g.GetDriverByName("GTiff").Create(months, 10, 10, 2, g.GDT_Float32)
        ds.SetGeoTransform((0, 1, 0, 10, 0, -1))
        ds.SetProjection(g.Open(path).GetProjection())
        ds.GetRasterBand(1).WriteArray(np.full((10, 10), np.nan, np.float32))
        ds.GetRasterBand(2).WriteArray(np.ones((10, 10), np.float32))
        ds = None
        done = kt.run_kalends(["grid", months, "--out", os.path.join(self.tmp, "months-out"), "--crs", "EPSG:32736",
                               "--resolution", "2"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertNotIn("no value on the study grid", done.stderr)
        # Not-a-number cell sizes and extents are refused by name (they passed the old checks).
        for extra, option in ((["--resolution", "nan"], "--resolution"),
                              (["--extent", "nan,0,10,10"], "--extent")):
            done = kt.run_kalends(["grid", path, "--out", out, "--crs", "EPSG:4326"] + extra)
            self.assertEqual(done.returncode, 2, done.stderr)
            self.assertTrue(done.stderr.startswith("kalends: " + option), done.stderr)


if __name__ == "__main__":
    unittest.main(verbosity=2)
