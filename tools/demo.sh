#!/usr/bin/env bash
# kalends demo, end to end on invented data: installs what is missing, builds, makes the
# synthetic Lower Tamsin district stack (fictional) once, fills its cloud gaps with
# kalends and prints a summary. Everything it writes lies under demo/out/ (git-ignored).
set -euo pipefail

cd "$(dirname "${BASH_SOURCE[0]}")/.."
py=/usr/bin/python3          # Debian's python: it has numpy and osgeo.gdal
out=demo/out

tools/setup.sh
[ -x tools/build.sh ] || { echo "demo: tools/build.sh is missing" >&2; exit 1; }
tools/build.sh
[ -x build/kalends ] || { echo "demo: build/kalends was not built" >&2; exit 1; }

# synth.json is written last, so its presence means a complete stack from an earlier run (of
# this version's place: the stack moved to EPSG:32727 in 0.3.18).
if ! grep -q '"drought_year": 2022' "$out/input/ndvi/synth.json" 2>/dev/null ||
   ! grep -q '"epsg": 32727' "$out/input/ndvi/synth.json" 2>/dev/null; then
  rm -rf "$out/input"
  echo "demo: generating the synthetic stack in $out/input" >&2
  "$py" tools/synth_stack.py --scenario demo --out "$out/input/ndvi" --qa --qa-out "$out/input/qa" \
    --truth "$out/input/truth" --drought-year 2022
fi

# The NDVI and QA stacks are delivered as 4 tiles (one folder each), as satellite products
# are, with the invented district's outline for the study grid.
if [ ! -f "$out/input/district.geojson" ]; then
  rm -rf "$out/input/tiles"
  "$py" tools/demo_tiles.py --tiles "$out/input/tiles" --outline "$out/input/district.geojson" \
    "$out/input/ndvi" "$out/input/qa"
fi

# Temperature suitability for malaria transmission (issue #5): invented day and night
# land-surface temperature (kelvin x 50), cloud gaps filled, then relative R0 (Mordecai 2013).
if ! grep -q '"invented": true' "$out/input/lst/synth.json" 2>/dev/null; then
  rm -rf "$out/input/lst"
  echo "demo: generating the synthetic land-surface temperature stacks in $out/input/lst" >&2
  "$py" tools/synth_lst.py --out "$out/input/lst"
fi
# Invented survey clusters for the extract step (issue #8).
if [ ! -s "$out/input/surveys/surveys.csv" ]; then
  "$py" tools/synth_surveys.py --grid "$out/input/ndvi/ndvi_*.tif" --out "$out/input/surveys/surveys.csv"
fi
# The whole pipeline is the demo's job file (demo/job.toml): NDVI fill, seasons, compare;
# land-surface temperature fill, day and night, and temperature suitability. A second run of
# the demo finds nothing new and does nothing.
build/kalends run demo/job.toml

echo
"$py" demo/summarise.py --filled "$out/job/fill/mosaic" --input "$out/input/ndvi" --truth "$out/input/truth"
echo
"$py" demo/summarise_seasons.py --seasons "$out/job/seasons" --compare "$out/job/compare" \
  --manifest "$out/input/ndvi/synth.json"
echo
"$py" demo/summarise_suitability.py --suitability "$out/job/suitability"
echo
echo "demo: covariates at the invented survey clusters: $out/job/extract/table.csv"
echo "demo: the report to look at: $out/report.html"
