// Decoding one ingest payload (daemon/protocol/PROTOCOL.md §5, §6), per vector, d = 16: the JSON
// form through DecodePayload (simdjson, with the reference reader only for refusals), the same
// bytes through the reference reader alone (nlohmann's SAX parser, the decoder before simdjson),
// and the binary f32 form. Then the results of a 64-vector message (§9.4, §9.5), per result:
// encoding them as the daemon does (a JSON batch, or the binary batch) and decoding them as a
// subscriber would (nlohmann's DOM parser, or DecodeResultBatch). Google Benchmark; the figures go
// into README.md:
//   build/tests/nuwatch_wire_bench --benchmark_repetitions=3 --benchmark_report_aggregates_only
#include <benchmark/benchmark.h>

#include <cmath>
#include <nlohmann/json.hpp>
#include <string>
#include <vector>

#include "protocol/result_batch.h"
#include "protocol/wire_protocol.h"

namespace {

constexpr int kDims = 16;

// `rows` vectors of 16 values with 9-13 significant digits, like converted sensor readings.
std::string Payload(int rows, bool binary) {
  std::vector<double> times(rows);
  std::vector<double> values(static_cast<std::size_t>(rows) * kDims);
  for (int r = 0; r < rows; ++r) {
    times[r] = 1767225600.5 + r;
    for (int j = 0; j < kDims; ++j)
      values[r * kDims + j] = 1000.0 * j + 0.123456789 * j + 0.001 * r;
  }
  std::string payload;
  if (binary) {
    nuwatch::EncodeBinaryPayload(times, values.data(), kDims, nuwatch::Dtype::kFloat32, &payload);
  } else {
    nuwatch::EncodeJsonPayload(times, values.data(), kDims, &payload);
  }
  return payload;
}

void Decode(benchmark::State& state, bool reference, int rows, bool binary) {
  const std::string payload = Payload(rows, binary);
  const nuwatch::WireLimits limits;
  nuwatch::JsonScratch scratch;
  for (auto _ : state) {
    const nuwatch::DecodeResult result =
        reference ? nuwatch::DecodeJsonWithReferenceReader(payload, limits, &scratch)
                  : nuwatch::DecodePayload(payload, limits, &scratch);
    if (!result.ok()) state.SkipWithError("payload refused");
    benchmark::DoNotOptimize(result.payload.value(rows - 1, kDims - 1));
  }
  state.SetItemsProcessed(state.iterations() * rows);
  state.SetBytesProcessed(state.iterations() * static_cast<std::int64_t>(payload.size()));
}

BENCHMARK_CAPTURE(Decode, json_1_simdjson, false, 1, false);
BENCHMARK_CAPTURE(Decode, json_1_reference, true, 1, false);
BENCHMARK_CAPTURE(Decode, json_64_simdjson, false, 64, false);
BENCHMARK_CAPTURE(Decode, json_64_reference, true, 64, false);
BENCHMARK_CAPTURE(Decode, binary_f32_1, false, 1, true);
BENCHMARK_CAPTURE(Decode, binary_f32_64, false, 64, true);

// 64 scored results as a daemon produces them: decisions and p-values of full double precision,
// every 16th flagged and explained by three named features, an incident open from then on.
constexpr int kResults = 64;
const nuwatch::FeatureShareView kTop[] = {
    {"bearing_vibration", 3, 0.5813}, {"bearing_temp", 4, 0.2702}, {"flow", 1, 0.0811}};
std::vector<nuwatch::ScoredVector> Results() {
  std::vector<nuwatch::ScoredVector> results(kResults);
  for (int i = 0; i < kResults; ++i) {
    nuwatch::ScoredVector& r = results[static_cast<std::size_t>(i)];
    r.t = 1767225600.5 + 10 * i;
    r.learning = false;
    r.decision = 0.05 * std::sin(0.37 * i) - 0.01 / 3;
    r.p_value = 0.5 + 0.49 * std::cos(0.91 * i);
    r.anomaly = i % 16 == 15;
    r.incident_id = i >= 15 ? 7 : -1;
    r.model_version = 18;
    r.support_vectors = 162;
    if (r.anomaly) r.top_features = kTop;
  }
  return results;
}

// As PublishResults builds a §9.4 batch: each result encoded, then appended.
void EncodeJsonBatch(const std::vector<nuwatch::ScoredVector>& results, std::string* one,
                     std::string* batch) {
  batch->assign("{\"results\":[");
  for (std::size_t i = 0; i < results.size(); ++i) {
    nuwatch::EncodeResultJson(results[i], one);
    if (i > 0) batch->push_back(',');
    batch->append(*one);
  }
  batch->append("]}");
}

void EncodeResults(benchmark::State& state, bool binary) {
  const std::vector<nuwatch::ScoredVector> results = Results();
  std::string one, batch;
  nuwatch::ResultBatchEncoder encoder;
  std::size_t bytes = 0;
  for (auto _ : state) {
    if (binary) {
      encoder.Begin();
      for (const nuwatch::ScoredVector& r : results) encoder.Add(r);
      bytes = encoder.Finish().size();
    } else {
      EncodeJsonBatch(results, &one, &batch);
      bytes = batch.size();
    }
    benchmark::DoNotOptimize(bytes);
  }
  state.SetItemsProcessed(state.iterations() * kResults);
  state.counters["bytes_per_result"] = static_cast<double>(bytes) / kResults;
}

void DecodeResults(benchmark::State& state, bool binary) {
  const std::vector<nuwatch::ScoredVector> results = Results();
  std::string one, json_batch;
  EncodeJsonBatch(results, &one, &json_batch);
  nuwatch::ResultBatchEncoder encoder;
  encoder.Begin();
  for (const nuwatch::ScoredVector& r : results) encoder.Add(r);
  const std::string binary_batch = encoder.Finish();
  nuwatch::ResultBatch batch;
  for (auto _ : state) {
    if (binary) {
      if (!nuwatch::DecodeResultBatch(binary_batch, &batch).empty())
        state.SkipWithError("batch refused");
      benchmark::DoNotOptimize(batch.rows.back().decision);
    } else {
      const nlohmann::json parsed = nlohmann::json::parse(json_batch);
      benchmark::DoNotOptimize(parsed["results"].back()["decision"].get<double>());
    }
  }
  state.SetItemsProcessed(state.iterations() * kResults);
}

BENCHMARK_CAPTURE(EncodeResults, json_batch_64, false);
BENCHMARK_CAPTURE(EncodeResults, binary_batch_64, true);
BENCHMARK_CAPTURE(DecodeResults, json_batch_64_nlohmann, false);
BENCHMARK_CAPTURE(DecodeResults, binary_batch_64, true);

}  // namespace

BENCHMARK_MAIN();
