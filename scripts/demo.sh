#!/usr/bin/env bash
# One command from a fresh Debian 12 machine to the demo field's catalogue:
# installs packages, builds, then runs `skerry demo` (simulate the invented
# field, extract, match, bands, report) into outputs/demo/.
set -euo pipefail
cd "$(dirname "$0")/.."
scripts/deps.sh
scripts/build.sh
./build/skerry demo --out outputs/demo "$@"
