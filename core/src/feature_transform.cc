#include "nuwatch/feature_transform.h"

#include <algorithm>
#include <climits>
#include <cmath>
#include <string>

#include "number_text.h"

namespace nuwatch {
namespace {

constexpr int kMaxLags = 1000;
constexpr int kMinWindow = 2;
constexpr int kMaxWindow = 100000;
constexpr int kStatistics = 3;  // RollingStatistic values

// The fields of a window's running block (FeatureTransformState::running).
constexpr int kMean = 0;     // mean of the pending w - 1 vectors
constexpr int kSquares = 1;  // sum of their squared deviations from that mean
constexpr int kIndexed = 2;  // sum_i (i - ibar)(x_i - mean), i = 0..w-2, ibar = (w - 1) / 2
constexpr int kLargest = 3;  // largest full-window sum of squares since the last exact computation

// A sum of squares that has fallen below this fraction of its largest value since it was last
// computed exactly has lost that many bits to cancellation: it is recomputed. 2^-20 keeps the
// relative error of the result within about 10^6 rounding errors of the largest sum.
constexpr double kCancellationLimit = 0x1p-20;

bool AllFinite(std::span<const double> values) {
  for (double v : values) {
    if (!std::isfinite(v)) return false;
  }
  return true;
}

}  // namespace

std::string_view RollingStatisticName(RollingStatistic statistic) {
  switch (statistic) {
    case RollingStatistic::kMean:
      return "mean";
    case RollingStatistic::kStd:
      return "std";
    case RollingStatistic::kSlope:
      return "slope";
  }
  return "unknown";
}

std::optional<RollingStatistic> ParseRollingStatistic(std::string_view name) {
  if (name == "mean") return RollingStatistic::kMean;
  if (name == "std") return RollingStatistic::kStd;
  if (name == "slope") return RollingStatistic::kSlope;
  return std::nullopt;
}

void CheckFeatureTransformOptions(const FeatureTransformOptions& options, std::string_view where) {
  auto fail = [&](const std::string& what) {
    throw PreconditionError(std::string(where) + ": " + what);
  };
  if (options.lags < 0 || options.lags > kMaxLags) {
    fail("lags = " + std::to_string(options.lags) + " is outside [0, " + std::to_string(kMaxLags) +
         "]");
  }
  const std::vector<int>& windows = options.rolling_windows;
  for (std::size_t k = 0; k < windows.size(); ++k) {
    if (windows[k] < kMinWindow || windows[k] > kMaxWindow) {
      fail("rolling_windows[" + std::to_string(k) + "] = " + std::to_string(windows[k]) +
           " is outside [" + std::to_string(kMinWindow) + ", " + std::to_string(kMaxWindow) + "]");
    }
    for (std::size_t earlier = 0; earlier < k; ++earlier) {
      if (windows[earlier] == windows[k]) {
        fail("rolling_windows = " + std::to_string(windows[k]) + " is listed twice");
      }
    }
  }
  if (!windows.empty()) {
    const std::vector<RollingStatistic>& statistics = options.rolling_statistics;
    if (statistics.empty()) {
      fail(
          "rolling_statistics is empty while rolling_windows is not (name at least one of mean, "
          "std, slope)");
    }
    for (std::size_t s = 0; s < statistics.size(); ++s) {
      const int value = static_cast<int>(statistics[s]);
      if (value < 0 || value >= kStatistics) {
        fail("rolling_statistics[" + std::to_string(s) + "] = " + std::to_string(value) +
             " is not a statistic (mean, std, slope)");
      }
      for (std::size_t earlier = 0; earlier < s; ++earlier) {
        if (statistics[earlier] == statistics[s]) {
          fail("rolling_statistics = \"" + std::string(RollingStatisticName(statistics[s])) +
               "\" is listed twice");
        }
      }
    }
  }
  if (!std::isfinite(options.max_gap_seconds) || options.max_gap_seconds < 0) {
    fail("max_gap_seconds = " + RoundTripText(options.max_gap_seconds) +
         " must be finite and >= 0");
  }
}

bool FeatureTransformState::operator==(const FeatureTransformState& other) const {
  // Eigen's == requires equal shapes; an empty history equals any other empty one.
  const bool same_history =
      history.rows() == other.history.rows() &&
      (history.rows() == 0 || (history.cols() == other.history.cols() && history == other.history));
  return same_history && times == other.times && running_windows == other.running_windows &&
         running == other.running && running_outputs == other.running_outputs;
}

FeatureTransform::FeatureTransform(const FeatureTransformOptions& options, int base_dims)
    : options_(options), base_dims_(base_dims) {
  CheckFeatureTransformOptions(options, "FeatureTransform");
  if (base_dims < 1) {
    throw PreconditionError("FeatureTransform: base_dims = " + std::to_string(base_dims) +
                            " must be >= 1");
  }
  const int64_t windows = static_cast<int64_t>(options.rolling_windows.size());
  const int64_t statistics =
      windows > 0 ? static_cast<int64_t>(options.rolling_statistics.size()) : 0;
  const int64_t blocks = 1 + options.lags + windows * statistics;
  if (blocks * base_dims > INT_MAX) {
    throw PreconditionError("FeatureTransform: base_dims = " + std::to_string(base_dims) +
                            " with these options gives " + std::to_string(blocks * base_dims) +
                            " output columns, more than an int holds");
  }
  output_dims_ = static_cast<int>(blocks * base_dims);
  int largest_window = 0;
  for (int w : options.rolling_windows) largest_window = std::max(largest_window, w);
  history_needed_ = std::max(options.lags, largest_window - 1);
  capacity_ = history_needed_ + 1;
  if (static_cast<int64_t>(capacity_) * base_dims > INT_MAX) {
    throw PreconditionError("FeatureTransform: a history of " + std::to_string(capacity_) +
                            " vectors of base_dims = " + std::to_string(base_dims) +
                            " is more values than an int holds");
  }
  if (!options.identity()) {
    values_.assign(static_cast<std::size_t>(capacity_) * base_dims, 0.0);
    times_.assign(static_cast<std::size_t>(capacity_), 0.0);
  }
  running_.assign(static_cast<std::size_t>(windows) * 4 * base_dims, 0.0);
  scratch_.assign(windows > 0 ? static_cast<std::size_t>(base_dims) : 0, 0.0);

  // Column layout and descriptions, in output order.
  column_sources_.reserve(static_cast<std::size_t>(output_dims_));
  for (int j = 0; j < base_dims; ++j) column_sources_.push_back({j, ""});
  for (int lag = 1; lag <= options.lags; ++lag) {
    for (int j = 0; j < base_dims; ++j)
      column_sources_.push_back({j, "lag " + std::to_string(lag)});
  }
  statistic_columns_.assign(static_cast<std::size_t>(windows) * kStatistics, -1);
  for (int64_t k = 0; k < windows; ++k) {
    const int w = options.rolling_windows[static_cast<std::size_t>(k)];
    for (RollingStatistic statistic : options.rolling_statistics) {
      statistic_columns_[static_cast<std::size_t>(k * kStatistics + static_cast<int>(statistic))] =
          static_cast<int>(column_sources_.size());
      const std::string transform =
          std::string(RollingStatisticName(statistic)) + " of " + std::to_string(w);
      for (int j = 0; j < base_dims; ++j) column_sources_.push_back({j, transform});
    }
  }
}

int FeatureTransform::history_size() const { return std::min(size_, history_needed_); }

const double* FeatureTransform::Row(int logical) const {
  int slot = head_ + logical;
  if (slot >= capacity_) slot -= capacity_;
  return values_.data() + static_cast<std::size_t>(slot) * base_dims_;
}

void FeatureTransform::Reset() {
  head_ = 0;
  size_ = 0;
  running_valid_ = false;
  running_outputs_ = 0;
  last_push_reset_ = HistoryReset::kNone;
}

bool FeatureTransform::Push(double time, std::span<const double> x, std::span<double> out) {
  if (x.size() != static_cast<std::size_t>(base_dims_)) {
    throw PreconditionError("FeatureTransform::Push: the vector has " + std::to_string(x.size()) +
                            " values, base_dims = " + std::to_string(base_dims_));
  }
  if (out.size() != static_cast<std::size_t>(output_dims_)) {
    throw PreconditionError("FeatureTransform::Push: out has " + std::to_string(out.size()) +
                            " values, output_dims = " + std::to_string(output_dims_));
  }
  if (!std::isfinite(time)) {
    throw PreconditionError("FeatureTransform::Push: time = " + RoundTripText(time) +
                            " is not finite");
  }
  for (std::size_t j = 0; j < x.size(); ++j) {
    if (!std::isfinite(x[j])) {
      // Checked before anything changes: one NaN would otherwise poison the running statistics.
      throw PreconditionError("FeatureTransform::Push: value " + std::to_string(j) + " = " +
                              RoundTripText(x[j]) + " is not finite");
    }
  }
  last_push_reset_ = HistoryReset::kNone;
  if (options_.identity()) {
    std::copy(x.begin(), x.end(), out.begin());
    return true;
  }
  if (size_ > 0) {
    const double previous = times_[static_cast<std::size_t>(
        head_ + size_ - 1 < capacity_ ? head_ + size_ - 1 : head_ + size_ - 1 - capacity_)];
    if (time < previous) {
      Reset();
      last_push_reset_ = HistoryReset::kTimeWentBack;
      ++time_went_back_resets_;
    } else if (options_.max_gap_seconds > 0 && time - previous > options_.max_gap_seconds) {
      Reset();
      last_push_reset_ = HistoryReset::kGap;
      ++gap_resets_;
    }
  }
  int slot;
  if (size_ == capacity_) {
    slot = head_;  // overwrite the oldest
    head_ = head_ + 1 == capacity_ ? 0 : head_ + 1;
  } else {
    slot = head_ + size_ < capacity_ ? head_ + size_ : head_ + size_ - capacity_;
    ++size_;
  }
  std::copy(x.begin(), x.end(), values_.begin() + static_cast<std::ptrdiff_t>(slot) * base_dims_);
  times_[static_cast<std::size_t>(slot)] = time;
  if (size_ < capacity_) return false;
  WriteOutput(out);
  return true;
}

// Exact statistics of window k's pending vectors: the w - 1 rows from first_row on, for features
// [feature_begin, feature_end). The corrected two-pass algorithm (Chan, Golub & LeVeque 1983): the
// second pass measures deviations from the first-pass mean and corrects the mean, the sum of
// squares and the index-weighted sum by the rounding error of that mean.
void FeatureTransform::ExactPending(int k, int first_row, int feature_begin, int feature_end) {
  const int w = options_.rolling_windows[static_cast<std::size_t>(k)];
  const int n = w - 1;
  const double ibar = 0.5 * (w - 1);
  double* mean = RunningBlock(k, kMean);
  double* squares = RunningBlock(k, kSquares);
  double* indexed = RunningBlock(k, kIndexed);
  double* largest = RunningBlock(k, kLargest);
  double* deviation_sum = scratch_.data();
  for (int j = feature_begin; j < feature_end; ++j) mean[j] = 0;
  for (int i = 0; i < n; ++i) {
    const double* row = Row(first_row + i);
    for (int j = feature_begin; j < feature_end; ++j) mean[j] += row[j];
  }
  for (int j = feature_begin; j < feature_end; ++j) {
    mean[j] /= n;
    squares[j] = 0;
    indexed[j] = 0;
    deviation_sum[j] = 0;
  }
  for (int i = 0; i < n; ++i) {
    const double* row = Row(first_row + i);
    const double centred_index = i - ibar;
    for (int j = feature_begin; j < feature_end; ++j) {
      const double e = row[j] - mean[j];
      deviation_sum[j] += e;
      squares[j] += e * e;
      indexed[j] += centred_index * e;
    }
  }
  for (int j = feature_begin; j < feature_end; ++j) {
    const double correction = deviation_sum[j] / n;
    mean[j] += correction;
    squares[j] = std::max(0.0, squares[j] - deviation_sum[j] * correction);
    // sum_{i<n} (i - ibar) = -ibar, so moving the centre by `correction` adds ibar * correction.
    indexed[j] += ibar * correction;
    largest[j] = squares[j];
  }
}

void FeatureTransform::InitialiseRunning() {
  const int windows = static_cast<int>(options_.rolling_windows.size());
  for (int k = 0; k < windows; ++k) {
    const int w = options_.rolling_windows[static_cast<std::size_t>(k)];
    // The w - 1 vectors before the newest one, which WriteOutput then adds.
    ExactPending(k, capacity_ - w, 0, base_dims_);
  }
  running_outputs_ = 0;
  running_valid_ = true;
}

void FeatureTransform::WriteOutput(std::span<double> out) {
  const int d = base_dims_;
  const double* x = Row(capacity_ - 1);
  std::copy(x, x + d, out.begin());
  for (int lag = 1; lag <= options_.lags; ++lag) {
    const double* previous = Row(capacity_ - 1 - lag);
    std::copy(previous, previous + d, out.begin() + static_cast<std::ptrdiff_t>(lag) * d);
  }
  const int windows = static_cast<int>(options_.rolling_windows.size());
  if (windows == 0) return;
  if (!running_valid_) InitialiseRunning();
  ++running_outputs_;
  for (int k = 0; k < windows; ++k) {
    const int w = options_.rolling_windows[static_cast<std::size_t>(k)];
    const double ibar = 0.5 * (w - 1);
    const double index_squares = static_cast<double>(w) * (static_cast<double>(w) * w - 1) / 12;
    const int* columns = statistic_columns_.data() + static_cast<std::size_t>(k) * kStatistics;
    double* const mean_out = columns[0] >= 0 ? out.data() + columns[0] : nullptr;
    double* const std_out = columns[1] >= 0 ? out.data() + columns[1] : nullptr;
    double* const slope_out = columns[2] >= 0 ? out.data() + columns[2] : nullptr;
    double* mean = RunningBlock(k, kMean);
    double* squares = RunningBlock(k, kSquares);
    double* indexed = RunningBlock(k, kIndexed);
    double* largest = RunningBlock(k, kLargest);
    // The vector leaving: the oldest of this window, which the next window no longer holds.
    const double* leaving = Row(capacity_ - w);
    const bool scheduled = running_outputs_ % w == 0;
    for (int j = 0; j < d; ++j) {
      // Add x to the pending w - 1 vectors (Welford's update on deviations).
      const double delta = x[j] - mean[j];
      const double full_mean = mean[j] + delta / w;
      const double full_squares = std::max(0.0, squares[j] + delta * (x[j] - full_mean));
      // x sits at index w - 1, i.e. ibar from the centre; the pending sum is already centred on
      // the pending mean, and sum_i (i - ibar) = 0 over the full window makes the centre free.
      const double full_indexed = indexed[j] + ibar * delta;
      if (mean_out) mean_out[j] = full_mean;
      if (std_out) std_out[j] = std::sqrt(full_squares / (w - 1));
      if (slope_out) slope_out[j] = full_indexed / index_squares;
      if (scheduled) continue;  // recomputed exactly below
      // Remove the leaving vector (Welford's update run backwards) and shift the indices by one.
      const double gone = leaving[j] - full_mean;
      const double pending_mean = full_mean - gone / (w - 1);
      const double pending_squares = squares[j] =
          std::max(0.0, full_squares - gone * (leaving[j] - pending_mean));
      mean[j] = pending_mean;
      // Re-indexing i -> i - 1 subtracts the sum of the remaining deviations, which is 0.
      indexed[j] = full_indexed + ibar * (leaving[j] - pending_mean);
      // Removing a vector cannot raise the sum of squares; the max guards against rounding, so
      // that an exported state always passes ImportState's check squares <= largest.
      largest[j] = std::max({largest[j], full_squares, pending_squares});
      if (pending_squares < kCancellationLimit * largest[j]) {
        ExactPending(k, capacity_ - w + 1, j, j + 1);
      }
    }
    if (scheduled) ExactPending(k, capacity_ - w + 1, 0, d);
  }
}

MatrixD FeatureTransform::TransformAll(const MatrixD& rows, std::span<const double> times,
                                       std::vector<int64_t>* output_row_of_input) const {
  const int64_t n = rows.rows();
  if (n > 0 && rows.cols() != base_dims_) {
    throw PreconditionError("FeatureTransform::TransformAll: rows have " +
                            std::to_string(rows.cols()) +
                            " columns, base_dims = " + std::to_string(base_dims_));
  }
  if (!times.empty() && static_cast<int64_t>(times.size()) != n) {
    throw PreconditionError("FeatureTransform::TransformAll: " + std::to_string(times.size()) +
                            " times for " + std::to_string(n) + " rows");
  }
  FeatureTransform fresh(options_, base_dims_);
  MatrixD out(n, output_dims_);
  if (output_row_of_input) output_row_of_input->assign(static_cast<std::size_t>(n), -1);
  int64_t produced = 0;
  for (int64_t i = 0; i < n; ++i) {
    const std::span<const double> x(rows.data() + i * rows.cols(),
                                    static_cast<std::size_t>(rows.cols()));
    const double time = times.empty() ? 0.0 : times[static_cast<std::size_t>(i)];
    bool wrote;
    try {
      wrote = fresh.Push(time, x,
                         std::span<double>(out.data() + produced * output_dims_,
                                           static_cast<std::size_t>(output_dims_)));
    } catch (const PreconditionError& error) {
      throw PreconditionError("FeatureTransform::TransformAll: row " + std::to_string(i) + ": " +
                              error.what());
    }
    if (wrote) {
      if (output_row_of_input) (*output_row_of_input)[static_cast<std::size_t>(i)] = produced;
      ++produced;
    }
  }
  out.conservativeResize(produced, output_dims_);
  return out;
}

std::vector<std::string> FeatureTransform::OutputNames(
    const std::vector<std::string>& base_names) const {
  if (!base_names.empty() && base_names.size() != static_cast<std::size_t>(base_dims_)) {
    throw PreconditionError("FeatureTransform::OutputNames: " + std::to_string(base_names.size()) +
                            " base names, base_dims = " + std::to_string(base_dims_));
  }
  std::vector<std::string> names;
  names.reserve(column_sources_.size());
  for (const ColumnSource& source : column_sources_) {
    std::string name;
    if (base_names.empty()) {
      // Appended rather than "x" + to_string(...): GCC 12 warns falsely (-Wrestrict) on the latter.
      name = "x";
      name += std::to_string(source.base_feature);
    } else {
      name = base_names[static_cast<std::size_t>(source.base_feature)];
    }
    if (!source.transform.empty()) name += ", " + source.transform;
    names.push_back(std::move(name));
  }
  return names;
}

FeatureTransformState FeatureTransform::ExportState() const {
  FeatureTransformState state;
  const int held = history_size();
  state.history.resize(held, base_dims_);
  state.times.resize(static_cast<std::size_t>(held));
  for (int i = 0; i < held; ++i) {
    const int logical = size_ - held + i;
    const double* row = Row(logical);
    std::copy(row, row + base_dims_,
              state.history.data() + static_cast<std::ptrdiff_t>(i) * base_dims_);
    int slot = head_ + logical;
    if (slot >= capacity_) slot -= capacity_;
    state.times[static_cast<std::size_t>(i)] = times_[static_cast<std::size_t>(slot)];
  }
  if (running_valid_) {
    state.running_windows = options_.rolling_windows;
    state.running = running_;
    state.running_outputs = running_outputs_;
  }
  return state;
}

void FeatureTransform::ImportState(const FeatureTransformState& state) {
  const std::string where = "FeatureTransform::ImportState: ";
  const int64_t n = state.history.rows();
  if (n > 0 && state.history.cols() != base_dims_) {
    throw PreconditionError(where + "history has " + std::to_string(state.history.cols()) +
                            " columns, base_dims = " + std::to_string(base_dims_));
  }
  if (static_cast<int64_t>(state.times.size()) != n) {
    throw PreconditionError(where + "times has " + std::to_string(state.times.size()) +
                            " entries, history has " + std::to_string(n) + " rows");
  }
  for (int64_t i = 0; i < n; ++i) {
    for (int j = 0; j < base_dims_; ++j) {
      if (!std::isfinite(state.history(i, j))) {
        throw PreconditionError(where + "history(" + std::to_string(i) + ", " + std::to_string(j) +
                                ") = " + RoundTripText(state.history(i, j)) + " is not finite");
      }
    }
    const double time = state.times[static_cast<std::size_t>(i)];
    if (!std::isfinite(time)) {
      throw PreconditionError(where + "times[" + std::to_string(i) + "] = " + RoundTripText(time) +
                              " is not finite");
    }
    if (i > 0 && time < state.times[static_cast<std::size_t>(i - 1)]) {
      throw PreconditionError(where + "times[" + std::to_string(i) + "] = " + RoundTripText(time) +
                              " is earlier than times[" + std::to_string(i - 1) +
                              "] = " + RoundTripText(state.times[static_cast<std::size_t>(i - 1)]));
    }
  }
  if (state.running_outputs < 0) {
    throw PreconditionError(where + "running_outputs = " + std::to_string(state.running_outputs) +
                            " must be >= 0");
  }

  // What pushing the rows in order would keep.
  int64_t first = std::max<int64_t>(0, n - history_needed_);
  if (options_.max_gap_seconds > 0) {
    for (int64_t i = n - 1; i > first; --i) {
      if (state.times[static_cast<std::size_t>(i)] - state.times[static_cast<std::size_t>(i - 1)] >
          options_.max_gap_seconds) {
        first = i;
        break;
      }
    }
  }
  const bool use_running =
      !options_.rolling_windows.empty() && first == 0 && n == history_needed_ &&
      state.running_windows == options_.rolling_windows && !state.running.empty();
  if (use_running) {
    if (state.running.size() != running_.size()) {
      throw PreconditionError(where + "running has " + std::to_string(state.running.size()) +
                              " values, " + std::to_string(running_.size()) + " expected (" +
                              std::to_string(options_.rolling_windows.size()) +
                              " windows x 4 x base_dims " + std::to_string(base_dims_) + ")");
    }
    if (!AllFinite(state.running)) {
      throw PreconditionError(where + "running holds a value that is not finite");
    }
    for (std::size_t k = 0; k < options_.rolling_windows.size(); ++k) {
      const double* block = state.running.data() + k * 4 * base_dims_;
      for (int j = 0; j < base_dims_; ++j) {
        const double squares = block[kSquares * base_dims_ + j];
        const double largest = block[kLargest * base_dims_ + j];
        if (!(squares >= 0 && squares <= largest)) {
          throw PreconditionError(where + "running sum of squares " + RoundTripText(squares) +
                                  " (window " + std::to_string(options_.rolling_windows[k]) +
                                  ", feature " + std::to_string(j) + ") is outside [0, " +
                                  RoundTripText(largest) + "]");
        }
      }
    }
  }

  // Validated: now change the state (no throw below).
  Reset();
  const int kept = static_cast<int>(n - first);
  for (int i = 0; i < kept; ++i) {
    std::copy(state.history.data() + (first + i) * base_dims_,
              state.history.data() + (first + i + 1) * base_dims_,
              values_.begin() + static_cast<std::ptrdiff_t>(i) * base_dims_);
    times_[static_cast<std::size_t>(i)] = state.times[static_cast<std::size_t>(first + i)];
  }
  size_ = kept;
  if (use_running) {
    std::copy(state.running.begin(), state.running.end(), running_.begin());
    running_outputs_ = state.running_outputs;
    running_valid_ = true;
  }
}

std::size_t FeatureTransform::MemoryBytes() const {
  std::size_t bytes = sizeof(*this);
  bytes += values_.capacity() * sizeof(double) + times_.capacity() * sizeof(double);
  bytes += running_.capacity() * sizeof(double) + scratch_.capacity() * sizeof(double);
  bytes += statistic_columns_.capacity() * sizeof(int);
  bytes += options_.rolling_windows.capacity() * sizeof(int);
  bytes += options_.rolling_statistics.capacity() * sizeof(RollingStatistic);
  bytes += column_sources_.capacity() * sizeof(ColumnSource);
  for (const ColumnSource& source : column_sources_) {
    // Short strings live inside the object (small-string optimisation): count the heap part only.
    const char* text = source.transform.data();
    const char* object = reinterpret_cast<const char*>(&source.transform);
    if (text < object || text >= object + sizeof(std::string)) {
      bytes += source.transform.capacity() + 1;
    }
  }
  return bytes;
}

}  // namespace nuwatch
