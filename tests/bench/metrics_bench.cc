// The cost of timing each vector's scoring into nuwatch_score_duration_seconds (issue 9 section
// 1: the per-vector path takes no lock): prometheus-cpp's Histogram::Observe on the one histogram
// that every scoring thread shares (its mutex, taken per vector, and its cache line passed between
// cores), against a HistogramBatch per thread handed over with ObserveMultiple every 32 values (a
// scoring thread's outbox is sent at most every 32 messages), and one steady_clock read, of which
// the scoring takes two per vector. Google Benchmark, 1 and 2 threads; the figures go into
// README.md:
//   build/tests/nuwatch_metrics_bench --benchmark_repetitions=3 --benchmark_report_aggregates_only
#include <benchmark/benchmark.h>
#include <prometheus/histogram.h>

#include <chrono>

#include "service/metrics.h"

namespace {

prometheus::Histogram& Shared() {
  static prometheus::Histogram histogram(nuwatch::ScoreDurationBounds());
  return histogram;
}

// About what scoring one vector takes, spread over a few buckets.
double Seconds(std::int64_t i) { return 1e-6 * static_cast<double>(1 + (i & 7)); }

void BM_SharedObserve(benchmark::State& state) {
  prometheus::Histogram& histogram = Shared();
  std::int64_t i = 0;
  for (auto _ : state) histogram.Observe(Seconds(i++));
  state.SetItemsProcessed(i);
}
BENCHMARK(BM_SharedObserve)->Threads(1)->Threads(2)->UseRealTime();

void BM_BatchedObserve(benchmark::State& state) {
  prometheus::Histogram& histogram = Shared();
  nuwatch::HistogramBatch batch(nuwatch::ScoreDurationBounds());
  std::int64_t i = 0;
  for (auto _ : state) {
    batch.Observe(Seconds(i++));
    if (batch.pending() == 32) batch.FlushTo(histogram);
  }
  batch.FlushTo(histogram);
  state.SetItemsProcessed(i);
}
BENCHMARK(BM_BatchedObserve)->Threads(1)->Threads(2)->UseRealTime();

void BM_SteadyClockRead(benchmark::State& state) {
  for (auto _ : state) benchmark::DoNotOptimize(std::chrono::steady_clock::now());
  state.SetItemsProcessed(state.iterations());
}
BENCHMARK(BM_SteadyClockRead);

}  // namespace

BENCHMARK_MAIN();
