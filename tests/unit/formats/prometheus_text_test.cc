// Tests of reading samples from the Prometheus text exposition (formats/prometheus_text.h) on the
// worked example of the format's own documentation (prometheus.io, "Exposition formats", "Text
// format example", format version 0.0.4), whose values and label escapes are published there.
#include "formats/prometheus_text.h"

#include <gtest/gtest.h>

#include <cmath>
#include <string>

namespace nuwatch {
namespace {

// The documentation's example, verbatim.
const std::string kDocumentedExample =
    R"(# HELP http_requests_total The total number of HTTP requests.
# TYPE http_requests_total counter
http_requests_total{method="post",code="200"} 1027 1395066363000
http_requests_total{method="post",code="400"}    3 1395066363000

# Escaping in label values:
msdos_file_access_time_seconds{path="C:\\DIR\\FILE.TXT",error="Cannot find file:\n\"FILE.TXT\""} 1.458255915e9

# Minimalistic line:
metric_without_timestamp_and_labels 12.47

# A weird metric from before the epoch:
something_weird{problem="division by zero"} +Inf -3982045

# A histogram, which has a pretty complex representation in the text format:
# HELP http_request_duration_seconds A histogram of the request duration.
# TYPE http_request_duration_seconds histogram
http_request_duration_seconds_bucket{le="0.05"} 24054
http_request_duration_seconds_bucket{le="0.1"} 33444
http_request_duration_seconds_bucket{le="0.2"} 100392
http_request_duration_seconds_bucket{le="0.5"} 129389
http_request_duration_seconds_bucket{le="1"} 133988
http_request_duration_seconds_bucket{le="+Inf"} 144320
http_request_duration_seconds_sum 53423
http_request_duration_seconds_count 144320
)";

TEST(SamplesByLabel, ReadsTheDocumentedExampleByLabel) {
  // The two series of http_requests_total by code: 1027 and 3, the timestamp not taken for a
  // value (the example's values).
  const auto by_code = SamplesByLabel(kDocumentedExample, "http_requests_total", "code");
  ASSERT_EQ(by_code.size(), 2u);
  EXPECT_EQ(by_code.at("200"), 1027);
  EXPECT_EQ(by_code.at("400"), 3);
  // Summed over the label that was not asked for: 1027 + 3.
  const auto by_method = SamplesByLabel(kDocumentedExample, "http_requests_total", "method");
  ASSERT_EQ(by_method.size(), 1u);
  EXPECT_EQ(by_method.at("post"), 1030);
}

TEST(SamplesByLabel, UnescapesLabelValuesAsTheFormatDefines) {
  // The format's escapes: \\ for a backslash, \" for a quote, \n for a line feed.
  const auto by_path = SamplesByLabel(kDocumentedExample, "msdos_file_access_time_seconds", "path");
  ASSERT_EQ(by_path.size(), 1u);
  EXPECT_EQ(by_path.begin()->first, "C:\\DIR\\FILE.TXT");
  EXPECT_EQ(by_path.begin()->second, 1.458255915e9);
  const auto by_error =
      SamplesByLabel(kDocumentedExample, "msdos_file_access_time_seconds", "error");
  EXPECT_EQ(by_error.begin()->first, "Cannot find file:\n\"FILE.TXT\"");
}

TEST(SamplesByLabel, ReadsLinesWithoutLabelsAndTheFormatsInfinity) {
  const auto plain =
      SamplesByLabel(kDocumentedExample, "metric_without_timestamp_and_labels", "any");
  ASSERT_EQ(plain.size(), 1u);
  EXPECT_EQ(plain.at(""), 12.47);
  const auto weird = SamplesByLabel(kDocumentedExample, "something_weird", "problem");
  EXPECT_EQ(weird.at("division by zero"), INFINITY);
}

TEST(SamplesByLabel, SkipsMetricsWhoseNamesOnlyStartAlike) {
  // http_request_duration_seconds has only _bucket, _sum and _count series: none is its own.
  EXPECT_TRUE(SamplesByLabel(kDocumentedExample, "http_request_duration_seconds", "le").empty());
  const auto buckets =
      SamplesByLabel(kDocumentedExample, "http_request_duration_seconds_bucket", "le");
  ASSERT_EQ(buckets.size(), 6u);
  EXPECT_EQ(buckets.at("+Inf"), 144320);
  EXPECT_EQ(buckets.at("0.05"), 24054);
  EXPECT_TRUE(SamplesByLabel(kDocumentedExample, "no_such_metric", "x").empty());
}

TEST(SamplesByLabel, AMalformedSampleOfTheMetricAskedForIsAnErrorNamingItsLine) {
  const std::string other_bad = "a_total{reason=\"x\"} 1\nb_total{reason=\"x} 1\n";
  EXPECT_EQ(SamplesByLabel(other_bad, "a_total", "reason").at("x"), 1);  // b's line is not read
  const auto error_of = [](const std::string& text) {
    try {
      SamplesByLabel(text, "a_total", "reason");
    } catch (const ExpositionError& e) {
      return std::string(e.what());
    }
    return std::string("no error");
  };
  EXPECT_EQ(error_of("# x\na_total{reason=\"x} 1\n"),
            "line 2 (a_total): a label value is not closed");
  EXPECT_EQ(error_of("a_total{reason=\"x\" 1\n"),
            "line 1 (a_total): a label without '=' in the "
            "label set");
  EXPECT_EQ(error_of("a_total{reason=\"x\"}\n"), "line 1 (a_total): no value");
  EXPECT_EQ(error_of("a_total{reason=\"x\"} many\n"), "line 1 (a_total): 'many' is not a number");
  EXPECT_EQ(error_of("a_total{reason=\"\\t\"} 1\n"),
            "line 1 (a_total): unknown escape \\t in a label value");
}

}  // namespace
}  // namespace nuwatch
