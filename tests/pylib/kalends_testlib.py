"""Shared helpers for the Python reference and integration tests of kalends.

Only mechanics live here: where the binaries and the shared data are, how to run them, how to
write and read small rasters with GDAL. Every expected value is computed in the test files
themselves from numpy / scipy / GDAL or from published formulas.

Paths come from the environment, with defaults relative to the repository root:
  KALENDS_BIN          build/kalends
  KALENDS_PROBE        build/tests/kalends_probe
  KALENDS_SHARED_DATA  ../shared/data
"""

import csv
import glob
import json
import os
import shutil
import subprocess
import tempfile
import unittest

import numpy as np

REPO_ROOT = os.path.abspath(os.path.join(os.path.dirname(__file__), "..", ".."))


def _path_from_env(variable, default):
    value = os.environ.get(variable, default)
    if not os.path.isabs(value):
        value = os.path.join(REPO_ROOT, value)
    return os.path.abspath(value)


KALENDS_BIN = _path_from_env("KALENDS_BIN", "build/kalends")
KALENDS_PROBE = _path_from_env("KALENDS_PROBE", "build/tests/kalends_probe")
SHARED_DATA = _path_from_env("KALENDS_SHARED_DATA", os.path.join("..", "shared", "data"))


def require_binary(path):
    """Fails (not skips) when a binary is missing: a missing build must not look like a pass."""
    if not (os.path.isfile(path) and os.access(path, os.X_OK)):
        raise AssertionError(
            "%s is missing or not executable; build with tools/build.sh or set the environment "
            "variable (KALENDS_BIN / KALENDS_PROBE)" % path)


def shared_path(*parts):
    """Path inside the shared data folder; raises SkipTest with a clear message when absent."""
    path = os.path.join(SHARED_DATA, *parts)
    if not os.path.exists(path):
        raise unittest.SkipTest(
            "shared data not found: %s (set KALENDS_SHARED_DATA to the folder holding the "
            "project's reference data)" % path)
    return path


# ---------------------------------------------------------------------------------------------
# Probe


def f32(values):
    """Values rounded to float32, returned as float64 (what the probe will see)."""
    return np.asarray(values, dtype=np.float32).astype(np.float64)


def _token(v):
    if np.isnan(v):
        return "nan"
    # repr of a float32-representable double is read back exactly by std::stof.
    return repr(float(np.float32(v)))


def probe(header, *arrays):
    """Runs the probe on one problem: `header` then the arrays, one value per token."""
    require_binary(KALENDS_PROBE)
    text = header + "\n" + "\n".join(" ".join(_token(v) for v in a) for a in arrays) + "\n"
    done = subprocess.run([KALENDS_PROBE], input=text, capture_output=True, text=True, timeout=60)
    if done.returncode != 0:
        raise AssertionError("probe failed (%d): %s" % (done.returncode, done.stderr))
    # Python's json accepts NaN, which the probe prints for missing values.
    result = json.loads(done.stdout)
    for key, value in list(result.items()):
        if isinstance(value, list):
            result[key] = np.array(value, dtype=np.float64)
    return result


def rel_diff(actual, expected):
    """max |a - e| / max |e|: the relative difference of two vectors (NaN-free)."""
    actual = np.asarray(actual, dtype=np.float64)
    expected = np.asarray(expected, dtype=np.float64)
    scale = np.max(np.abs(expected))
    if scale == 0:
        return float(np.max(np.abs(actual)))
    return float(np.max(np.abs(actual - expected)) / scale)


# ---------------------------------------------------------------------------------------------
# CLI


def run_kalends(args, timeout=300, cwd=REPO_ROOT):
    """Runs `kalends ARGS` (args without the program) in `cwd`; returns the CompletedProcess."""
    require_binary(KALENDS_BIN)
    return subprocess.run([KALENDS_BIN] + list(args), capture_output=True, text=True,
                          timeout=timeout, cwd=cwd)


def run_fill_ok(testcase, args, timeout=300):
    """Runs `kalends -q fill ARGS` and fails the test with stderr when it does not succeed."""
    done = run_kalends(["-q", "fill"] + list(args), timeout=timeout)
    testcase.assertEqual(done.returncode, 0, "kalends fill %s failed: %s" % (args, done.stderr))
    return done


def make_synthetic_stack(out, width, height, *options, years=1):
    """Writes an invented stack with tools/synth_stack.py; OPTIONS are passed on (say "--qa")."""
    done = subprocess.run(
        ["/usr/bin/python3", os.path.join(REPO_ROOT, "tools", "synth_stack.py"), "--out", out,
         "--width", str(width), "--height", str(height), "--years", str(years), "--quiet"] +
        list(options), capture_output=True, text=True, timeout=120)
    if done.returncode != 0:
        raise RuntimeError("synth_stack.py failed: " + done.stderr)


def read_summary(out_dir):
    with open(os.path.join(out_dir, "fill-summary.json")) as f:
        return json.load(f)


def read_table(path):
    """The rows of a CSV table (kalends extract's), as dicts keyed by the header."""
    with open(path, newline="") as f:
        return list(csv.DictReader(f))


def final_outputs(out_dir):
    """Final-name GeoTIFFs in out_dir (not the hidden .partial files), sorted basenames."""
    return sorted(os.path.basename(p) for p in glob.glob(os.path.join(out_dir, "*.tif")))


class TempDirTestCase(unittest.TestCase):
    """Gives each test class a private temporary folder, removed at the end."""

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.tmp = tempfile.mkdtemp(prefix="kalends-test-")
        # Class cleanups run after tearDownClass, and also when setUpClass fails or skips.
        cls.addClassCleanup(shutil.rmtree, cls.tmp, ignore_errors=True)


# ---------------------------------------------------------------------------------------------
# GDAL


def gdal():
    from osgeo import gdal as _gdal
    _gdal.UseExceptions()
    return _gdal


def write_raster(path, array, geotransform=None, epsg=None, wkt=None, gdal_type=None,
                 scale=None, offset=None, nodata=None, options=None, description=None):
    """Writes a single-band GeoTIFF from a 2-D numpy array."""
    g = gdal()
    from osgeo import osr
    array = np.asarray(array)
    if gdal_type is None:
        gdal_type = {np.dtype("int16"): g.GDT_Int16, np.dtype("uint16"): g.GDT_UInt16,
                     np.dtype("uint8"): g.GDT_Byte, np.dtype("float32"): g.GDT_Float32,
                     np.dtype("float64"): g.GDT_Float64}[array.dtype]
    driver = g.GetDriverByName("GTiff")
    ds = driver.Create(path, array.shape[1], array.shape[0], 1, gdal_type, options or [])
    if geotransform is not None:
        ds.SetGeoTransform(geotransform)
    if epsg is not None or wkt is not None:
        srs = osr.SpatialReference()
        if epsg is not None:
            srs.ImportFromEPSG(epsg)
        else:
            srs.ImportFromWkt(wkt)
        ds.SetProjection(srs.ExportToWkt())
    band = ds.GetRasterBand(1)
    if scale is not None:
        band.SetScale(scale)
    if offset is not None:
        band.SetOffset(offset)
    if nodata is not None:
        band.SetNoDataValue(nodata)
    if description:
        band.SetDescription(description)
    band.WriteArray(array)
    band.FlushCache()
    ds.FlushCache()
    ds = None


def read_output(path):
    """Reads a kalends output: dict with value, sd, flag arrays and the dataset facts."""
    g = gdal()
    ds = g.Open(path)
    out = {
        "value": ds.GetRasterBand(1).ReadAsArray(),
        "sd": ds.GetRasterBand(2).ReadAsArray(),
        "flag": ds.GetRasterBand(3).ReadAsArray(),
        "descriptions": [ds.GetRasterBand(b).GetDescription() for b in (1, 2, 3)],
        "nodata": [ds.GetRasterBand(b).GetNoDataValue() for b in (1, 2, 3)],
        "types": [ds.GetRasterBand(b).DataType for b in (1, 2, 3)],
        "block": ds.GetRasterBand(1).GetBlockSize(),
        "size": (ds.RasterXSize, ds.RasterYSize, ds.RasterCount),
        "geotransform": ds.GetGeoTransform(can_return_null=True),
        "wkt": ds.GetProjectionRef(),
        "metadata": ds.GetMetadata(),
        "compression": ds.GetMetadata("IMAGE_STRUCTURE").get("COMPRESSION"),
    }
    ds = None
    return out
