#!/usr/bin/env bash
# The whole test suite on a fresh Debian 12 machine: installs what it needs, builds, runs every
# test (unit, reference against scikit-learn, integration with real processes and sockets, the
# fuzz targets' corpora).
#   deploy/run-tests.sh              the gcc Release build (./build) and its whole suite
#   deploy/run-tests.sh -L unit      one kind (unit, reference, integration, fuzz); any ctest flags
#   CI=true deploy/run-tests.sh      what CI runs (.ci/run): every stage below, in this order
#   NUWATCH_STAGES="asan fuzz" deploy/run-tests.sh   chosen stages only
# Stages (DEVELOPERS.md, "Sanitizers and fuzzing"):
#   release  gcc, Release, ./build: the whole suite
#   asan     clang, ./build-asan: -Wthread-safety as errors (the clang build of the whole tree),
#            AddressSanitizer + UndefinedBehaviorSanitizer on every target, libFuzzer targets;
#            the whole suite
#   fuzz     each libFuzzer target of ./build-asan for NUWATCH_FUZZ_SECONDS (20) from its corpus
#   tsan     gcc, ./build-tsan: ThreadSanitizer on every target; the unit and integration tests
# Each stage prints its wall time ("stage NAME: N s"); the first failing stage stops the run.
set -euo pipefail
cd "$(dirname "$0")/.."
jobs=${NUWATCH_JOBS:-2}
if [ -n "${NUWATCH_STAGES:-}" ]; then
  stages=${NUWATCH_STAGES}
elif [ "${CI:-}" = "true" ]; then
  stages="release asan fuzz tsan"
else
  stages="release"
fi

# The sanitizers' run-time options for every process a test starts (nuwatchd, nuwatch, python's
# children): fail on the first report, and symbolize stacks with Debian's llvm-symbolizer.
sanitizers=tests/sanitizers
# alloc_dealloc_mismatch=0: Debian's libzmq (ZeroMQ 4.3.4) frees with free() objects it allocated
# with operator new(nothrow), in zmq_bind and in its own I/O threads (both frames inside
# libzmq.so.5, seen in every test with a socket); an uninstrumented library's mismatch that no
# suppression file can name. Every other ASan check stays on.
export ASAN_OPTIONS="abort_on_error=1:detect_leaks=1:strict_string_checks=1:check_initialization_order=1:alloc_dealloc_mismatch=0"
export UBSAN_OPTIONS="print_stacktrace=1:halt_on_error=1"
# history_size=7 (the largest: 4M accesses, about 32 MB, kept per thread): tsan.supp names
# libzmq's frames, which TSan can show only while the write's stack is still in its history. At
# the default, a daemon that had taken some 10,000 messages (tests/integration/cluster_test.py's
# lone daemon) reported libzmq's I/O thread's write to a message buffer as "[failed to restore
# the stack]", which no suppression can match, against our decoder's read of it on a scoring
# thread.
export TSAN_OPTIONS="halt_on_error=1:second_deadlock_stack=1:history_size=7"
# Suppressions (each line justified in its file) only for what uninstrumented libraries do.
if [ -f "$sanitizers/lsan.supp" ]; then
  export LSAN_OPTIONS="suppressions=$PWD/$sanitizers/lsan.supp:print_suppressions=0"
fi
if [ -f "$sanitizers/tsan.supp" ]; then
  TSAN_OPTIONS="$TSAN_OPTIONS:suppressions=$PWD/$sanitizers/tsan.supp:print_suppressions=0"
fi
if [ -x /usr/bin/llvm-symbolizer ]; then
  export ASAN_SYMBOLIZER_PATH=/usr/bin/llvm-symbolizer
  export TSAN_OPTIONS="$TSAN_OPTIONS:external_symbolizer_path=/usr/bin/llvm-symbolizer"
fi

run_ctest() {  # build dir, then ctest arguments
  local dir=$1
  shift
  ctest --test-dir "$dir" --output-on-failure -j"$jobs" --timeout 900 "$@"
}

configure_and_build() {  # build dir, then cmake arguments
  local dir=$1
  shift
  cmake -S . -B "$dir" "$@" >/dev/null
  cmake --build "$dir" -j"$jobs"
}

stage_release() {
  bash deploy/build.sh
  run_ctest build "$@"
}

stage_asan() {
  bash deploy/install-deps.sh >/dev/null 2>&1 || true  # build.sh (release) reports what is missing
  CXX=clang++ configure_and_build build-asan -DCMAKE_BUILD_TYPE=Release \
    -DNUWATCH_THREAD_SAFETY=ON -DNUWATCH_SANITIZE=address,undefined -DNUWATCH_FUZZ=ON
  run_ctest build-asan "$@"
}

stage_fuzz() {
  local seconds=${NUWATCH_FUZZ_SECONDS:-20}
  [ -d build-asan/tests/fuzz ] || stage_asan -L fuzz
  local work
  work=$(mktemp -d)
  mkdir -p build-asan/fuzz-findings
  for corpus in tests/fuzz/corpus/*/; do
    local target extra=()
    target=$(basename "$corpus")
    mkdir -p "$work/$target"
    [ -d "build-asan/tests/fuzz/seeds/$target" ] && extra=("build-asan/tests/fuzz/seeds/$target")
    # New inputs go to a scratch directory, never into the repository; a finding is written to
    # build-asan/fuzz-findings/ and fails the stage.
    if ! "build-asan/tests/fuzz/$target" "$work/$target" "$corpus" "${extra[@]}" \
      -max_total_time="$seconds" -timeout=25 -rss_limit_mb=2048 -max_len=16384 \
      -artifact_prefix="build-asan/fuzz-findings/$target-" -print_final_stats=1 \
      >"$work/$target.log" 2>&1; then
      tail -80 "$work/$target.log"
      echo "fuzz $target: FINDING (input in build-asan/fuzz-findings/)"
      rm -rf "$work"
      return 1
    fi
    echo "fuzz $target: $seconds s, $(grep -o 'number_of_executed_units: [0-9]*' "$work/$target.log" |
      grep -o '[0-9]*') executions, no finding"
  done
  rm -rf "$work"
}

stage_tsan() {
  configure_and_build build-tsan -DCMAKE_BUILD_TYPE=Release -DNUWATCH_SANITIZE=thread
  run_ctest build-tsan -L "unit|integration" "$@"
}

for stage in $stages; do
  started=$(date +%s)
  "stage_$stage" "$@"
  echo "stage $stage: $(($(date +%s) - started)) s"
done
