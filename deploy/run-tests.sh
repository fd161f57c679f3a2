#!/usr/bin/env bash
# The whole test suite on a fresh Debian 12 machine: installs what it needs, builds, runs every
# test (unit, reference against scikit-learn, integration with real processes and sockets).
# Select a kind with: deploy/run-tests.sh -L unit   (or reference, integration)
set -euo pipefail
cd "$(dirname "$0")/.."
bash deploy/build.sh
ctest --test-dir build --output-on-failure -j"${NUWATCH_JOBS:-2}" --timeout 600 "$@"
