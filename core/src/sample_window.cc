#include "nuwatch/sample_window.h"

#include <algorithm>
#include <bit>
#include <cmath>
#include <limits>
#include <numeric>
#include <string>

#include "number_text.h"

namespace nuwatch {
namespace {

// The buffer's first size: small enough that a stream with a handful of vectors costs little,
// large enough that doubling from it reaches a window of 2000 in 7 steps.
constexpr int64_t kFirstSlots = 16;

// Whether row id `a` is preferred to `b` as the reference: more trailing zero bits, then the newer.
// Among consecutive ids (a window's, sample_window.h) the first is unique, so the choice depends
// on the ids alone and a restored window makes the same one.
bool Outranks(uint64_t a, uint64_t b) {
  const int za = std::countr_zero(a);
  const int zb = std::countr_zero(b);
  return za > zb || (za == zb && a > b);
}

// Whether value - reference can be stored as a float: its magnitude within the float range. A
// subtraction that overflows to infinity does not fit.
bool DeviationFitsFloat(double value, double reference) {
  return std::abs(value - reference) <= std::numeric_limits<float>::max();
}

}  // namespace

SampleWindow::SampleWindow(int64_t capacity, int dims, double max_age_seconds)
    : capacity_(capacity), dims_(dims), max_age_seconds_(max_age_seconds) {
  if (capacity < 1) {
    throw PreconditionError("SampleWindow: capacity = " + RoundTripText(capacity) +
                            " must be >= 1");
  }
  if (dims < 1) {
    throw PreconditionError("SampleWindow: dims = " + std::to_string(dims) + " must be >= 1");
  }
  if (!std::isfinite(max_age_seconds) || max_age_seconds < 0) {
    throw PreconditionError("SampleWindow: max_age_seconds = " + RoundTripText(max_age_seconds) +
                            " must be finite and >= 0");
  }
}

int64_t SampleWindow::Physical(int64_t i) const {
  const int64_t slot = head_ + i;
  return slot < slots_ ? slot : slot - slots_;
}

// Oldest first, into a buffer of `slots` slots reserved exactly: [head, end of the buffer), then
// [0, wrap). Allocates before it changes anything.
template <typename T>
std::vector<T> InOrder(const std::vector<T>& buffer, int64_t head, int64_t first_run,
                       int64_t second_run, int64_t slots, int dims) {
  std::vector<T> out;
  out.reserve(static_cast<std::size_t>(slots * dims));
  out.insert(out.end(), buffer.begin() + head * dims, buffer.begin() + (head + first_run) * dims);
  out.insert(out.end(), buffer.begin(), buffer.begin() + second_run * dims);
  out.resize(static_cast<std::size_t>(slots * dims));
  return out;
}

void SampleWindow::GrowTo(int64_t slots) {
  slots = std::min(slots, capacity_);
  if (slots <= slots_) return;
  const int64_t first_run = std::min(size_, slots_ - head_);
  const int64_t second_run = size_ - first_run;
  std::vector<float> deviations;
  std::vector<double> values;
  if (doubles_) {
    values = InOrder(values_, head_, first_run, second_run, slots, dims_);
  } else {
    deviations = InOrder(deviations_, head_, first_run, second_run, slots, dims_);
  }
  std::vector<double> times = InOrder(times_, head_, first_run, second_run, slots, 1);
  deviations_.swap(deviations);
  values_.swap(values);
  times_.swap(times);
  head_ = 0;
  slots_ = slots;
}

double SampleWindow::Value(int64_t slot, int j) const {
  const std::size_t k = static_cast<std::size_t>(slot * dims_ + j);
  return doubles_ ? values_[k] : reference_[j] + static_cast<double>(deviations_[k]);
}

bool SampleWindow::FitsFloat(std::span<const double> x) const {
  for (int j = 0; j < dims_; ++j)
    if (!DeviationFitsFloat(x[j], reference_[j])) return false;
  return true;
}

void SampleWindow::Store(int64_t slot, std::span<const double> x) {
  const std::size_t k = static_cast<std::size_t>(slot * dims_);
  if (doubles_) {
    std::copy(x.begin(), x.end(), values_.begin() + k);
    return;
  }
  for (int j = 0; j < dims_; ++j) deviations_[k + j] = static_cast<float>(x[j] - reference_[j]);
}

int64_t SampleWindow::PreferredSlot() const {
  int64_t best = 0;
  for (int64_t i = 1; i < size_; ++i)
    if (Outranks(first_id_ + i, first_id_ + best)) best = i;
  return Physical(best);
}

void SampleWindow::RebaseTo(int64_t slot) {
  if (doubles_) return;
  for (int j = 0; j < dims_; ++j) next_reference_[j] = Value(slot, j);
  for (int64_t i = 0; i < size_; ++i) {
    const int64_t s = Physical(i);
    for (int j = 0; j < dims_; ++j) {
      if (!DeviationFitsFloat(Value(s, j), next_reference_[j])) {
        SwitchToDoubles();
        return;
      }
    }
  }
  for (int64_t i = 0; i < size_; ++i) {
    const int64_t s = Physical(i);
    for (int j = 0; j < dims_; ++j) {
      const std::size_t k = static_cast<std::size_t>(s * dims_ + j);
      deviations_[k] = static_cast<float>(Value(s, j) - next_reference_[j]);
    }
  }
  reference_.swap(next_reference_);
  reference_id_ =
      first_id_ + static_cast<uint64_t>(slot >= head_ ? slot - head_ : slot + slots_ - head_);
}

void SampleWindow::SwitchToDoubles() {
  std::vector<double> values(deviations_.size());  // before anything changes: may throw
  for (int64_t slot = 0; slot < slots_; ++slot) {
    for (int j = 0; j < dims_; ++j) values[slot * dims_ + j] = Value(slot, j);
  }
  values_.swap(values);
  deviations_ = std::vector<float>();
  doubles_ = true;
}

void SampleWindow::CheckIndex(int64_t i, const char* caller) const {
  if (i < 0 || i >= size_) {
    throw PreconditionError(std::string(caller) + ": index " + RoundTripText(i) + " outside [0, " +
                            RoundTripText(size_) + ")");
  }
}

uint64_t SampleWindow::Push(double time, std::span<const double> x) {
  if (x.size() != static_cast<std::size_t>(dims_)) {
    throw PreconditionError("SampleWindow::Push: vector has " + std::to_string(x.size()) +
                            " values, the window has dims = " + std::to_string(dims_));
  }
  if (!std::isfinite(time)) {
    throw PreconditionError("SampleWindow::Push: time = " + RoundTripText(time) + " is not finite");
  }
  for (std::size_t j = 0; j < x.size(); ++j) {
    if (!std::isfinite(x[j])) {
      throw PreconditionError("SampleWindow::Push: value " + std::to_string(j) + " = " +
                              RoundTripText(x[j]) + " is not finite");
    }
  }
  const uint64_t id = next_id_;
  if (size_ == 0) first_id_ = id;
  if (!doubles_ && size_ == 0) {
    // The first row of an empty window is its own reference.
    reference_.assign(x.begin(), x.end());
    next_reference_.resize(static_cast<std::size_t>(dims_));
    reference_id_ = id;
  }
  if (!doubles_ && !FitsFloat(x)) SwitchToDoubles();
  int64_t slot;
  bool reference_evicted = false;
  if (size_ == capacity_) {
    slot = head_;  // overwrite the oldest (the buffer has capacity slots by now)
    reference_evicted = first_id_ == reference_id_;
    head_ = head_ + 1 == slots_ ? 0 : head_ + 1;
    ++first_id_;
  } else {
    if (size_ == slots_) GrowTo(std::max(kFirstSlots, 2 * slots_));
    slot = Physical(size_);
    ++size_;
  }
  Store(slot, x);
  ++next_id_;
  times_[slot] = time;
  if (!doubles_) {
    if (Outranks(id, reference_id_)) {
      RebaseTo(slot);
    } else if (reference_evicted) {
      RebaseTo(PreferredSlot());
    }
  }
  return id;
}

void SampleWindow::ExpireOlderThan(double now) {
  if (!std::isfinite(now)) {
    throw PreconditionError("SampleWindow::ExpireOlderThan: now = " + RoundTripText(now) +
                            " is not finite");
  }
  if (max_age_seconds_ == 0) return;
  const double cutoff = now - max_age_seconds_;
  bool reference_expired = false;
  while (size_ > 0 && times_[head_] < cutoff) {
    reference_expired = reference_expired || first_id_ == reference_id_;
    head_ = head_ + 1 == slots_ ? 0 : head_ + 1;
    ++first_id_;
    --size_;
  }
  if (reference_expired && size_ > 0) RebaseTo(PreferredSlot());
}

void SampleWindow::Clear() {
  head_ = 0;
  size_ = 0;
}

std::vector<double> SampleWindow::Row(int64_t i) const {
  CheckIndex(i, "SampleWindow::Row");
  std::vector<double> row(static_cast<std::size_t>(dims_));
  const int64_t slot = Physical(i);
  for (int j = 0; j < dims_; ++j) row[j] = Value(slot, j);
  return row;
}

uint64_t SampleWindow::Id(int64_t i) const {
  CheckIndex(i, "SampleWindow::Id");
  return first_id_ + static_cast<uint64_t>(i);
}

double SampleWindow::Time(int64_t i) const {
  CheckIndex(i, "SampleWindow::Time");
  return times_[Physical(i)];
}

void SampleWindow::Snapshot(MatrixD* out, std::vector<uint64_t>* ids,
                            std::vector<double>* times) const {
  if (out == nullptr) throw PreconditionError("SampleWindow::Snapshot: out is null");
  out->resize(size_, dims_);
  if (ids != nullptr) ids->resize(static_cast<std::size_t>(size_));
  if (times != nullptr) times->resize(static_cast<std::size_t>(size_));
  // The occupied slots are at most two contiguous runs: [head, end) and [0, wrap).
  const int64_t first_run = std::min(size_, slots_ - head_);
  const int64_t second_run = size_ - first_run;
  for (int64_t i = 0; i < size_; ++i) {
    const int64_t slot = Physical(i);
    for (int j = 0; j < dims_; ++j) (*out)(i, j) = Value(slot, j);
  }
  if (ids != nullptr) std::iota(ids->begin(), ids->end(), first_id_);
  if (times != nullptr) {
    std::copy_n(times_.data() + head_, first_run, times->data());
    std::copy_n(times_.data(), second_run, times->data() + first_run);
  }
}

void SampleWindow::Pack(Packed* out) const {
  if (out == nullptr) throw PreconditionError("SampleWindow::Pack: out is null");
  const int64_t first_run = std::min(size_, slots_ - head_);
  const int64_t second_run = size_ - first_run;
  out->dims = dims_;
  out->first_id = first_id_;
  out->reference = reference_;
  out->deviations = doubles_ ? std::vector<float>()
                             : InOrder(deviations_, head_, first_run, second_run, size_, dims_);
  out->values = doubles_ ? InOrder(values_, head_, first_run, second_run, size_, dims_)
                         : std::vector<double>();
  out->times = InOrder(times_, head_, first_run, second_run, size_, 1);
}

void SampleWindow::Packed::Unpack(MatrixD* out, std::vector<uint64_t>* ids) const {
  if (out == nullptr) throw PreconditionError("SampleWindow::Packed::Unpack: out is null");
  const int64_t n = rows();
  out->resize(n, dims);
  if (!values.empty()) {
    std::copy(values.begin(), values.end(), out->data());
  } else {
    // As Value computes it, so that the rows are Snapshot's bit for bit.
    for (int64_t r = 0; r < n; ++r)
      for (int j = 0; j < dims; ++j)
        (*out)(r, j) = reference[j] + static_cast<double>(deviations[r * dims + j]);
  }
  if (ids != nullptr) {
    ids->resize(static_cast<std::size_t>(n));
    std::iota(ids->begin(), ids->end(), first_id);
  }
}

void SampleWindow::Restore(const MatrixD& rows, std::span<const uint64_t> ids,
                           std::span<const double> times, uint64_t next_id) {
  const int64_t n = rows.rows();
  if (rows.cols() != dims_ && n > 0) {
    throw PreconditionError("SampleWindow::Restore: rows have " +
                            RoundTripText(int64_t{rows.cols()}) +
                            " columns, the window has dims = " + std::to_string(dims_));
  }
  if (ids.size() != static_cast<std::size_t>(n) || times.size() != static_cast<std::size_t>(n)) {
    throw PreconditionError("SampleWindow::Restore: " + RoundTripText(n) + " rows but " +
                            std::to_string(ids.size()) + " ids and " +
                            std::to_string(times.size()) + " times");
  }
  for (int64_t r = 0; r < n; ++r) {
    if (ids[r] < 1 || (r > 0 && ids[r] != ids[r - 1] + 1)) {
      throw PreconditionError("SampleWindow::Restore: row " + RoundTripText(r) + ": id " +
                              RoundTripText(ids[r]) +
                              (r > 0 ? " after id " + RoundTripText(ids[r - 1]) : std::string()) +
                              "; ids must be >= 1 and consecutive");
    }
    if (!std::isfinite(times[r])) {
      throw PreconditionError("SampleWindow::Restore: row " + RoundTripText(r) +
                              ": time = " + RoundTripText(times[r]) + " is not finite");
    }
    for (int j = 0; j < dims_; ++j) {
      if (!std::isfinite(rows(r, j))) {
        throw PreconditionError("SampleWindow::Restore: row " + RoundTripText(r) + ", column " +
                                std::to_string(j) + ": value " + RoundTripText(rows(r, j)) +
                                " is not finite");
      }
    }
  }
  if (next_id < 1 || (n > 0 && next_id != ids[n - 1] + 1)) {
    throw PreconditionError("SampleWindow::Restore: next_id = " + RoundTripText(next_id) +
                            " must be >= 1 and the last id + 1" +
                            (n > 0 ? " (" + RoundTripText(ids[n - 1] + 1) + ")" : std::string()));
  }
  const int64_t skip = std::max<int64_t>(0, n - capacity_);
  size_ = 0;  // the rows are replaced: GrowTo need not keep any
  head_ = 0;
  if (n - skip > 0) {
    // Deviations from the row the ids prefer (Outranks), as the saved window had them, unless a
    // row deviates beyond the float range; a window that holds doubles keeps them.
    int64_t preferred = skip;
    for (int64_t r = skip + 1; r < n; ++r)
      if (Outranks(ids[r], ids[preferred])) preferred = r;
    const auto reference = rows.row(preferred);
    bool fits = true;
    for (int64_t r = skip; r < n && fits; ++r)
      for (int j = 0; j < dims_ && fits; ++j) fits = DeviationFitsFloat(rows(r, j), reference(j));
    if (fits && !doubles_) {
      reference_.assign(reference.data(), reference.data() + dims_);
      next_reference_.resize(static_cast<std::size_t>(dims_));
      reference_id_ = ids[preferred];
    } else if (!doubles_) {
      values_.assign(deviations_.size(), 0.0);
      deviations_ = std::vector<float>();
      doubles_ = true;
    }
  }
  GrowTo(n - skip);
  size_ = n - skip;
  for (int64_t r = 0; r < size_; ++r) {
    const auto row = rows.row(skip + r);
    Store(r, std::span<const double>(row.data(), static_cast<std::size_t>(dims_)));
    times_[r] = times[skip + r];
  }
  first_id_ = n > 0 ? ids[skip] : 0;
  next_id_ = next_id;
}

std::size_t SampleWindow::MemoryBytes() const {
  return sizeof(*this) + deviations_.capacity() * sizeof(float) +
         values_.capacity() * sizeof(double) +
         (reference_.capacity() + next_reference_.capacity()) * sizeof(double) +
         times_.capacity() * sizeof(double);
}

VectorD MapWarmStart(const std::vector<uint64_t>& old_ids, const VectorD& old_alpha,
                     const std::vector<uint64_t>& new_ids, double nu, const VectorD* new_gradient) {
  const std::size_t l_old = old_ids.size();
  const std::size_t l_new = new_ids.size();
  if (static_cast<std::size_t>(old_alpha.size()) != l_old) {
    throw PreconditionError("MapWarmStart: " + std::to_string(l_old) + " old ids but " +
                            RoundTripText(int64_t{old_alpha.size()}) + " old alphas");
  }
  if (l_new == 0) throw PreconditionError("MapWarmStart: the new window is empty");
  if (!(nu > 0 && nu <= 1)) {
    throw PreconditionError("MapWarmStart: nu = " + RoundTripText(nu) + " is outside (0, 1]");
  }
  if (new_gradient != nullptr && static_cast<std::size_t>(new_gradient->size()) != l_new) {
    throw PreconditionError("MapWarmStart: " + RoundTripText(int64_t{new_gradient->size()}) +
                            " gradient values for " + std::to_string(l_new) + " new samples");
  }
  for (std::size_t k = 0; k < l_old; ++k) {
    if (k > 0 && old_ids[k] <= old_ids[k - 1]) {
      throw PreconditionError("MapWarmStart: old id " + RoundTripText(old_ids[k]) + " at " +
                              std::to_string(k) + " follows " + RoundTripText(old_ids[k - 1]) +
                              "; ids must be strictly increasing");
    }
    if (!std::isfinite(old_alpha[k]) || old_alpha[k] < 0) {
      throw PreconditionError("MapWarmStart: old alpha " + std::to_string(k) + " = " +
                              RoundTripText(old_alpha[k]) + " must be finite and >= 0");
    }
  }
  for (std::size_t j = 1; j < l_new; ++j) {
    if (new_ids[j] <= new_ids[j - 1]) {
      throw PreconditionError("MapWarmStart: new id " + RoundTripText(new_ids[j]) + " at " +
                              std::to_string(j) + " follows " + RoundTripText(new_ids[j - 1]) +
                              "; ids must be strictly increasing");
    }
  }
  if (new_gradient != nullptr) {
    for (std::size_t j = 0; j < l_new; ++j) {
      if (!std::isfinite((*new_gradient)[j])) {
        throw PreconditionError("MapWarmStart: gradient " + std::to_string(j) + " = " +
                                RoundTripText((*new_gradient)[j]) + " is not finite");
      }
    }
  }

  const double bound = 1.0 / (nu * static_cast<double>(l_new));
  VectorD alpha = VectorD::Zero(static_cast<Eigen::Index>(l_new));

  // 1. Survivors keep their alpha (both id lists are sorted: a merge join).
  for (std::size_t k = 0, j = 0; k < l_old && j < l_new;) {
    if (old_ids[k] < new_ids[j]) {
      ++k;
    } else if (new_ids[j] < old_ids[k]) {
      ++j;
    } else {
      alpha[j] = std::min(old_alpha[k], bound);
      ++k;
      ++j;
    }
  }

  double missing = 1.0 - alpha.sum();
  if (missing > 0) {
    // 2. Hand out the missing mass by priority. The mass usually runs out after a few entries,
    // so the order comes from a heap, popped only as far as needed, not from a full sort (which
    // took 5 % of a calibrated refit); the comparison is a total order, so the sequence is the
    // sorted one exactly.
    std::vector<std::size_t> order(l_new);
    std::iota(order.begin(), order.end(), std::size_t{0});
    // after(a, b): a comes after b, i.e. a has the higher gradient (ties: the older sample).
    const VectorD* g = new_gradient;
    const auto after = [g](std::size_t a, std::size_t b) {
      if (g == nullptr) return a < b;  // newest first
      return (*g)[a] != (*g)[b] ? (*g)[a] > (*g)[b] : a < b;
    };
    std::make_heap(order.begin(), order.end(), after);
    for (auto end = order.end(); end != order.begin(); --end) {
      if (missing <= 0) break;
      std::pop_heap(order.begin(), end, after);
      const std::size_t i = *(end - 1);
      const double room = bound - alpha[i];
      if (room <= 0) continue;
      if (room <= missing) {
        alpha[i] = bound;  // exactly the bound, not alpha + room (which may round past it)
        missing -= room;
      } else {
        // When room was rounded, alpha + missing can land an ulp past the bound: clip (the ulp of
        // mass lost is far inside the 1e-12 tolerance).
        alpha[i] = std::min(alpha[i] + missing, bound);
        missing = 0;
      }
    }
  } else if (missing < 0) {
    // 3. Lower the largest alphas to a common level t with sum max(a_i - t, 0) = surplus.
    const double surplus = -missing;
    std::vector<double> sorted(alpha.data(), alpha.data() + l_new);
    std::sort(sorted.begin(), sorted.end(), std::greater<double>());
    double level = 0;
    double top_sum = 0;
    for (std::size_t k = 0; k < l_new; ++k) {
      top_sum += sorted[k];
      // Lowering the k + 1 largest to t removes top_sum - (k + 1) t; valid while t >= next value.
      const double t = (top_sum - surplus) / static_cast<double>(k + 1);
      const double next = k + 1 < l_new ? sorted[k + 1] : 0.0;
      if (t >= next) {
        level = std::max(t, 0.0);
        break;
      }
    }
    for (std::size_t i = 0; i < l_new; ++i) alpha[i] = std::min(alpha[i], level);
  }

  const double total = alpha.sum();
  if (std::abs(total - 1.0) > 1e-12) {
    throw PreconditionError("MapWarmStart: the mapped alpha sums to " + RoundTripText(total) +
                            " (nu = " + RoundTripText(nu) + ", l_new = " + std::to_string(l_new) +
                            ", bound = " + RoundTripText(bound) + ")");
  }
  for (Eigen::Index i = 0; i < alpha.size(); ++i) {
    if (!(alpha[i] >= 0 && alpha[i] <= bound)) {
      throw PreconditionError("MapWarmStart: mapped alpha " + std::to_string(i) + " = " +
                              RoundTripText(alpha[i]) + " is outside [0, " + RoundTripText(bound) +
                              "]");
    }
  }
  return alpha;
}

}  // namespace nuwatch
