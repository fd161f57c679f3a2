// Decoding one ingest payload (daemon/protocol/PROTOCOL.md §5, §6), per vector, d = 16: the JSON
// form through DecodePayload (simdjson, with the reference reader only for refusals), the same
// bytes through the reference reader alone (nlohmann's SAX parser, the decoder before simdjson),
// and the binary f32 form. Google Benchmark; the figures go into README.md:
//   build/tests/nuwatch_wire_bench --benchmark_repetitions=3 --benchmark_report_aggregates_only
#include <benchmark/benchmark.h>

#include <string>
#include <vector>

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

}  // namespace

BENCHMARK_MAIN();
