#!/usr/bin/python3
"""kalends report in a real browser, on the real Alaska NDVI stack.

Data: ../shared/data/alaska-ndvi/masked20 (MODIS/Terra MOD13A1 V006 NDVI, Didan 2015, with
extra cloud-pattern gaps; see the data README). The stack is filled (whittaker), its seasons
derived on 16-day periods, and validated against withheld values; then `kalends report` writes
the page. Debian's headless Chromium opens it with no network: a copy of the page with a small
probe script added (only here, never in the report) records how many images decoded and which
sections exist; a screenshot must show a page that is not blank. Skipped, with the reason, only
where chromium is not installed (tools/setup.sh installs it).
"""
import glob
import os
import re
import shutil
import subprocess
import sys
import unittest

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "pylib"))
import kalends_testlib as kt  # noqa: E402

SECTIONS = ["maps", "validation", "fill-statistics", "time-series"]
PROBE = """<script>
window.addEventListener('load', function () {
  var images = Array.prototype.slice.call(document.images);
  var loaded = images.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  var sections = Array.prototype.map.call(document.querySelectorAll('section'), function (s) { return s.id; });
  document.body.setAttribute('data-probe', loaded + '/' + images.length + ';' + sections.join(',') + ';' +
                             document.querySelectorAll('svg.plot').length);
});
</script>"""


def chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    raise unittest.SkipTest("chromium is not installed (tools/setup.sh installs Debian's chromium)")


def browser(args, timeout=120):
    return subprocess.run([chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                           "--no-first-run", "--disable-extensions", "--disable-background-networking"] + args,
                          capture_output=True, text=True, timeout=timeout)


class ReportInBrowser(kt.TempDirTestCase):
    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        stack = os.path.join(kt.shared_path("alaska-ndvi", "masked20"), "ndvi_*.tif")
        cls.out = os.path.join(cls.tmp, "out")
        for step in (["fill", stack, "--out", os.path.join(cls.out, "fill"), "--lambda", "auto"],
                     ["seasons", os.path.join(cls.out, "fill"), "--out", os.path.join(cls.out, "seasons"),
                      "--period", "16d"],
                     ["validate", stack, "--out", os.path.join(cls.out, "validate"), "--methods", "whittaker"]):
            done = kt.run_kalends(["-q"] + step)
            assert done.returncode == 0, "%s: %s" % (step[0], done.stderr)
        cls.html = os.path.join(cls.tmp, "report.html")
        done = kt.run_kalends(["report", cls.out, "--html", cls.html, "--pixels", "10,10;50,60;90,30"])
        assert done.returncode == 0, done.stderr
        cls.stdout = done.stdout
        with open(cls.html) as f:
            cls.page = f.read()

    def test_page_is_self_contained(self):
        self.assertNotRegex(self.page, r'(src|href)="(https?:)?//')
        self.assertNotIn("<script", self.page)
        images = re.findall(r'<img [^>]*src="data:image/png;base64,', self.page)
        self.assertGreaterEqual(len(images), 4)
        # every section, the validation table and the fill statistics are there
        for section in SECTIONS:
            self.assertIn('<section id="%s">' % section, self.page)
        self.assertTrue("validate/report.md" in self.page, "no validation report")
        validation = self.page.split('id="validation"')[1].split("</section>")[0]
        self.assertIn("whittaker", validation)
        # report.md's `code` spans as code, not backticks shown as they are.
        self.assertIn("<code>", validation)
        self.assertNotIn("`", validation)
        self.assertTrue("fill/fill-summary.json" in self.page, "no fill statistics")
        # Three pixels' time series, and the three pixels of the validation's series.csv.
        svg = '<svg xmlns="http://www.w3.org/2000/svg" width="760"'
        self.assertEqual(self.page.split('id="time-series"')[1].count(svg), 3)
        self.assertEqual(self.page.split('id="validation"')[1].split("</section>")[0].count(svg), 3)
        self.assertTrue("synoptic cycle from seasons.ndvi_synoptic_mean" in self.page, "no synoptic cycle")
        # Each map says where and when it is: the grid, and the dates or years it spans.
        dates = sorted(os.path.basename(p)[5:15] for p in glob.glob(os.path.join(
            kt.shared_path("alaska-ndvi", "masked20"), "ndvi_*.tif")))
        self.assertIn("100 x 100 px, no georeferencing; %s to %s" % (dates[0], dates[-1]), self.page)
        self.assertIn("100 x 100 px, no georeferencing; years %s to %s" % (dates[0][:4], dates[-1][:4]), self.page)

    def test_curves_break_across_winters_and_plots_have_names(self):
        # The stack holds 8 summer composites a year (data README): the filled curve, its sd
        # band and the validation's curves had been drawn straight across each winter, as if
        # there were values there. A curve now stops where the dates leave a season empty.
        plots = re.findall(r'<svg [^>]*class="plot">.*?</svg>', self.page, re.S)
        self.assertEqual(len(plots), 6)
        years = 6
        for plot in plots:
            pieces = re.findall(r'<(?:polyline|polygon) [^>]*points="([^"]+)"', plot)
            self.assertTrue(pieces)
            steps = []
            for piece in pieces:
                xs = [float(p.split(",")[0]) for p in piece.split()]
                if "polygon" not in piece:
                    steps += [abs(b - a) for a, b in zip(xs, xs[1:])]
                # No piece spans more than one summer: the plot is 700 px wide for 6 years.
                self.assertLess(max(xs) - min(xs), 700 / years * 0.6, piece[:200])
            # An accessible name (role="img" hides the plot's own text from screen readers).
            name = re.search(r'aria-label="([^"]*)"', plot)
            self.assertIsNotNone(name)
            self.assertRegex(name[1], r"pixel column \d+, row \d+")
            # The first summer's year is labelled although the axis starts after 1 January.
            self.assertRegex(plot, r'<text x="6\d\.\d" y="[0-9.]+">2004</text>')
        filled = [p for p in plots if 'class="filled"' in p]
        self.assertEqual(len(filled), 3)
        for plot in filled:
            self.assertGreaterEqual(plot.count('class="filled"'), years)
            self.assertGreaterEqual(plot.count('class="sd-band"'), years)
        # Each colour scale is named with its range.
        legends = re.findall(r'<svg [^>]*class="legend"[^>]*>', self.page)
        self.assertTrue(legends)
        for legend in legends:
            self.assertRegex(legend, r'aria-label="colour scale from [^"]+ to [^"]+"')

    def test_the_same_outputs_give_the_same_page(self):
        # Every id in the page is unique (HTML), and a second report of the same outputs is the
        # same file byte for byte, so that a nightly job leaves it unchanged. Ids had been memory
        # addresses: different every run, and repeated.
        ids = re.findall(r' id="([^"]+)"', self.page)
        self.assertGreater(len(ids), 4)
        self.assertEqual(len(ids), len(set(ids)), sorted(i for i in ids if ids.count(i) > 1))
        again = os.path.join(self.tmp, "again.html")
        done = kt.run_kalends(["report", self.out, "--html", again, "--pixels", "10,10;50,60;90,30"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(again) as f:
            self.assertTrue(f.read() == self.page, "a second report of the same outputs differs")

    def test_every_image_loads_and_every_section_shows_in_chromium(self):
        probe = os.path.join(self.tmp, "probe.html")
        with open(probe, "w") as f:
            f.write(self.page.replace("</body>", PROBE + "</body>"))
        done = browser(["--virtual-time-budget=10000", "--dump-dom", "file://" + probe])
        self.assertEqual(done.returncode, 0, done.stderr[-2000:])
        found = re.search(r'data-probe="(\d+)/(\d+);([^;"]*);(\d+)"', done.stdout)
        self.assertIsNotNone(found, "the probe did not run: " + done.stdout[:500])
        loaded, total, sections, plots = int(found[1]), int(found[2]), found[3].split(","), int(found[4])
        print("\nchromium: %d of %d images decoded; sections %s; %d plots" % (loaded, total, sections, plots))
        self.assertGreaterEqual(total, 4)
        self.assertEqual(loaded, total)
        self.assertEqual(sections, SECTIONS)
        self.assertEqual(plots, 3 + 3)  # the --pixels time series, the validation's pixels

    def test_screenshot_shows_a_page(self):
        shot = os.path.join(self.tmp, "shot.png")
        done = browser(["--window-size=1200,1400", "--screenshot=" + shot, "file://" + self.html])
        self.assertEqual(done.returncode, 0, done.stderr[-2000:])
        ds = kt.gdal().Open(shot)
        self.assertEqual((ds.RasterXSize, ds.RasterYSize), (1200, 1400))
        pixels = ds.ReadAsArray()[:3].astype(float)
        # a blank or failed page is one colour; the maps make many
        self.assertGreater(pixels.std(), 20)
        self.assertGreater(len(np.unique(pixels.reshape(3, -1), axis=1)[0]), 50)



class ReportBesideAStudyGrid(kt.TempDirTestCase):
    def test_pixels_are_the_fill_grids_and_study_copies_get_no_time_series(self):
        # A job folder with a fill and its copy on a coarser study grid (kalends grid): the
        # pixels of --pixels are the fill's columns and rows. The copy had been plotted at the
        # same numbers (another place), and a pixel beyond its smaller grid refused the whole
        # report. Alaska masked30, 2004, with an invented UTM 6N georeference (data README).
        g = kt.gdal()
        stack = os.path.join(self.tmp, "in")
        os.makedirs(stack)
        source = kt.shared_path("alaska-ndvi", "masked30")
        for name in sorted(os.listdir(source)):
            if name.startswith("ndvi_2004"):
                g.Translate(os.path.join(stack, name), os.path.join(source, name), outputSRS="EPSG:32606",
                            outputBounds=[400000, 7000000, 450000, 6950000])
        out = os.path.join(self.tmp, "out")
        for step in (["fill", os.path.join(stack, "*.tif"), "--out", os.path.join(out, "fill"), "--lambda", "10"],
                     ["grid", os.path.join(out, "fill"), "--out", os.path.join(out, "study"), "--crs", "EPSG:32606",
                      "--resolution", "5000"]):
            done = kt.run_kalends(["-q"] + step)
            self.assertEqual(done.returncode, 0, done.stderr)
        html = os.path.join(self.tmp, "report.html")
        done = kt.run_kalends(["report", out, "--html", html, "--pixels", "60,70"])  # beyond the 10 x 10 copy
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(html) as f:
            page = f.read()
        series = page.split('id="time-series"')[1]
        self.assertEqual(re.findall(r"<h3>([^<]*)</h3>", series), ["fill.ndvi"])
        self.assertEqual(series.count("<figcaption>pixel column 60, row 70"), 1)
        done = kt.run_kalends(["report", out, "--html", html, "--pixels", "160,70"])
        self.assertEqual(done.returncode, 2, done.stderr)
        self.assertIn("outside every fill output (the largest grid is 100 x 100)", done.stderr)
        # The seasons of the fill and their copy on the study grid: the dashed synoptic curve
        # is the seasons step's own layer, not the copy (which keeps the copied layer's
        # KALENDS_INPUT, and had been read at the fill's pixel numbers: another place).
        for step in (["seasons", os.path.join(out, "fill"), "--out", os.path.join(out, "seasons"), "--period", "1M"],
                     ["grid", os.path.join(out, "seasons"), "--out", os.path.join(out, "study2"), "--crs",
                      "EPSG:32606", "--resolution", "5000"]):
            done = kt.run_kalends(["-q"] + step)
            self.assertEqual(done.returncode, 0, done.stderr)
        # A pixel beyond every grid beside one on it: drawn is the one, and the other is named.
        done = kt.run_kalends(["report", out, "--html", html, "--pixels", "60,70;160,70"])
        self.assertEqual(done.returncode, 0, done.stderr)
        self.assertIn("note: --pixels 160,70: outside every fill output (the largest grid is 100 x 100); not drawn",
                      done.stderr)
        with open(html) as f:
            page = f.read()
        self.assertIn("synoptic cycle from seasons.ndvi_synoptic_mean", page)
        self.assertNotIn("synoptic cycle from study2", page)
        self.assertIn("--pixels 160,70: outside every fill output", page)


class ReportMapsNorthUp(kt.TempDirTestCase):
    def test_a_south_up_layer_is_drawn_north_up(self):
        # The same invented layer stored north-up and south-up (positive pixel height, rows
        # from the south, as GeoTIFFs from ascending-latitude NetCDF often are): the south-up
        # one had been drawn upside down. Both maps must be the same picture.
        import base64
        g = kt.gdal()
        rng = np.random.default_rng(4)
        values = rng.uniform(0.1, 0.5, (30, 40)).astype(np.float32)
        values[:6, :8] = 0.9          # a bright block in the north-west
        values[-2:, -3:] = np.nan     # a hole in the south-east
        folder = os.path.join(self.tmp, "north-south")
        for name, array, transform in (
                ("north_up", values, (500000.0, 250.0, 0, 9100000.0, 0, -250.0)),
                ("south_up", values[::-1].copy(), (500000.0, 250.0, 0, 9100000.0 - 30 * 250.0, 0, 250.0))):
            os.makedirs(os.path.join(folder, name))
            kt.write_raster(os.path.join(folder, name, "elevation.tif"), array, geotransform=transform, epsg=32736,
                            nodata=float("nan"))
        page_path = os.path.join(self.tmp, "north-south.html")
        done = kt.run_kalends(["report", folder, "--html", page_path])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page_path) as f:
            page = f.read()
        images = re.findall(r'<img [^>]*src="data:image/png;base64,([^"]+)"', page)
        self.assertEqual(len(images), 2)
        pictures = []
        for k, data in enumerate(images):
            name = "/vsimem/north-south-%d.png" % k
            g.FileFromMemBuffer(name, base64.b64decode(data))
            ds = g.Open(name)
            pictures.append(ds.ReadAsArray())
            ds = None
            g.Unlink(name)
        np.testing.assert_array_equal(pictures[0], pictures[1])
        # The south-east hole is transparent at the bottom right of the picture.
        alpha = pictures[0][3]
        self.assertEqual(int(alpha[-1, -1]), 0)
        self.assertGreater(int(alpha[0, 0]), 0)
        self.assertIn("cells 250 x 250 m, south-up", page)
        # The stretch runs from the 2nd percentile: the cells below it take its colour, so the
        # legend marks that end and gives the range (a layer of 3 almost everywhere and 0 at a
        # few cells had read "3 .. 3").
        self.assertIn("&#8804; ", page)
        self.assertIn("cells range %.4g to %.4g" % (np.nanmin(values), np.nanmax(values)), page)
        # A 40 x 30 px layer is shown a whole number of times larger (it had been a 40 px speck),
        # the picture itself kept at one pixel per cell.
        sizes = re.findall(r'<img class="map" width="(\d+)" height="(\d+)"', page)
        self.assertEqual(sizes[0], ("240", "180"))
        self.assertEqual(pictures[0].shape[1:], (30, 40))

if __name__ == "__main__":
    unittest.main(verbosity=2)


class ReportOfCalendarMeans(kt.TempDirTestCase):
    def test_calendar_flags_get_their_own_legend_and_month_labels_do_not_collide(self):
        # Invented data (tools/synth_stack.py): mechanics only.
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 24, 20, "--step", "16", years=1)
        out = os.path.join(self.tmp, "out")
        done = kt.run_kalends(["-q", "fill", os.path.join(stack, "ndvi_*.tif"), "--out", os.path.join(out, "fill"),
                               "--every", "1M"])
        self.assertEqual(done.returncode, 0, done.stderr)
        html = os.path.join(self.tmp, "report.html")
        done = kt.run_kalends(["-q", "report", out, "--html", html, "--title", "Vale <of> Orrin, nightly"])
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(html) as f:
            page = f.read()
        # --title is the page's heading (it had stayed "kalends report"), escaped.
        self.assertIn("<h1>Vale &lt;of&gt; Orrin, nightly</h1>", page)
        # outputs.md: a calendar period's flag 0 is "an observation was kept inside the period",
        # 2 "none was", and 1 never occurs; the legend had given a date's meanings.
        start = page.index("<b>fill.calendar-1M.ndvi flag</b>")
        card = page[start:page.index("</figure>", start)]
        self.assertIn("0 an observation kept inside the period", card)
        self.assertIn("2 none (the period mean of the curve)", card)
        self.assertNotIn("observed, rejected", card)
        start = page.index("<b>fill.ndvi flag</b>")
        card = page[start:page.index("</figure>", start)]
        self.assertIn("1 observed, rejected", card)
        # Month labels on a one-year axis: at 11 px text (about 6.2 px a character) none runs
        # into the next; "Jan 2022" had overprinted "Feb".
        for plot in re.findall(r'<svg [^>]*class="plot">.*?</svg>', page, re.S):
            labels = [(float(x), text) for x, text in re.findall(r'<text x="([0-9.]+)" y="2[0-9][0-9]\.0">([A-Z][a-z]{2}(?: \d{4})?)</text>', plot)]
            self.assertGreater(len(labels), 3)
            for (x0, t0), (x1, _) in zip(labels, labels[1:]):
                self.assertGreater(x1 - x0, 6.2 * len(t0), labels)


class ReportOfOddNames(kt.TempDirTestCase):
    def test_the_page_is_valid_utf8_whatever_the_folder_names(self):
        # The page says charset utf-8: a folder named in Latin-1 (caf\xe9) and a control byte had
        # gone into it raw, and a strict UTF-8 reader failed on it. Invented data.
        root = os.fsencode(self.tmp) + b"/caf\xe9_\x01ctl"
        stack = os.path.join(self.tmp, "ndvi")
        kt.make_synthetic_stack(stack, 16, 12, "--step", "16", years=1)
        done = kt.run_kalends(["-q", "fill", os.path.join(stack, "ndvi_*.tif"), "--out",
                               os.fsdecode(root + b"/fill"), "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        page = os.path.join(self.tmp, "odd.html")
        done = subprocess.run([kt.KALENDS_BIN, "-q", "report", root, "--html", page], capture_output=True, timeout=300)
        self.assertEqual(done.returncode, 0, done.stderr)
        with open(page, "rb") as f:
            text = f.read().decode("utf-8")  # strict: raises on a byte that is not UTF-8
        self.assertIn("caf\ufffd_\ufffdctl", text)

    def test_links_in_a_loop_are_passed_over(self):
        # Two links naming each other inside the folder had stopped report and extract ("Too
        # many levels of symbolic links"). Invented data.
        root = os.path.join(self.tmp, "looped")
        stack = os.path.join(self.tmp, "ndvi-loop")
        kt.make_synthetic_stack(stack, 16, 12, "--step", "16", years=1)
        done = kt.run_kalends(["-q", "fill", os.path.join(stack, "ndvi_*.tif"), "--out", os.path.join(root, "fill"),
                               "--lambda", "10"])
        self.assertEqual(done.returncode, 0, done.stderr)
        os.symlink("loopB", os.path.join(root, "loopA"))
        os.symlink("loopA", os.path.join(root, "loopB"))
        done = kt.run_kalends(["-q", "report", root, "--html", os.path.join(self.tmp, "looped.html")])
        self.assertEqual(done.returncode, 0, done.stderr)
        points = os.path.join(self.tmp, "loop-points.csv")
        with open(points, "w") as f:
            f.write("id,longitude,latitude\np1,0,0\n")
        done = kt.run_kalends(["-q", "extract", root, "--points", points, "--out", os.path.join(self.tmp, "loop.csv")])
        self.assertNotIn("symbolic links", done.stderr)
