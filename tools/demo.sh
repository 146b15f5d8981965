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

# synth.json is written last, so its presence means a complete stack from an earlier run.
if ! grep -q '"drought_year": 2022' "$out/input/ndvi/synth.json" 2>/dev/null; then
  rm -rf "$out/input"
  echo "demo: generating the synthetic stack in $out/input" >&2
  "$py" tools/synth_stack.py --scenario demo --out "$out/input/ndvi" --qa --qa-out "$out/input/qa" \
    --truth "$out/input/truth" --drought-year 2022
fi

rm -rf "$out/filled"
build/kalends fill "$out/input/ndvi/ndvi_*.tif" --qa "$out/input/qa/qa_*.tif" --keep 'bits0-1 in 0,1' \
  --out "$out/filled" --method whittaker --lambda auto --envelope upper --every 1M

echo
"$py" demo/summarise.py --filled "$out/filled" --input "$out/input/ndvi" --truth "$out/input/truth"

echo
rm -rf "$out/seasons" "$out/compare"
build/kalends seasons "$out/filled" --out "$out/seasons"
build/kalends compare "$out/seasons" --out "$out/compare"
echo
"$py" demo/summarise_seasons.py --seasons "$out/seasons" --compare "$out/compare" \
  --manifest "$out/input/ndvi/synth.json"
