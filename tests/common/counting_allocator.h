// Counts every allocation of the test program, so that a test can assert that a code path
// allocates nothing (replacing the global operator new is the usual way to count: common
// practice). Include it in exactly one translation unit of a program (each test program here is
// one file): it defines the replaceable global allocation functions.
//
// Thread safety: the count is atomic; a test reads it around single-threaded code.
#pragma once

#include <atomic>
#include <cstdlib>
#include <new>

// Allocations made since the program started, by any thread.
inline std::atomic<long> g_allocations{0};

// GCC cannot see that the replaced operator new below returns malloc's memory, and would warn that
// free() releases memory from operator new.
#pragma GCC diagnostic push
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
void* operator new(std::size_t size) {
  g_allocations.fetch_add(1, std::memory_order_relaxed);
  if (void* p = std::malloc(size == 0 ? 1 : size)) return p;
  throw std::bad_alloc();
}
void operator delete(void* p) noexcept { std::free(p); }
void operator delete(void* p, std::size_t) noexcept { std::free(p); }
#pragma GCC diagnostic pop
