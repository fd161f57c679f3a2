// HistogramBatch (service/metrics.h): a scoring thread's observations, handed to the shared
// histogram in one ObserveMultiple, must leave it exactly as one prometheus-cpp Observe per value
// would. The reference is prometheus-cpp's own Histogram::Observe on a second histogram with the
// same bounds, fed the same values; both are read back with Collect().
#include <gtest/gtest.h>
#include <prometheus/histogram.h>

#include <cmath>
#include <limits>
#include <random>
#include <vector>

#include "service/metrics.h"

namespace nuwatch {
namespace {

void ExpectSameHistogram(const prometheus::Histogram& expected,
                         const prometheus::Histogram& actual) {
  const prometheus::ClientMetric::Histogram e = expected.Collect().histogram;
  const prometheus::ClientMetric::Histogram a = actual.Collect().histogram;
  EXPECT_EQ(a.sample_count, e.sample_count);
  // The same values summed in another order: equal up to rounding.
  EXPECT_NEAR(a.sample_sum, e.sample_sum, 1e-12 * std::abs(e.sample_sum) + 1e-300);
  ASSERT_EQ(a.bucket.size(), e.bucket.size());
  for (std::size_t i = 0; i < e.bucket.size(); ++i) {
    EXPECT_EQ(a.bucket[i].upper_bound, e.bucket[i].upper_bound) << i;
    EXPECT_EQ(a.bucket[i].cumulative_count, e.bucket[i].cumulative_count) << i;
  }
}

TEST(HistogramBatch, FlushedObservationsEqualOneObserveEachOnTheBoundsAndBetween) {
  const prometheus::Histogram::BucketBoundaries& bounds = ScoreDurationBounds();
  prometheus::Histogram reference(bounds);
  prometheus::Histogram batched(bounds);
  HistogramBatch batch(bounds);
  // Each bound exactly (Prometheus's `le`: a value equal to a bound belongs to its bucket), the
  // doubles either side of it, below the first bound and above the last (+Inf).
  std::vector<double> values = {0.0, 1e-9, 0.5, 1.0, 100.0};
  for (double b : bounds) {
    values.push_back(b);
    values.push_back(std::nextafter(b, 0.0));
    values.push_back(std::nextafter(b, std::numeric_limits<double>::infinity()));
  }
  std::mt19937 rng(7);
  std::lognormal_distribution<double> seconds(std::log(3e-6), 1.5);  // about what scoring takes
  for (int i = 0; i < 5000; ++i) values.push_back(seconds(rng));
  for (std::size_t i = 0; i < values.size(); ++i) {
    reference.Observe(values[i]);
    batch.Observe(values[i]);
    if (i % 97 == 0) batch.FlushTo(batched);  // flushes of different sizes, as turns are
  }
  EXPECT_GT(batch.pending(), 0);
  batch.FlushTo(batched);
  EXPECT_EQ(batch.pending(), 0);
  ExpectSameHistogram(reference, batched);
}

TEST(HistogramBatch, AFlushWithNothingObservedChangesNothing) {
  const prometheus::Histogram::BucketBoundaries& bounds = ScoreDurationBounds();
  prometheus::Histogram reference(bounds);
  prometheus::Histogram batched(bounds);
  HistogramBatch batch(bounds);
  batch.FlushTo(batched);
  ExpectSameHistogram(reference, batched);
  reference.Observe(2e-6);
  batch.Observe(2e-6);
  batch.FlushTo(batched);
  batch.FlushTo(batched);  // nothing new: the value must not be added twice
  ExpectSameHistogram(reference, batched);
  EXPECT_EQ(batched.Collect().histogram.sample_count, 1u);
}

}  // namespace
}  // namespace nuwatch
