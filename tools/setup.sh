#!/usr/bin/env bash
# Installs the Debian packages kalends needs, only those missing. Idempotent; silent when
# there is nothing to do.
set -euo pipefail

packages=(
  build-essential cmake pkg-config
  libgdal-dev gdal-bin libproj-dev libeigen3-dev libfftw3-dev libtbb-dev
  catch2 libcli11-dev libfmt-dev libtomlplusplus-dev libsqlite3-dev nlohmann-json3-dev
  python3-numpy python3-scipy python3-gdal
  time
  slurm-wlm munge   # the cluster test starts a one-node Slurm on localhost
  chromium            # headless browser for the report test (tests/integration/test_report_browser.py)
)

missing=()
for p in "${packages[@]}"; do
  if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed"; then
    missing+=("$p")
  fi
done
[ ${#missing[@]} -eq 0 ] && exit 0

echo "setup: installing ${missing[*]}" >&2
sudo_cmd=()
[ "$(id -u)" -ne 0 ] && sudo_cmd=(sudo)
export DEBIAN_FRONTEND=noninteractive
"${sudo_cmd[@]}" apt-get update -qq
"${sudo_cmd[@]}" apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
