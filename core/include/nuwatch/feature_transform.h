// Temporal context for one stream: each raw vector is augmented with its previous vectors and with
// short rolling statistics before it is scaled and scored (methods.md "Temporal context").
//
// Output columns, for base dimension d, L lags, windows w_1..w_K and statistics s_1..s_S:
//   [ x_t (d) | x_{t-1} (d) | ... | x_{t-L} (d) | for w in windows, for s in statistics: s_w (d) ]
// so the identity transform (no lags, no windows) is the identity. Stacking previous vectors is
// the augmentation of dynamic PCA (Ku, Storer & Georgakis, Chemometrics and Intelligent Laboratory
// Systems 30:179-196, 1995). Each rolling statistic is taken per feature over the last w vectors,
// the current one included (x_{t-w+1} .. x_t, indexed i = 0..w-1, oldest first):
//   mean   (1/w) sum_i x_i
//   std    the sample standard deviation, sqrt( sum_i (x_i - mean)^2 / (w - 1) ): divisor w - 1,
//          the default (ddof = 1) of pandas' Rolling.std; numpy.std's default ddof = 0 divides by w
//   slope  the least-squares slope of x_i against the vector index i:
//          sum_i (i - ibar)(x_i - mean) / sum_i (i - ibar)^2, ibar = (w - 1) / 2, the denominator
//          being w (w^2 - 1) / 12. Units: feature units per vector, NOT per second: rows may be
//          irregularly spaced, and the index is what the model sees consistently.
//
// History and time. history_needed() raw vectors must precede the first output. A Push whose time
// is earlier than the previous vector's (the stream's clock went back, or old data is replayed
// into a live stream), or later by more than max_gap_seconds (when that is > 0), first drops the
// history: a lag or a window must not straddle a hole or mix two spans of time. Equal times are
// fine. Only the order of the vectors matters otherwise; their spacing is not looked at.
//
// Numerics. The rolling statistics are updated in O(d) per vector and per window (Welford-style
// add and remove on deviations from the running mean, never raw sums of squares), and recomputed
// exactly from the history (the corrected two-pass algorithm of Chan, Golub & LeVeque, The
// American Statistician 37(3):242-247, 1983) every w outputs of a window, and at once for a feature
// whose sum of squared deviations has fallen below 2^-20 of its largest value since its last exact
// computation (an outlier leaving the window: removing it cancels most of the sum). So rounding
// cannot accumulate for longer than one window and cannot be magnified by more than about 10^6;
// tests compare 10^6 pushes against a naive long-double recomputation. A window of w vectors costs
// one extra pass of (w - 1) d operations every w outputs: a latency bump, not a growing cost.
//
// Thread safety: not thread-safe. One per stream, owned by the stream's thread. The const members
// (TransformAll, OutputNames, ExportState, ...) may run concurrently with each other, not with
// Push. Allocation: the constructor sizes everything; Push and Reset allocate nothing (unless they
// throw); TransformAll, OutputNames, ExportState and ImportState allocate.
#pragma once

#include <cstddef>
#include <cstdint>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {

enum class RollingStatistic { kMean = 0, kStd = 1, kSlope = 2 };

// "mean", "std", "slope".
std::string_view RollingStatisticName(RollingStatistic statistic);
// The inverse of RollingStatisticName; nullopt for anything else.
std::optional<RollingStatistic> ParseRollingStatistic(std::string_view name);

struct FeatureTransformOptions {
  // How many previous vectors are stacked beside the current one, in [0, 1000]. Each lag adds d
  // columns: the kernel width chosen on d columns does not carry over (scale after augmenting).
  int lags = 0;
  // Lengths w of the rolling statistics, in vectors, each in [2, 100000], no duplicates; empty:
  // none. A long window needs a long history before the first output (history_needed()).
  std::vector<int> rolling_windows;
  // Computed for each window, in this order; non-empty and without duplicates when windows are
  // given (ignored otherwise).
  std::vector<RollingStatistic> rolling_statistics = {
      RollingStatistic::kMean, RollingStatistic::kStd, RollingStatistic::kSlope};
  // 0: gaps never reset the history; else a step in time larger than this (seconds) does.
  double max_gap_seconds = 0;

  // No lags and no rolling windows: the output is the input.
  bool identity() const { return lags == 0 && rolling_windows.empty(); }
  bool operator==(const FeatureTransformOptions&) const = default;
};

// Requires nothing. Throws PreconditionError "<where>: <key> = <value> ..." for the first broken
// rule of FeatureTransformOptions above (lags in [0, 1000]; each window in [2, 100000]; no
// duplicate window; statistics known, non-empty and without duplicates when windows are given;
// max_gap_seconds finite and >= 0).
void CheckFeatureTransformOptions(const FeatureTransformOptions& options, std::string_view where);

// What a state file needs to resume a transform without refilling its history.
struct FeatureTransformState {
  // The last history_needed() raw vectors, oldest first (fewer while the history fills), and their
  // times. history has base_dims columns (or is 0 x 0 when empty).
  MatrixD history;
  std::vector<double> times;
  // The running rolling statistics, so that a resumed transform continues bit for bit. Empty (as
  // after Reset, or when the history is not complete): ImportState recomputes them exactly from
  // history at the next output, which then agrees with an uninterrupted run to rounding only.
  // running_windows: the windows the block was computed for. running: for each of those windows,
  // for each of [mean, sum of squared deviations, index-weighted sum, largest sum of squared
  // deviations since the last exact computation], d values, all over the last w - 1 vectors.
  // running_outputs: outputs since the statistics were initialised (it schedules the exact
  // recomputations). Store all three as they are; they mean nothing outside this class.
  std::vector<int> running_windows;
  std::vector<double> running;
  int64_t running_outputs = 0;

  bool operator==(const FeatureTransformState&) const;
};

// Why the last Push dropped the history, if it did.
enum class HistoryReset { kNone = 0, kGap = 1, kTimeWentBack = 2 };

class FeatureTransform {
 public:
  // Requires: options valid (CheckFeatureTransformOptions), base_dims >= 1, output_dims() and the
  // history buffer within int range. Throws PreconditionError naming the value otherwise.
  FeatureTransform(const FeatureTransformOptions& options, int base_dims);

  const FeatureTransformOptions& options() const { return options_; }
  int base_dims() const { return base_dims_; }
  // base_dims (1 + lags + windows x statistics); base_dims for the identity.
  int output_dims() const { return output_dims_; }
  // Raw vectors that must precede the first output: max(lags, largest window - 1); 0 for the
  // identity. After construction, Reset or a reset by time, that many vectors give no output, so a
  // warm-up counted in raw vectors takes this many more.
  int history_needed() const { return history_needed_; }
  // Raw vectors held now that a next output would use: min(vectors since the last reset,
  // history_needed()).
  int history_size() const;
  // Whether the next Push produces an output (unless its time resets the history).
  bool ready() const { return history_size() == history_needed_; }

  // Takes one raw vector at `time` (seconds, any epoch). First drops the history when time is
  // earlier than the previous vector's time, or later by more than max_gap_seconds (> 0); see
  // last_push_reset(). Then, when the history is complete, writes output_dims() values into out
  // and returns true; while it fills, returns false and leaves out untouched.
  // Requires: x.size() == base_dims(), out.size() == output_dims(), finite time and values
  // (PreconditionError otherwise; the transform is unchanged then). No allocation.
  bool Push(double time, std::span<const double> x, std::span<double> out);

  // Drops the history (the next history_needed() pushes fill it again). Keeps the counters.
  void Reset();

  // What the last Push did to the history (kNone before any Push and after Reset or ImportState).
  HistoryReset last_push_reset() const { return last_push_reset_; }
  // Resets caused by Push since construction (not by Reset or ImportState; not in the state).
  int64_t gap_resets() const { return gap_resets_; }
  int64_t time_went_back_resets() const { return time_went_back_resets_; }

  // The batch form for offline tools: pushes rows (in time order) through a fresh transform of the
  // same options, independent of this object's history. times: rows.rows() entries, or empty for
  // no time checks (no resets). Returns the output rows in order (bit for bit what repeated Push
  // gives) and, when output_row_of_input is not null, sets it to rows.rows() entries: the index of
  // each input row's output row, or -1 while the history filled.
  // Requires: rows.cols() == base_dims() (or rows.rows() == 0), times empty or of size rows.rows(),
  // finite values and times (PreconditionError naming the row otherwise).
  MatrixD TransformAll(const MatrixD& rows, std::span<const double> times,
                       std::vector<int64_t>* output_row_of_input) const;

  // Output column names from the base features' names, e.g. "flow_m3h", "flow_m3h, lag 1",
  // "flow_m3h, mean of 6", "flow_m3h, std of 6", "flow_m3h, slope of 6". Empty base_names: "x0",
  // "x1", ... Requires: base_names empty or of size base_dims() (PreconditionError otherwise).
  std::vector<std::string> OutputNames(const std::vector<std::string>& base_names) const;

  // For each output column: the base feature it comes from and the transform ("" for the current
  // value, "lag 1", "mean of 6", ...), so that an explanation can say "feature, transform".
  struct ColumnSource {
    int base_feature = 0;
    std::string transform;
    bool operator==(const ColumnSource&) const = default;
  };
  const std::vector<ColumnSource>& column_sources() const { return column_sources_; }

  // The history and the running statistics (see FeatureTransformState).
  FeatureTransformState ExportState() const;
  // Replaces the history with a saved one. When it holds more than history_needed() vectors (the
  // options changed) only the newest are kept; when its times step by more than max_gap_seconds
  // only the vectors after the last such step are kept, as pushing them in order would. The running
  // statistics are used when the history is complete, nothing was dropped and running_windows
  // equals the options' windows; else they are recomputed at the next output.
  // Requires: history.cols() == base_dims() unless history has no rows; times.size() ==
  // history.rows(); finite values; times finite and non-decreasing; running_outputs >= 0; and a
  // running block that is used: windows x 4 x base_dims() finite values, each sum of squares in
  // [0, its recorded largest]. Throws PreconditionError naming the offending field and value; the
  // transform is unchanged then. Counters and last_push_reset() are not part of the state.
  void ImportState(const FeatureTransformState& state);

  // Bytes held (object, history, running statistics, column descriptions); constant after
  // construction.
  std::size_t MemoryBytes() const;

 private:
  // Running statistics of window k over its pending w - 1 vectors (see the .cc).
  double* RunningBlock(int k, int field) {
    return running_.data() + (static_cast<std::size_t>(k) * 4 + field) * base_dims_;
  }
  const double* Row(int logical) const;  // 0: the oldest vector held
  void InitialiseRunning();
  void ExactPending(int k, int first_row, int feature_begin, int feature_end);
  void WriteOutput(std::span<double> out);

  FeatureTransformOptions options_;
  int base_dims_;
  int output_dims_;
  int history_needed_;
  int capacity_;                 // history_needed + 1 slots: the history plus the current vector
  std::vector<double> values_;   // capacity x base_dims, row-major by slot
  std::vector<double> times_;    // by slot
  int head_ = 0;                 // slot of the oldest vector
  int size_ = 0;                 // vectors held, <= capacity
  std::vector<double> running_;  // windows x 4 x base_dims
  bool running_valid_ = false;
  int64_t running_outputs_ = 0;
  std::vector<double> scratch_;  // base_dims, for the exact recomputations
  // For window k and statistic s (as RollingStatistic): the first output column of its d values,
  // or -1 when that statistic is not asked for.
  std::vector<int> statistic_columns_;
  std::vector<ColumnSource> column_sources_;
  HistoryReset last_push_reset_ = HistoryReset::kNone;
  int64_t gap_resets_ = 0;
  int64_t time_went_back_resets_ = 0;
};

}  // namespace nuwatch
