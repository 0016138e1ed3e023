#!/usr/bin/env bash
# One command from a fresh Debian 12 machine to a passing test suite:
# installs packages, builds (warnings as errors), runs every test with CTest.
set -euo pipefail
cd "$(dirname "$0")/.."
scripts/deps.sh
scripts/build.sh -DSKERRY_WERROR=ON
cd build
ctest --output-on-failure --parallel "$(nproc)" --timeout 1500 "$@"
