"""Tile sets: a raster split into 4 tiles and filled tile by tile (halos read from the
neighbouring tiles through the VRT mosaic) gives the values of a fill of the raster as one.

- Per-pixel methods (Whittaker): equal bit for bit.
- The spacetime method: its halo reaches into the neighbouring tiles, so values along a tile's
  inner edges are far closer to the whole raster's than those of the tile filled on its own.
- Real data: ../shared/data/alaska-ndvi/masked50 (MODIS MOD13A1 NDVI, Didan 2015; masks of
  Gerber et al. 2018), a pixel grid only, given an invented georeferencing and cut into 4 tiles.
- Tiles that do not fit one grid are refused with the tile named.

The split into tiles is done with Python GDAL (gdal.Translate srcWin), outside kalends.
Run: /usr/bin/python3 -m unittest -v tests/integration/test_tiles.py
"""

import glob
import os
import re
import shutil
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402


def split_into_tiles(files, tiles_dir, cut_x, cut_y, georeference=None):
    """Writes each file as 4 tiles tiles_dir/hXXvYY/<name>, cut at columns cut_x, rows cut_y."""
    g = kt.gdal()
    for path in files:
        ds = g.Open(path)
        if georeference is not None:
            ds = g.Translate("", ds, format="MEM")
            ds.SetGeoTransform(georeference[0])
            ds.SetProjection(georeference[1])
        width, height = ds.RasterXSize, ds.RasterYSize
        for h, (x0, x1) in enumerate([(0, cut_x), (cut_x, width)]):
            for v, (y0, y1) in enumerate([(0, cut_y), (cut_y, height)]):
                folder = os.path.join(tiles_dir, "h%02dv%02d" % (h, v))
                os.makedirs(folder, exist_ok=True)
                g.Translate(os.path.join(folder, os.path.basename(path)), ds,
                            srcWin=[x0, y0, x1 - x0, y1 - y0])
        ds = None


def tile_values(out_dir, tile, mosaic_window):
    """value, flag stacks of one tile's outputs, and the same window of the mosaic run."""
    x0, y0 = mosaic_window
    tiled, whole = [], []
    for path in sorted(glob.glob(os.path.join(out_dir, "tiles", tile, "*.tif"))):
        t = kt.read_output(path)
        w = kt.read_output(os.path.join(out_dir, "whole", os.path.basename(path)))
        rows, cols = t["value"].shape
        tiled.append(np.stack([t["value"], t["flag"]]))
        whole.append(np.stack([w["value"][y0:y0 + rows, x0:x0 + cols],
                               w["flag"][y0:y0 + rows, x0:x0 + cols]]))
    return np.stack(tiled), np.stack(whole)


# A job filling the tile set in tiles/ with its QA tiles (Whittaker, no halo).
TILED_JOB = ('[job]\nout = "out"\n\n[inputs.ndvi]\nstack = "tiles/h*v*/ndvi_*.tif"\n'
             'qa = "tiles/h*v*/qa_*.tif"\nkeep = "bits0-1 in 0,1"\n\n'
             '[[step]]\nid = "fill"\ndo = "fill"\ninput = "ndvi"\nlambda = 10\ntiles = "tiles/{tile}/"\n')


class TiledFill(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.stack = os.path.join(cls.tmp, "ndvi")
        kt.make_synthetic_stack(cls.stack, 300, 260, "--qa")
        cls.files = sorted(glob.glob(os.path.join(cls.stack, "ndvi_*.tif")))
        cls.qa_files = sorted(glob.glob(os.path.join(cls.tmp, "qa", "qa_*.tif")))
        cls.tiles = os.path.join(cls.tmp, "tiles")
        split_into_tiles(cls.files + cls.qa_files, cls.tiles, 170, 120)

    def fill_both_ways(self, name, method_args):
        out = os.path.join(self.tmp, name)
        kt.run_fill_ok(self, [os.path.join(self.stack, "ndvi_*.tif"), "--qa",
                              os.path.join(self.tmp, "qa", "qa_*.tif"), "--keep", "bits0-1 in 0,1",
                              "--out", os.path.join(out, "whole"), "--threads", "1"] + method_args)
        kt.run_fill_ok(self, [os.path.join(self.tiles, "h*v*", "ndvi_*.tif"), "--qa",
                              os.path.join(self.tiles, "h*v*", "qa_*.tif"), "--keep", "bits0-1 in 0,1",
                              "--tiles", os.path.join(self.tiles, "{tile}", ""), "--mosaic",
                              "--out", os.path.join(out, "tiles"), "--threads", "1"] + method_args)
        return out

    def test_whittaker_tiles_equal_the_whole_raster(self):
        out = self.fill_both_ways("whittaker", ["--method", "whittaker", "--lambda", "auto"])
        origins = {"h00v00": (0, 0), "h01v00": (170, 0), "h00v01": (0, 120), "h01v01": (170, 120)}
        for tile, origin in origins.items():
            tiled, whole = tile_values(out, tile, origin)
            self.assertEqual(tiled.shape[0], len(self.files))
            np.testing.assert_array_equal(tiled, whole, err_msg=tile)
        # The tile outputs keep their place: georeferenced as their window of the whole.
        g = kt.gdal()
        whole = g.Open(sorted(glob.glob(os.path.join(out, "whole", "*.tif")))[0])
        tile = g.Open(sorted(glob.glob(os.path.join(out, "tiles", "h01v01", "*.tif")))[0])
        gw, gt = whole.GetGeoTransform(), tile.GetGeoTransform()
        self.assertAlmostEqual(gt[0], gw[0] + 170 * gw[1])
        self.assertAlmostEqual(gt[3], gw[3] + 120 * gw[5])
        # The mosaic VRT of the tile outputs reads back as the whole raster.
        mosaics = sorted(glob.glob(os.path.join(out, "tiles", "mosaic", "*.vrt")))
        self.assertEqual(len(mosaics), len(self.files))
        m = g.Open(mosaics[3])
        w = g.Open(os.path.join(out, "whole", os.path.basename(mosaics[3])[:-4] + ".tif"))
        for b in (1, 2, 3):
            np.testing.assert_array_equal(m.GetRasterBand(b).ReadAsArray(), w.GetRasterBand(b).ReadAsArray())
            self.assertEqual(m.GetRasterBand(b).GetDescription(), w.GetRasterBand(b).GetDescription())

    def test_spacetime_halos_cross_tile_edges(self):
        # The spacetime solution couples every pixel of a block, so only a halo that reaches over
        # the neighbouring tiles gives the whole raster's values (at halo 8/16/32/64 px on the
        # real Alaska masked50 cut into 4 tiles of 50 x 50 px the largest difference was
        # 0.035/0.031/0.018/0, measured once with version 0.3.0). With such a halo, the tiles must equal the whole: their halos are read
        # from the neighbours, which a tile filled on its own cannot do.
        out = self.fill_both_ways("spacetime", ["--method", "spacetime", "--halo", "300"])
        alone = os.path.join(out, "alone")
        kt.run_fill_ok(self, [os.path.join(self.tiles, "h00v00", "ndvi_*.tif"), "--qa",
                              os.path.join(self.tiles, "h00v00", "qa_*.tif"), "--keep", "bits0-1 in 0,1",
                              "--out", alone, "--method", "spacetime", "--halo", "300", "--threads", "1"])
        isolated = np.stack([kt.read_output(p)["value"] for p in sorted(glob.glob(os.path.join(alone, "*.tif")))])
        worst = 0.0
        for tile, origin in {"h00v00": (0, 0), "h01v00": (170, 0), "h00v01": (0, 120),
                             "h01v01": (170, 120)}.items():
            tiled, whole = tile_values(out, tile, origin)
            np.testing.assert_array_equal(np.isnan(tiled[:, 0]), np.isnan(whole[:, 0]), err_msg=tile)
            np.testing.assert_array_equal(tiled[:, 1], whole[:, 1], err_msg=tile)
            worst = max(worst, float(np.nanmax(np.abs(tiled[:, 0] - whole[:, 0]))))
            if tile == "h00v00":
                alone_worst = float(np.nanmax(np.abs(isolated - whole[:, 0])))
        print("\nspacetime, largest difference from the whole raster: %.2g for the 4 tiles, %.2g for "
              "tile h00v00 filled on its own" % (worst, alone_worst))
        self.assertLessEqual(worst, 1e-5)
        self.assertGreater(alone_worst, 100 * max(worst, 1e-7))

    def test_tiles_that_do_not_fit_are_refused(self):
        g = kt.gdal()
        bad = os.path.join(self.tmp, "bad-tiles")
        for tile in ("h00v00", "h01v00"):
            os.makedirs(os.path.join(bad, tile), exist_ok=True)
            for path in glob.glob(os.path.join(self.tiles, tile, "ndvi_*.tif"))[:3]:
                g.Translate(os.path.join(bad, tile, os.path.basename(path)), path)
        # Move one tile by half a pixel: it no longer sits on the others' pixel grid.
        for path in glob.glob(os.path.join(bad, "h01v00", "*.tif")):
            ds = g.Open(path, g.GA_Update)
            gt = list(ds.GetGeoTransform())
            gt[0] += gt[1] / 2
            ds.SetGeoTransform(gt)
            ds = None
        out = os.path.join(self.tmp, "bad-out")
        done = kt.run_kalends(["fill", os.path.join(bad, "h*v*", "ndvi_*.tif"), "--tiles",
                               os.path.join(bad, "{tile}", ""), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("h01v00", done.stderr)
        self.assertIn("not aligned", done.stderr)
        self.assertEqual(len(done.stderr.strip().splitlines()), 1, done.stderr)
        self.assertEqual(glob.glob(os.path.join(out, "h*", "*.tif")), [])
        # An overlap with other values than its neighbour's.
        for path in glob.glob(os.path.join(bad, "h01v00", "*.tif")):
            ds = g.Open(path, g.GA_Update)
            gt = list(ds.GetGeoTransform())
            gt[0] -= gt[1] / 2 + 10 * gt[1]  # 10 columns into tile h00v00
            ds.SetGeoTransform(gt)
            ds = None
        done = kt.run_kalends(["fill", os.path.join(bad, "h*v*", "ndvi_*.tif"), "--tiles",
                               os.path.join(bad, "{tile}", ""), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("overlaps tile h00v00 with different values", done.stderr)
        # One file of a tile in another CRS (its neighbours and the grid unchanged): refused as an
        # untiled stack refuses it. It had passed.
        odd = os.path.join(self.tmp, "odd-crs")
        os.makedirs(os.path.join(odd, "h00v00"))
        for path in sorted(glob.glob(os.path.join(self.tiles, "h00v00", "ndvi_*.tif")))[:3]:
            g.Translate(os.path.join(odd, "h00v00", os.path.basename(path)), path)
        last = sorted(glob.glob(os.path.join(odd, "h00v00", "*.tif")))[-1]
        from osgeo import osr
        other = osr.SpatialReference()
        other.ImportFromEPSG(32735)  # another UTM zone than the demo's
        ds = g.Open(last, g.GA_Update)
        ds.SetProjection(other.ExportToWkt())
        ds = None
        done = kt.run_kalends(["fill", os.path.join(odd, "h*v*", "ndvi_*.tif"), "--tiles",
                               os.path.join(odd, "{tile}", ""), "--out", out])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn(os.path.basename(last) + ": has a different CRS from the other files of tile h00v00",
                      done.stderr)

    def test_a_tiles_report_draws_its_own_observations(self):
        # A tile's outputs name the mosaic of all tiles as their raw source (KALENDS_SOURCE); the
        # report must read it where the tile's pixel lies, so each observation kept (flag 0) sits
        # on the filled curve, whose value there is that observation. It had read the mosaic at
        # the tile's own column and row: another tile's observations.
        out = os.path.join(self.tmp, "report-tiles")
        kt.run_fill_ok(self, [os.path.join(self.tiles, "h*v*", "ndvi_*.tif"), "--tiles",
                              os.path.join(self.tiles, "{tile}", ""), "--mosaic", "--out", out, "--lambda", "10"])
        html = os.path.join(self.tmp, "tile-report.html")
        done = kt.run_kalends(["report", os.path.join(out, "h01v01"), "--html", html, "--pixels", "5,5"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(html) as f:
            page = f.read().split('id="time-series"')[1]
        dots = [(float(x), float(y)) for x, y in re.findall(r'class="observed" cx="([\d.]+)" cy="([\d.]+)"', page)]
        curve = set()
        for points in re.findall(r'class="filled"[^>]*points="([^"]+)"', page):
            curve.update(tuple(map(float, p.split(","))) for p in points.split())
        flags = [kt.read_output(p)["flag"][5, 5] for p in sorted(glob.glob(os.path.join(out, "h01v01", "ndvi_*.tif")))]
        self.assertEqual(len(dots), sum(1 for f in flags if f == 0))
        self.assertGreater(len(dots), 5)
        for dot in dots:
            self.assertIn(dot, curve)

    def test_mosaic_views_and_tile_names(self):
        # A rerun without --mosaic removes the earlier mosaic views (they pointed at outputs the
        # rerun removed, and broke grid and extract); a tile named 'mosaic' is refused; a tile
        # whose first file is the odd one names that file.
        g = kt.gdal()
        out = os.path.join(self.tmp, "views")
        kt.run_fill_ok(self, [os.path.join(self.tiles, "h*v*", "ndvi_*.tif"), "--tiles",
                              os.path.join(self.tiles, "{tile}", ""), "--mosaic", "--out", out, "--lambda", "10"])
        self.assertTrue(glob.glob(os.path.join(out, "mosaic", "*.vrt")))
        # A VRT of the user's kept beside the views (no date in its name) is never removed.
        mine = os.path.join(out, "mosaic", "my_study_area.vrt")
        with open(mine, "w") as f:
            f.write("<VRTDataset/>\n")
        kt.run_fill_ok(self, [os.path.join(self.tiles, "h*v*", "ndvi_*.tif"), "--tiles",
                              os.path.join(self.tiles, "{tile}", ""), "--mosaic", "--out", out, "--lambda", "10"])
        self.assertTrue(os.path.exists(mine))
        os.remove(mine)
        fewer = os.path.join(self.tmp, "fewer-dates")
        for tile in ("h00v00", "h01v00", "h00v01", "h01v01"):
            os.makedirs(os.path.join(fewer, tile))
            for path in sorted(glob.glob(os.path.join(self.tiles, tile, "ndvi_*.tif")))[:6]:
                shutil.copy(path, os.path.join(fewer, tile))
        kt.run_fill_ok(self, [os.path.join(fewer, "h*v*", "ndvi_*.tif"), "--tiles",
                              os.path.join(fewer, "{tile}", ""), "--out", out, "--lambda", "10"])
        self.assertFalse(os.path.exists(os.path.join(out, "mosaic")))
        named = os.path.join(self.tmp, "named")
        for tile, as_name in (("h00v00", "h00v00"), ("h01v00", "mosaic")):
            os.makedirs(os.path.join(named, as_name))
            for path in sorted(glob.glob(os.path.join(self.tiles, tile, "ndvi_*.tif")))[:3]:
                shutil.copy(path, os.path.join(named, as_name))
        done = kt.run_kalends(["fill", os.path.join(named, "*", "ndvi_*.tif"), "--tiles",
                               os.path.join(named, "{tile}", ""), "--out", os.path.join(self.tmp, "named-out")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("is in a tile named 'mosaic'", done.stderr)
        os.rename(os.path.join(named, "mosaic"), os.path.join(named, "h01v00"))
        first = sorted(glob.glob(os.path.join(named, "h01v00", "*.tif")))[0]
        ds = g.Open(first, g.GA_Update)
        gt = list(ds.GetGeoTransform())
        gt[0] += 10 * gt[1]
        ds.SetGeoTransform(gt)
        ds = None
        done = kt.run_kalends(["fill", os.path.join(named, "*", "ndvi_*.tif"), "--tiles",
                               os.path.join(named, "{tile}", ""), "--out", os.path.join(self.tmp, "named-out")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn(os.path.basename(first) + ": lies on a different grid from the other files of tile h01v00",
                      done.stderr)

    def test_a_tiled_fill_holds_the_whole_set_from_the_start(self):
        # Another tiled fill at work (simulated by this test's flock, as every kalends writer
        # locks its folder): a second one had published the tiles the first was not writing
        # before it was refused at the one it was, and readers of the mosaic were not refused.
        import fcntl
        out = os.path.join(self.tmp, "held")
        fill = ["fill", os.path.join(self.tiles, "h*v*", "ndvi_*.tif"), "--tiles",
                os.path.join(self.tiles, "{tile}", ""), "--mosaic", "--out", out, "--lambda", "10"]
        kt.run_fill_ok(self, fill[1:])

        def stamps():
            return {os.path.relpath(os.path.join(d, n), out): os.path.getmtime(os.path.join(d, n))
                    for d, _, names in os.walk(out) for n in names}

        before = stamps()
        for held_folder in (out, os.path.join(out, "mosaic")):
            fd = os.open(held_folder, os.O_RDONLY)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                done = kt.run_kalends(fill[:-1] + ["30"])
            finally:
                os.close(fd)
            self.assertEqual(done.returncode, 1, done.stderr)
            self.assertIn("%s: another kalends command is writing into or reading this folder" % held_folder,
                          done.stderr)
            self.assertEqual(stamps(), before, held_folder)

    def test_a_date_a_tile_lacks_is_named(self):
        # A date missing from one tile (a failed download) is a gap there, filled; the fill
        # now says which tile and date, on the console and in a job's notes.
        some = os.path.join(self.tmp, "some-missing")
        shutil.copytree(self.tiles, some)
        dropped = sorted(glob.glob(os.path.join(some, "h01v01", "ndvi_*.tif")))[5]
        os.remove(dropped)
        date = os.path.basename(dropped)[5:15]
        done = kt.run_kalends(["fill", os.path.join(some, "h*v*", "ndvi_*.tif"), "--tiles",
                               os.path.join(some, "{tile}", ""), "--out", os.path.join(self.tmp, "some-out"),
                               "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: 1 tile-date(s) have no input file, so the fill took them as gaps: h01v01 " + date,
                      done.stderr)


    def test_in_a_job_a_tiled_fills_budget_is_checked_before_the_first_step(self):
        # A tile set's fill had been checked only as each tile ran: a nightly job ran its first
        # steps and then failed on the tiles. The largest tile with its halo is now checked
        # with the job's other fill steps before any step runs, and fails that step alone (a step
        # that does not read it runs, since 0.3.20); the budget it names runs.
        import shutil
        import subprocess
        job_dir = os.path.join(self.tmp, "budget-job")
        tiles = os.path.join(job_dir, "tiles")
        shutil.copytree(self.tiles, tiles)
        shutil.copytree(self.stack, os.path.join(job_dir, "whole"))
        job = os.path.join(job_dir, "job.toml")
        text = ('[job]\nout = "out"\nthreads = 1\nmemory = "{}"\n\n[inputs.ndvi]\nstack = "tiles/h*v*/ndvi_*.tif"\n'
                '[inputs.whole]\nstack = "whole/ndvi_*.tif"\n\n'
                '[[step]]\nid = "first"\ndo = "fill"\ninput = "whole"\nmethod = "whittaker"\n\n'
                '[[step]]\nid = "tiled"\ndo = "fill"\ninput = "ndvi"\nmethod = "spacetime"\ntiles = "tiles/{{tile}}/"\n')
        with open(job, "w") as f:
            f.write(text.format("110M"))
        # `plan` too: the tiled step runs whole at --finalize, after every array task.
        for args in (["run", job, "--dry-run"], ["plan", job, "--shards", "2"], ["run", job]):
            done = subprocess.run([kt.KALENDS_BIN] + args, capture_output=True, text=True, timeout=300)
            self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
            line = done.stderr.strip().splitlines()[-1]
            self.assertRegex(line, r"job\.toml:4: \[job\] memory: step 'tiled': budget of 110 MiB is too small")
            self.assertEqual(bool(glob.glob(os.path.join(job_dir, "out", "first", "*.tif"))), args[-1] == job, args)
            self.assertFalse(glob.glob(os.path.join(job_dir, "out", "tiled", "*", "*.tif")), args)
        self.assertFalse(glob.glob("/tmp/kalends-tile-check-*"))
        need = int(re.search(r"(\d+) MiB would do", line).group(1))
        with open(job, "w") as f:
            f.write(text.format("%dM" % need))
        done = subprocess.run([kt.KALENDS_BIN, "run", job], capture_output=True, text=True, timeout=600)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertTrue(glob.glob(os.path.join(job_dir, "out", "tiled", "h01v01", "*.tif")))
        # A folder where a mosaic view goes: the step fails naming it, and status says failed
        # (a raw "basic_filebuf::underflow" had left the step unrecorded, read as interrupted).
        view = sorted(glob.glob(os.path.join(job_dir, "out", "tiled", "mosaic", "*.vrt")))[0]
        os.remove(view)
        os.makedirs(view)
        os.remove(sorted(glob.glob(os.path.join(job_dir, "out", "tiled", "h00v00", "ndvi_*.tif")))[0])
        done = subprocess.run([kt.KALENDS_BIN, "run", job], capture_output=True, text=True, timeout=600)
        self.assertEqual(done.returncode, 2, done.stdout + done.stderr)
        self.assertEqual(done.stderr.strip(), "kalends: %s: is a folder where a mosaic view goes; move it away" % view)
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertRegex(status.stdout, r"tiled +fill +failed")

    def test_a_tile_without_the_qa_file_of_one_date_is_refused_or_left_out(self):
        # One tile lacks the QA file of one date, the other tiles have it. The date's QA mosaic
        # then had no source over that tile, its cells read as QA 0 ("good" under this rule),
        # and the tile's clouds were written as observed values, exit 0 and no word. The same
        # tile filled alone is refused, naming the date: so is the tile set now, and in a job
        # --skip-bad leaves the value file out (exit 3) as for any file without its partner.
        import shutil
        import subprocess
        job_dir = os.path.join(self.tmp, "qa-gap")
        tiles = os.path.join(job_dir, "tiles")
        shutil.copytree(self.tiles, tiles)
        held = sorted(glob.glob(os.path.join(tiles, "h00v00", "qa_*.tif")))[3]
        os.remove(held)
        value = os.path.join(tiles, "h00v00", os.path.basename(held).replace("qa_", "ndvi_"))
        self.assertTrue(os.path.exists(value))
        done = kt.run_kalends(["fill", os.path.join(tiles, "h*v*", "ndvi_*.tif"), "--qa",
                               os.path.join(tiles, "h*v*", "qa_*.tif"), "--keep", "bits0-1 in 0,1",
                               "--tiles", os.path.join(tiles, "{tile}", ""), "--out", os.path.join(job_dir, "direct")])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn(value, done.stderr)
        self.assertIn("no QA layer for", done.stderr)
        job = os.path.join(job_dir, "job.toml")
        with open(job, "w") as f:
            f.write(TILED_JOB)
        done = subprocess.run([kt.KALENDS_BIN, "run", job, "--skip-bad"], capture_output=True, text=True)
        self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
        self.assertIn("skipped input: " + value, done.stdout)
        # The other tiles have the date, so the tile's cells on it are filled as gaps (flag 2),
        # none taken as observed.
        written = kt.read_output(os.path.join(job_dir, "out", "fill", "h00v00", os.path.basename(value)))
        self.assertFalse((written["flag"] == 0).any())
        # Still missing the next night: left out again. Then the QA file comes and the value
        # file is read (it had stayed out every night after, the tiled reason not being one the
        # runner looked for the partner of).
        done = subprocess.run([kt.KALENDS_BIN, "run", job, "--skip-bad"], capture_output=True, text=True)
        self.assertEqual(done.returncode, 3, done.stdout + done.stderr)
        shutil.copy(os.path.join(self.tiles, "h00v00", os.path.basename(held)), held)
        done = subprocess.run([kt.KALENDS_BIN, "run", job, "--skip-bad"], capture_output=True, text=True)
        self.assertEqual(done.returncode, 0, done.stdout + done.stderr)
        self.assertNotIn("skipped input", done.stdout)
        written = kt.read_output(os.path.join(job_dir, "out", "fill", "h00v00", os.path.basename(value)))
        self.assertTrue((written["flag"] == 0).any())

    def test_in_a_job_only_the_changed_tile_is_refilled(self):
        # A tile whose files changed is refilled alone (Whittaker: no halo); equal to scratch.
        import shutil
        import subprocess
        job_dir = os.path.join(self.tmp, "job")
        tiles = os.path.join(job_dir, "tiles")
        shutil.copytree(self.tiles, tiles)
        job = os.path.join(job_dir, "job.toml")
        with open(job, "w") as f:
            f.write(TILED_JOB)
        run = lambda *a: subprocess.run([kt.KALENDS_BIN, "run", job] + list(a), capture_output=True, text=True)
        done = run()
        self.assertEqual(done.returncode, 0, done.stderr)
        before = {p: os.stat(p).st_mtime_ns for p in glob.glob(os.path.join(job_dir, "out", "fill", "h*", "*.tif"))}
        # status counts the step's files a user sees, not the hidden ones below them.
        seen = [p for p in glob.glob(os.path.join(job_dir, "out", "fill", "**", "*"), recursive=True)
                if os.path.isfile(p)]
        hidden = [p for p in glob.glob(os.path.join(job_dir, "out", "fill", "**", ".*"), recursive=True)]
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertIn("(%d files in its folder)" % len(seen), status.stdout, (len(hidden), status.stdout))
        # The run's counts are those files too, the mosaic views included (they had been left out).
        counts = re.search(r"(\d+) files? written, (\d+) unchanged", done.stdout)
        self.assertEqual(int(counts.group(1)) + int(counts.group(2)), len(seen), done.stdout)
        self.assertTrue(glob.glob(os.path.join(job_dir, "out", "fill", "mosaic", "*.vrt")))
        # A reprocessed composite for one tile: same date, new values.
        g = kt.gdal()
        path = sorted(glob.glob(os.path.join(tiles, "h01v01", "ndvi_*.tif")))[5]
        ds = g.Open(path, g.GA_Update)
        band = ds.GetRasterBand(1)
        values = band.ReadAsArray()
        values[:20, :20] = 5000
        band.WriteArray(values)
        ds = None
        done = run()
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("tiles with new data: h01v01", done.stdout)
        after = {p: os.stat(p).st_mtime_ns for p in before}
        for p in before:
            if "/h01v01/" not in p:
                self.assertEqual(after[p], before[p], p)
        self.assertTrue(any(after[p] != before[p] for p in before if "/h01v01/" in p))
        scratch = run("--out", os.path.join(job_dir, "scratch"))
        self.assertEqual(scratch.returncode, 0, scratch.stderr)
        for p in before:
            q = p.replace(os.path.join(job_dir, "out"), os.path.join(job_dir, "scratch"))
            a, b = kt.read_output(p), kt.read_output(q)
            for k in ("value", "sd", "flag"):
                np.testing.assert_array_equal(a[k], b[k], err_msg=p)
        # A deleted tile output is counted among the files a user sees, not the hidden views
        # (it had said "1 of 297" beside "248 files in its folder").
        gone = sorted(before)[0]
        os.remove(gone)
        status = subprocess.run([kt.KALENDS_BIN, "status", job], capture_output=True, text=True)
        self.assertIn("outputs missing: 1 of %d (first: %s) (%d files in its folder)"
                      % (len(seen), os.path.relpath(gone, os.path.join(job_dir, "out")), len(seen) - 1), status.stdout)


class TiledAlaska(kt.TempDirTestCase):
    """Real NDVI with real cloud patterns, as 4 tiles with an invented georeferencing."""

    def test_masked50_tiles_equal_the_whole(self):
        root = kt.shared_path("alaska-ndvi", "masked50")
        files = sorted(glob.glob(os.path.join(root, "ndvi_*.tif")))
        self.assertEqual(len(files), 48)
        from osgeo import osr
        srs = osr.SpatialReference()
        srs.ImportFromEPSG(32606)  # invented placement: UTM 6N, 500 m pixels
        georeference = ((400000.0, 500.0, 0.0, 7200000.0, 0.0, -500.0), srs.ExportToWkt())
        whole_in = os.path.join(self.tmp, "whole-in")
        os.makedirs(whole_in)
        g = kt.gdal()
        for path in files:
            ds = g.Translate("", path, format="MEM")
            ds.SetGeoTransform(georeference[0])
            ds.SetProjection(georeference[1])
            g.Translate(os.path.join(whole_in, os.path.basename(path)), ds)
            ds = None
        tiles = os.path.join(self.tmp, "tiles")
        split_into_tiles(sorted(glob.glob(os.path.join(whole_in, "*.tif"))), tiles, 47, 55)
        out = os.path.join(self.tmp, "out")
        for method, tolerance in (("whittaker", 0.0),):
            args = ["--method", method, "--threads", "1"]
            kt.run_fill_ok(self, [os.path.join(whole_in, "ndvi_*.tif"), "--out",
                                  os.path.join(out, method, "whole")] + args)
            kt.run_fill_ok(self, [os.path.join(tiles, "h*v*", "ndvi_*.tif"), "--tiles",
                                  os.path.join(tiles, "{tile}", ""), "--out",
                                  os.path.join(out, method, "tiles")] + args)
            worst = 0.0
            for tile, origin in {"h00v00": (0, 0), "h01v00": (47, 0), "h00v01": (0, 55),
                                 "h01v01": (47, 55)}.items():
                tiled, whole = tile_values(os.path.join(out, method), tile, origin)
                self.assertEqual(tiled.shape[0], 48)
                np.testing.assert_array_equal(np.isnan(tiled[:, 0]), np.isnan(whole[:, 0]))
                np.testing.assert_array_equal(tiled[:, 1], whole[:, 1])
                if np.isfinite(tiled[:, 0]).any():
                    worst = max(worst, float(np.nanmax(np.abs(tiled[:, 0] - whole[:, 0]))))
            print("\nalaska masked50, %s: 4 tiles against the whole, largest difference %.5f"
                  % (method, worst))
            self.assertLessEqual(worst, tolerance)


if __name__ == "__main__":
    unittest.main(verbosity=2)
