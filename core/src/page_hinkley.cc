#include "nuwatch/page_hinkley.h"

#include <algorithm>
#include <cmath>
#include <string>

#include "number_text.h"
#include "nuwatch/types.h"

namespace nuwatch {
namespace {

bool WatchesUp(DriftDirection d) { return d == DriftDirection::kUp || d == DriftDirection::kBoth; }
bool WatchesDown(DriftDirection d) {
  return d == DriftDirection::kDown || d == DriftDirection::kBoth;
}

}  // namespace

PageHinkley::PageHinkley(const PageHinkleyOptions& options) : options_(options) {
  if (!std::isfinite(options.delta) || options.delta < 0) {
    throw PreconditionError("PageHinkley: delta = " + RoundTripText(options.delta) +
                            " must be finite and >= 0");
  }
  if (!std::isfinite(options.lambda) || !(options.lambda > 0)) {
    throw PreconditionError("PageHinkley: lambda = " + RoundTripText(options.lambda) +
                            " must be finite and > 0");
  }
  if (options.min_samples < 0) {
    throw PreconditionError("PageHinkley: min_samples = " + std::to_string(options.min_samples) +
                            " must be >= 0");
  }
  if (!WatchesUp(options.direction) && !WatchesDown(options.direction)) {
    throw PreconditionError(
        "PageHinkley: direction = " + std::to_string(static_cast<int>(options.direction)) +
        " is not up, down or both");
  }
}

bool PageHinkley::Update(double x) {
  if (!std::isfinite(x)) {
    throw PreconditionError("PageHinkley::Update: x = " + RoundTripText(x) + " is not finite");
  }
  PageHinkleyState& s = state_;
  ++s.count;
  s.mean += (x - s.mean) / static_cast<double>(s.count);
  const double deviation = x - s.mean;
  s.up_sum += deviation - options_.delta;
  s.down_sum += deviation + options_.delta;
  if (s.count == 1) {
    s.up_min = s.up_sum;
    s.down_max = s.down_sum;
  } else {
    s.up_min = std::min(s.up_min, s.up_sum);
    s.down_max = std::max(s.down_max, s.down_sum);
  }
  return increase_detected() || decrease_detected();
}

bool PageHinkley::increase_detected() const {
  return WatchesUp(options_.direction) && state_.count >= options_.min_samples &&
         state_.count > 0 && up_statistic() > options_.lambda;
}

bool PageHinkley::decrease_detected() const {
  return WatchesDown(options_.direction) && state_.count >= options_.min_samples &&
         state_.count > 0 && down_statistic() > options_.lambda;
}

void PageHinkley::Reset() { state_ = PageHinkleyState{}; }

void PageHinkley::Restore(const PageHinkleyState& state) {
  if (state.count < 0) {
    throw PreconditionError("PageHinkley::Restore: count = " + std::to_string(state.count) +
                            " must be >= 0");
  }
  if (state.count == 0) {
    Reset();
    return;
  }
  const double values[] = {state.mean, state.up_sum, state.up_min, state.down_sum, state.down_max};
  for (double v : values) {
    if (!std::isfinite(v)) {
      throw PreconditionError("PageHinkley::Restore: non-finite statistic " + RoundTripText(v));
    }
  }
  if (state.up_min > state.up_sum) {
    throw PreconditionError("PageHinkley::Restore: up_min = " + RoundTripText(state.up_min) +
                            " exceeds up_sum = " + RoundTripText(state.up_sum));
  }
  if (state.down_max < state.down_sum) {
    throw PreconditionError("PageHinkley::Restore: down_max = " + RoundTripText(state.down_max) +
                            " is below down_sum = " + RoundTripText(state.down_sum));
  }
  state_ = state;
}

}  // namespace nuwatch
