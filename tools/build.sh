#!/usr/bin/env bash
# Configures (once) and builds kalends in build/ (Release). Quiet unless something fails.
set -euo pipefail
cd "$(dirname "$0")/.."
jobs=$(nproc 2>/dev/null || echo 2)
mkdir -p build
if [ ! -f build/CMakeCache.txt ]; then
  cmake -S . -B build -DCMAKE_BUILD_TYPE=Release >build/configure.log 2>&1 ||
    { cat build/configure.log >&2; exit 1; }
fi
cmake --build build -j "$jobs" >build/build.log 2>&1 || { grep -E "error|Error" -A3 build/build.log >&2 || cat build/build.log >&2; exit 1; }
