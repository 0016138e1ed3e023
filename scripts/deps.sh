#!/usr/bin/env bash
# Installs the Debian 12 packages skerry needs to build, run and test.
# Usage: scripts/deps.sh [extra packages...]   (root, or sudo available)
set -euo pipefail
pkgs=(build-essential cmake ninja-build pkg-config git
      libcfitsio-dev wcslib-dev liberfa-dev libeigen3-dev libtbb-dev
      libboost-program-options-dev libgtest-dev libpng-dev libsqlite3-dev
      libfftw3-dev libhealpix-cxx-dev nlohmann-json3-dev
      python3 python3-numpy python3-scipy python3-astropy chromium slurm-wlm munge "$@")
missing=()
for p in "${pkgs[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
  SUDO=""; [ "$(id -u)" -eq 0 ] || SUDO="sudo"
  echo "installing: ${missing[*]}" >&2
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
fi
