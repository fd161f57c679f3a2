// The Page-Hinkley test for a change in the mean of a stream (Page, Biometrika 41:100-115, 1954),
// in the form used in data-stream mining (Gama, Zliobaite, Bifet, Pechenizkiy, Bouchachia, "A
// survey on concept drift adaptation", ACM Computing Surveys 46(4), 2014).
//
// With x_bar_t the running mean of x_1..x_t (each step uses the mean up to and including itself;
// with the final mean x_bar_T in every term m_T would collapse to -T delta):
//   increase:  m_T = sum_{t<=T} (x_t - x_bar_t - delta),   M_T = min_{1<=t<=T} m_t,
//              alarm when m_T - M_T > lambda;
//   decrease:  u_T = sum_{t<=T} (x_t - x_bar_t + delta),   U_T = max_{1<=t<=T} u_t,
//              alarm when U_T - u_T > lambda.
// delta is the change of the mean that is tolerated, lambda trades detection delay against false
// alarms. nuwatch runs it on the decision values, which drift down when the process leaves the
// envelope (so a decrease is the usual alarm) and up when it settles into a tighter one.
// Thread safety: not thread-safe. One per stream, owned by the stream's thread. No allocation.
#pragma once

#include <cstdint>

namespace nuwatch {

enum class DriftDirection { kUp = 0, kDown = 1, kBoth = 2 };

struct PageHinkleyOptions {
  double delta = 0.005;       // >= 0, finite; in the units of x
  double lambda = 0.5;        // > 0, finite; in the units of x
  int64_t min_samples = 100;  // >= 0; Update never alarms while count() < min_samples
  DriftDirection direction = DriftDirection::kBoth;
};

// The whole state, for state files.
struct PageHinkleyState {
  int64_t count = 0;
  double mean = 0;
  double up_sum = 0;    // m_T
  double up_min = 0;    // M_T (0 while count == 0)
  double down_sum = 0;  // u_T
  double down_max = 0;  // U_T (0 while count == 0)
};

class PageHinkley {
 public:
  // Requires: options as documented above; throws PreconditionError naming the value otherwise.
  explicit PageHinkley(const PageHinkleyOptions& options);

  // Adds one observation and returns whether a watched direction is in alarm:
  // count() >= min_samples and the statistic of that direction > lambda. The alarm stays raised
  // while the condition holds; the caller acts on it (e.g. refits) and calls Reset().
  // Requires: finite x (PreconditionError otherwise; the state is unchanged then).
  bool Update(double x);

  // Forgets everything: the next Update starts a new test.
  void Reset();

  const PageHinkleyOptions& options() const { return options_; }
  int64_t count() const { return state_.count; }
  double mean() const { return state_.mean; }
  double up_sum() const { return state_.up_sum; }
  double up_min() const { return state_.up_min; }
  double down_sum() const { return state_.down_sum; }
  double down_max() const { return state_.down_max; }
  double up_statistic() const { return state_.up_sum - state_.up_min; }        // m_T - M_T >= 0
  double down_statistic() const { return state_.down_max - state_.down_sum; }  // U_T - u_T >= 0
  // Whether each direction is in alarm now (false for a direction that is not watched).
  bool increase_detected() const;
  bool decrease_detected() const;

  const PageHinkleyState& state() const { return state_; }
  // Requires: count >= 0; when count > 0, finite values with up_min <= up_sum and
  // down_max >= down_sum (PreconditionError otherwise). count == 0 restores the reset state.
  void Restore(const PageHinkleyState& state);

 private:
  PageHinkleyOptions options_;
  PageHinkleyState state_;
};

}  // namespace nuwatch
