// A mutex, its scoped lock and a condition variable that clang's thread-safety analysis can see
// (nuwatch/thread_annotations.h): thin wrappers around std::mutex and std::condition_variable, as
// leveldb's port::Mutex and port::CondVar are. libstdc++'s own types carry no annotations, so
// state guarded by a std::mutex is invisible to the analysis.
//
// Usage:
//   Mutex mutex_;
//   int64_t count_ GUARDED_BY(mutex_) = 0;
//   void Add() EXCLUDES(mutex_) { MutexLock lock(&mutex_); ++count_; }
// Thread safety: these are the synchronisation; a Mutex is neither copyable nor movable.
#pragma once

#include <condition_variable>
#include <mutex>

#include "nuwatch/thread_annotations.h"

namespace nuwatch {

class CAPABILITY("mutex") Mutex {
 public:
  Mutex() = default;
  Mutex(const Mutex&) = delete;
  Mutex& operator=(const Mutex&) = delete;

  void Lock() ACQUIRE() { mutex_.lock(); }
  void Unlock() RELEASE() { mutex_.unlock(); }
  // Documents (and tells the analysis) that the caller holds the mutex; checks nothing at run time.
  void AssertHeld() ASSERT_CAPABILITY(this) {}

 private:
  friend class CondVar;
  std::mutex mutex_;
};

// Holds `mutex` from construction to destruction.
class SCOPED_CAPABILITY MutexLock {
 public:
  explicit MutexLock(Mutex* mutex) ACQUIRE(mutex) : mutex_(mutex) { mutex_->Lock(); }
  ~MutexLock() RELEASE() { mutex_->Unlock(); }
  MutexLock(const MutexLock&) = delete;
  MutexLock& operator=(const MutexLock&) = delete;

 private:
  Mutex* const mutex_;
};

// A condition variable bound to one Mutex. Wait in a loop on the condition, with the mutex held:
//   MutexLock lock(&mutex_);
//   while (busy_) idle_.Wait();
// (a loop rather than a predicate lambda, because the analysis does not know that a lambda runs
// with the mutex held).
class CondVar {
 public:
  explicit CondVar(Mutex* mutex) : mutex_(mutex) {}
  CondVar(const CondVar&) = delete;
  CondVar& operator=(const CondVar&) = delete;

  // Requires: the caller holds the mutex. Releases it while it waits and holds it again when it
  // returns; may wake spuriously. (Not annotated REQUIRES: the analysis cannot tell that this
  // CondVar's mutex is the caller's `mutex_` member, as leveldb's port::CondVar notes too.)
  void Wait() {
    std::unique_lock<std::mutex> lock(mutex_->mutex_, std::adopt_lock);
    condition_.wait(lock);
    lock.release();  // the caller still holds the mutex
  }
  void Signal() { condition_.notify_one(); }
  void SignalAll() { condition_.notify_all(); }

 private:
  Mutex* const mutex_;
  std::condition_variable condition_;
};

}  // namespace nuwatch
