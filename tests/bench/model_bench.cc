// Scoring with a fitted model, one vector (Model::Decision, the daemon's single-vector path) and
// a block of 1024 (Model::DecisionBatch, the path of a message of many vectors), d = 16, at two
// sizes of model. Google Benchmark; the figures go into README.md:
//   build/tests/nuwatch_model_bench --benchmark_repetitions=3 --benchmark_report_aggregates_only
#include <benchmark/benchmark.h>

#include <memory>
#include <random>
#include <vector>

#include "nuwatch/model.h"

namespace {

constexpr int kDims = 16;

nuwatch::MatrixD Gaussian(int rows, unsigned seed) {
  std::mt19937 generator(seed);
  std::normal_distribution<double> normal;
  nuwatch::MatrixD x(rows, kDims);
  for (int i = 0; i < rows; ++i)
    for (int j = 0; j < kDims; ++j) x(i, j) = normal(generator);
  return x;
}

// nu = range(0) / 100 on 5000 vectors: 0.02 gives 181 support vectors, 0.05 gives 304.
const nuwatch::Model& Fitted(int nu_percent) {
  static std::vector<std::unique_ptr<nuwatch::Model>> models(101);
  auto& model = models[nu_percent];
  if (!model) {
    nuwatch::FitOptions options;
    options.nu = nu_percent / 100.0;
    model = std::make_unique<nuwatch::Model>(nuwatch::FitModel(Gaussian(5000, 1), options));
  }
  return *model;
}

void BM_DecisionOneVector(benchmark::State& state) {
  const nuwatch::Model& model = Fitted(static_cast<int>(state.range(0)));
  const nuwatch::MatrixD queries = Gaussian(1024, 2);
  std::vector<std::vector<double>> rows(queries.rows());
  for (int i = 0; i < queries.rows(); ++i)
    rows[i].assign(queries.row(i).data(), queries.row(i).data() + kDims);
  std::size_t i = 0;
  for (auto _ : state) {
    benchmark::DoNotOptimize(model.Decision(rows[i]));
    i = (i + 1) % rows.size();
  }
  state.SetItemsProcessed(state.iterations());
  state.counters["support_vectors"] = model.num_support();
}
BENCHMARK(BM_DecisionOneVector)->Arg(2)->Arg(5);

void BM_DecisionBatch1024(benchmark::State& state) {
  const nuwatch::Model& model = Fitted(static_cast<int>(state.range(0)));
  const nuwatch::MatrixD queries = Gaussian(1024, 2);
  for (auto _ : state) benchmark::DoNotOptimize(model.DecisionBatch(queries));
  state.SetItemsProcessed(state.iterations() * queries.rows());
  state.counters["support_vectors"] = model.num_support();
}
BENCHMARK(BM_DecisionBatch1024)->Arg(2)->Arg(5);

}  // namespace

BENCHMARK_MAIN();
