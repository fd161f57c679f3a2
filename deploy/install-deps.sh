#!/usr/bin/env bash
# Installs every Debian package that building, testing and running the demo of nuwatch need.
# Idempotent; run as root on Debian 12. Nothing is downloaded from anywhere but Debian's archive.
set -euo pipefail

packages=(
  # build
  build-essential cmake pkg-config
  # core
  libeigen3-dev
  # daemon
  libboost-dev libzmq3-dev cppzmq-dev prometheus-cpp-dev libtomlplusplus-dev libcli11-dev
  libspdlog-dev nlohmann-json3-dev libcairo2-dev libsimdjson-dev
  # tests and benchmarks
  libgtest-dev libgmock-dev libbenchmark-dev python3 python3-sklearn python3-numpy python3-zmq
  prometheus
  # the clang build with -Wthread-safety, the sanitizer builds and the libFuzzer targets
  # (DEVELOPERS.md); llvm has llvm-symbolizer, which names the lines in sanitizer reports
  clang libclang-rt-14-dev llvm
)

missing=()
for p in "${packages[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
# `kubectl kustomize` builds deploy/kubernetes in the tests. Debian's kubernetes-client provides
# it; a kubectl installed some other way owns /usr/bin/kubectl, and the two packages conflict.
if ! command -v kubectl >/dev/null 2>&1; then
  missing+=(kubernetes-client)
fi
if [ ${#missing[@]} -eq 0 ]; then
  exit 0
fi
if [ "$(id -u)" -ne 0 ]; then
  echo "install-deps.sh: missing packages (${missing[*]}); run as root to install them" >&2
  exit 1
fi
export DEBIAN_FRONTEND=noninteractive
apt-get update -qq
apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
