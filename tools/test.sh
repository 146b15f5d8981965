#!/usr/bin/env bash
# Fresh machine or not: installs what is missing, builds, runs every test with ctest.
set -euo pipefail
cd "$(dirname "$0")/.."
tools/setup.sh
tools/build.sh
cd build
ctest --output-on-failure -j "$(nproc 2>/dev/null || echo 2)" "$@"
