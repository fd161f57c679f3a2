// The stream registry's metric series: a stream destroyed on its own takes its series with it; the
// registry cleared at shutdown leaves them to the metrics registry, so that a shutdown does not
// scan each family once per stream (prometheus-cpp's Family::Remove is a linear search; issue 9
// section 5). What is exposed is read back from the text exposition (the Prometheus format).
#include "service/stream_registry.h"

#include <gtest/gtest.h>

#include <memory>
#include <string>

#include "service/refit_pool.h"

namespace nuwatch {
namespace {

bool Exposes(const DaemonMetrics& metrics, const std::string& stream) {
  return metrics.Serialize().find("nuwatch_vectors_total{stream=\"" + stream + "\"}") !=
         std::string::npos;
}

std::unique_ptr<Stream> MakeStream(const std::string& key, RefitPool* pool,
                                   DaemonMetrics* metrics) {
  DetectorOptions options;
  options.window = 10;
  options.warmup = 10;
  return std::make_unique<Stream>(key, 2, options, pool, metrics, 10, nullptr);
}

TEST(StreamRegistry, AStreamDestroyedOnItsOwnRemovesItsSeries) {
  RefitPool pool(1);
  DaemonMetrics metrics("test");
  auto stream = MakeStream("pump-01", &pool, &metrics);
  EXPECT_TRUE(Exposes(metrics, "pump-01"));
  stream.reset();
  EXPECT_FALSE(Exposes(metrics, "pump-01"));
}

TEST(StreamRegistry, ClearLeavesTheSeriesToTheMetricsRegistry) {
  RefitPool pool(1);
  DaemonMetrics metrics("test");
  StreamRegistry streams;
  streams.Add(MakeStream("pump-01", &pool, &metrics));
  streams.Add(MakeStream("pump-02", &pool, &metrics));
  streams.Clear();
  EXPECT_EQ(streams.size(), 0u);
  // Not removed one by one: they go when `metrics` goes.
  EXPECT_TRUE(Exposes(metrics, "pump-01"));
  EXPECT_TRUE(Exposes(metrics, "pump-02"));
}

}  // namespace
}  // namespace nuwatch
