#!/usr/bin/env bash
# One command from a fresh Debian 12 machine to a passing test suite:
# installs packages, builds (warnings as errors), runs every test with CTest.
#
# The survey's Slurm tests need a Slurm cluster: when none is configured
# (SLURM_CONF unset) and the Slurm and MUNGE packages are installed, a one-node
# test cluster (tests/cluster/slurm-cluster.sh) is started in a folder of its
# own and stopped (by its PIDs) however the tests end, so this command covers
# what CI covers. Without those packages the Slurm tests are skipped (and say so).
set -euo pipefail
cd "$(dirname "$0")/.."
root=$(pwd)
scripts/deps.sh
scripts/build.sh -DSKERRY_WERROR=ON
if [ -z "${SLURM_CONF:-}" ] && command -v slurmctld >/dev/null 2>&1 && command -v slurmd >/dev/null 2>&1 &&
   command -v munged >/dev/null 2>&1; then
  export SKERRY_SLURM_DIR
  SKERRY_SLURM_DIR=$(mktemp -d "${TMPDIR:-/tmp}/skerry-slurm-test.XXXXXX")
  trap '"$root/tests/cluster/slurm-cluster.sh" stop' EXIT  # from build/ as well
  if slurm_env=$("$root/tests/cluster/slurm-cluster.sh" start); then
    eval "$slurm_env"
  else
    echo "scripts/test.sh: the Slurm test cluster did not start; the Slurm tests will be skipped" >&2
  fi
fi
cd build
ctest --output-on-failure --parallel "$(nproc)" --timeout 1500 "$@"
