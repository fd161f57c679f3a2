#!/usr/bin/env bash
# Installs the Debian packages (when run as root) and builds nuwatch into ./build (Release).
# Used by the demo and test scripts; safe to run again (incremental).
set -euo pipefail
cd "$(dirname "$0")/.."
if [ "$(id -u)" -eq 0 ]; then
  bash deploy/install-deps.sh
elif ! bash deploy/install-deps.sh 2>/dev/null; then
  if command -v sudo >/dev/null; then sudo bash deploy/install-deps.sh; else bash deploy/install-deps.sh; fi
fi
cmake -S . -B build -DCMAKE_BUILD_TYPE=Release ${NUWATCH_CMAKE_ARGS:-} >/dev/null
cmake --build build -j"${NUWATCH_JOBS:-2}"
