"""kalends fill on real multi-band files: a CF NetCDF time axis and GRIB valid times.

Data (../shared/data, see its README):
  monthly-temperature/bcsd_obs_1999.nc: monthly gridded observations of Maurer, E.P. et al.
    (2002), J. Climate 15(22):3237-3251; CF-1.0 time axis "days since 1950-01-01".
  hourly-temperature/era5-2mt-2019-03-uk.grib: ERA5 2 m temperature, March 2019, hourly
    [Hersbach, H. et al. (2020), Q. J. R. Meteorol. Soc. 146:1999-2049]; GRIB_VALID_TIME of
    each band in Unix seconds.

Expected dates are decoded here from what GDAL reports, with numpy.datetime64 / Python
datetime: the CF rule is time = origin + value * unit (CF Conventions, section 4.4 "Time
coordinate"); GRIB_VALID_TIME is seconds since 1970-01-01 UTC (GDAL GRIB driver
documentation). Outputs are named <name>_YYYY-MM-DD.tif, with THHMM added for times that are
not midnight.

Run: /usr/bin/python3 -m unittest -v tests/integration/test_real_formats.py
"""

import datetime
import os
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def label(moment):
    """Output date label: YYYY-MM-DD, or YYYY-MM-DDTHHMM when not midnight."""
    if (moment.hour, moment.minute, moment.second) == (0, 0, 0):
        return moment.strftime("%Y-%m-%d")
    return moment.strftime("%Y-%m-%dT%H%M")


def source_band(metadata):
    """Band number in KALENDS_SOURCE ('<path> band N')."""
    source = metadata.get("KALENDS_SOURCE", "")
    words = source.split()
    assert len(words) >= 2 and words[-2] == "band", source
    return int(words[-1])


def same_srs(wkt_a, wkt_b):
    from osgeo import osr
    if not wkt_a or not wkt_b:
        return wkt_a == wkt_b
    a, b = osr.SpatialReference(), osr.SpatialReference()
    a.ImportFromWkt(wkt_a)
    b.ImportFromWkt(wkt_b)
    return bool(a.IsSame(b))


class RealFormats(kt.TempDirTestCase):

    def check_grid(self, out, ds, expected_wkt=None):
        self.assertEqual(out["size"], (ds.RasterXSize, ds.RasterYSize, 3))
        for got, want in zip(out["geotransform"], ds.GetGeoTransform()):
            self.assertAlmostEqual(got, want, delta=1e-9 * max(1.0, abs(want)))
        want = ds.GetProjectionRef() if expected_wkt is None else expected_wkt
        self.assertTrue(same_srs(out["wkt"], want),
                        "CRS differs: %r vs %r" % (out["wkt"][:120], want[:120]))

    def check_values(self, out, band, where):
        """Flag 0 cells hold the band's physical value as float32; NaN only with flag 3."""
        data = band.ReadAsArray().astype(np.float64)
        scale, offset = band.GetScale() or 1.0, band.GetOffset() or 0.0
        nodata = band.GetNoDataValue()
        physical = data * scale + offset
        valid = np.isfinite(physical)
        if nodata is not None:
            # A Float32 band's nodata is stored as a double (1e20 here): compare both forms.
            valid &= (data != nodata) & (data != float(np.float32(nodata)))
        flag, value = out["flag"], out["value"]
        np.testing.assert_array_equal(flag == 0, valid, where)
        np.testing.assert_array_equal(value[valid], physical[valid].astype(np.float32), where)
        np.testing.assert_array_equal(np.isnan(value), flag == 3, where)

    def test_netcdf_cf_time_axis(self):
        nc = kt.shared_path("monthly-temperature", "bcsd_obs_1999.nc")
        kt.require_binary(kt.KALENDS_BIN)
        source = 'NETCDF:"%s":tas' % nc
        gdal = kt.gdal()
        ds = gdal.Open(source)
        md = ds.GetMetadata()
        values = [float(v) for v in md["NETCDF_DIM_time_VALUES"].strip("{}").split(",")]
        units = md["time#units"]
        self.assertTrue(units.startswith("days since 1950-01-01"), units)
        origin = np.datetime64("1950-01-01T00:00:00", "s")
        times = [origin + np.timedelta64(int(round(v * 86400)), "s") for v in values]
        moments = [t.astype(datetime.datetime) for t in times]
        expected = ["tas_%s.tif" % label(m) for m in moments]
        self.assertEqual(len(expected), ds.RasterCount)
        # The file names no grid mapping, so GDAL gives no CRS; its axes are CF longitude and
        # latitude (CF Conventions 4.1, 4.2 and 5.6), which kalends reads as WGS 84 longitude /
        # latitude (the datum is unstated; WGS 84 is common practice).
        self.assertEqual(ds.GetProjectionRef(), "")
        self.assertEqual((md["longitude#standard_name"], md["latitude#units"]), ("longitude", "degrees_north"))
        from osgeo import osr
        wgs84 = osr.SpatialReference()
        wgs84.ImportFromEPSG(4326)

        out_dir = os.path.join(self.tmp, "nc")
        kt.run_fill_ok(self, [source, "--out", out_dir, "--threads", "2"])
        self.assertEqual(kt.final_outputs(out_dir), sorted(expected))
        # Each output's source band carries the same time as the output's name.
        for name, moment in zip(expected, moments):
            out = kt.read_output(os.path.join(out_dir, name))
            b = source_band(out["metadata"])
            band_value = float(ds.GetRasterBand(b).GetMetadataItem("NETCDF_DIM_time"))
            band_time = origin + np.timedelta64(int(round(band_value * 86400)), "s")
            self.assertEqual(band_time.astype(datetime.datetime), moment, name)
            self.assertTrue(out["metadata"]["KALENDS_DATE"].startswith(moment.strftime("%Y-%m-%d")))
            self.check_grid(out, ds, wgs84.ExportToWkt())
            self.check_values(out, ds.GetRasterBand(b), name)
        ds = None

    def test_grib_valid_times(self):
        grib = kt.shared_path("hourly-temperature", "era5-2mt-2019-03-uk.grib")
        kt.require_binary(kt.KALENDS_BIN)
        gdal = kt.gdal()
        ds = gdal.Open(grib)
        valid = [int(ds.GetRasterBand(b).GetMetadataItem("GRIB_VALID_TIME"))
                 for b in range(1, ds.RasterCount + 1)]
        self.assertEqual(len(valid), 744)
        moments = [datetime.datetime.fromtimestamp(v, tz=datetime.timezone.utc).replace(tzinfo=None)
                   for v in valid]
        name = "era5-2mt-2019-03-uk"
        expected = ["%s_%s.tif" % (name, label(m)) for m in moments]

        out_dir = os.path.join(self.tmp, "grib")
        kt.run_fill_ok(self, [grib, "--out", out_dir, "--threads", "2"], timeout=300)
        self.assertEqual(kt.final_outputs(out_dir), sorted(expected))
        self.assertIn("%s_2019-03-01.tif" % name, expected)
        self.assertIn("%s_2019-03-01T0100.tif" % name, expected)
        # The first band and a few others: right band, right time, grid, CRS and values.
        for b in (1, 2, 13, 24, 25, 400, 744):
            out_name = expected[b - 1]
            out = kt.read_output(os.path.join(out_dir, out_name))
            self.assertEqual(source_band(out["metadata"]), b, out_name)
            self.assertEqual(out["metadata"]["KALENDS_DATE"],
                             moments[b - 1].strftime("%Y-%m-%dT%H:%M:%SZ"), out_name)
            self.check_grid(out, ds)
            self.check_values(out, ds.GetRasterBand(b), out_name)
        s = kt.read_summary(out_dir)
        self.assertEqual(s["dates"], 744)
        # GRIB states its unit in band metadata (GRIB_UNIT "[K]" with GRIB_NORMALIZE_UNITS=NO,
        # as kalends reads it; GDAL 3.6's default says "[C]" of the same kelvin values), not as
        # GDAL's unit type: the outputs had carried no unit, and `suitability` refused the fill
        # of this very file.
        written = gdal.Open(os.path.join(out_dir, expected[0]))
        self.assertEqual(written.GetRasterBand(1).GetUnitType(), "K")
        self.assertEqual(written.GetRasterBand(2).GetUnitType(), "K")
        self.assertGreater(float(np.nanmedian(written.GetRasterBand(1).ReadAsArray())), 250.0)
        written = None
        ds = None


if __name__ == "__main__":
    unittest.main(verbosity=2)
