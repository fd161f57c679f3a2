// ThreadCpuMeter (service/metrics.h): the counter it keeps must hold the measured thread's CPU
// time. The reference is the kernel's own per-thread accounting read another way,
// getrusage(RUSAGE_THREAD) (Linux, getrusage(2)), taken by the same thread right after the report.
#include <gtest/gtest.h>
#include <prometheus/counter.h>
#include <sys/resource.h>

#include <chrono>
#include <cmath>
#include <thread>

#include "service/metrics.h"

namespace nuwatch {
namespace {

using SteadyClock = std::chrono::steady_clock;

double RusageThreadSeconds() {
  rusage usage{};
  EXPECT_EQ(::getrusage(RUSAGE_THREAD, &usage), 0);
  const auto seconds = [](const timeval& t) {
    return static_cast<double>(t.tv_sec) + 1e-6 * static_cast<double>(t.tv_usec);
  };
  return seconds(usage.ru_utime) + seconds(usage.ru_stime);
}

// Spins until this thread has used `seconds` of CPU (not wall time: the machine may be busy).
void BurnCpu(double seconds) {
  timespec start{};
  ::clock_gettime(CLOCK_THREAD_CPUTIME_ID, &start);
  volatile double sink = 0;
  while (true) {
    for (int i = 0; i < 10000; ++i) sink = sink + std::sqrt(static_cast<double>(i));
    timespec now{};
    ::clock_gettime(CLOCK_THREAD_CPUTIME_ID, &now);
    if (static_cast<double>(now.tv_sec - start.tv_sec) +
            1e-9 * static_cast<double>(now.tv_nsec - start.tv_nsec) >=
        seconds)
      return;
  }
}

TEST(ThreadCpuMeter, TheCounterHoldsTheThreadsCpuTimeAsTheKernelCountsIt) {
  prometheus::Counter counter;
  double reference = 0;
  // A fresh thread, so that its CPU time is only what this test gives it.
  std::thread measured([&] {
    ThreadCpuMeter meter(counter);
    BurnCpu(0.05);
    meter.Report(SteadyClock::now());
    reference = RusageThreadSeconds();
  });
  measured.join();
  EXPECT_GE(counter.Value(), 0.05);
  // getrusage's microseconds and the thread clock's nanoseconds, a few microseconds apart in time.
  EXPECT_NEAR(counter.Value(), reference, 0.002);
}

TEST(ThreadCpuMeter, TicksReportAtMostOnceASecondAndAddOnlyTheNewTime) {
  prometheus::Counter counter;
  std::thread measured([&] {
    ThreadCpuMeter meter(counter);
    const SteadyClock::time_point t0 = SteadyClock::now();
    meter.Tick(t0);  // the first tick reports
    const double first = counter.Value();
    EXPECT_GT(first, 0);
    BurnCpu(0.02);
    meter.Tick(t0 + std::chrono::milliseconds(999));  // not yet due: nothing added
    EXPECT_EQ(counter.Value(), first);
    meter.Tick(t0 + std::chrono::seconds(1));  // due: the 20 ms since are added, once
    const double second = counter.Value();
    EXPECT_GE(second - first, 0.02);
    EXPECT_NEAR(second, RusageThreadSeconds(), 0.002);
    meter.Tick(t0 + std::chrono::milliseconds(1500));  // due again only at t0 + 2 s
    EXPECT_EQ(counter.Value(), second);
  });
  measured.join();
}

}  // namespace
}  // namespace nuwatch
