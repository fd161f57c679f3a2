// Lock annotations for clang's thread-safety analysis (-Wthread-safety), after leveldb's
// port/thread_annotations.h and clang's documentation ("Thread Safety Analysis",
// https://clang.llvm.org/docs/ThreadSafetyAnalysis.html). With clang they let the compiler check
// that guarded state is only touched with its mutex held; with other compilers they expand to
// nothing. They see only mutexes that are annotated themselves: use nuwatch::Mutex
// (nuwatch/mutex.h), not std::mutex, which libstdc++ does not annotate.
//
// Public because the daemon annotates its own locks with the same macros; not numerics.
// Build with the check: CXX=clang++ cmake -DNUWATCH_THREAD_SAFETY=ON (DEVELOPERS.md).
#pragma once

#if defined(__clang__)
#define NUWATCH_THREAD_ANNOTATION(x) __attribute__((x))
#else
#define NUWATCH_THREAD_ANNOTATION(x)
#endif

// A type that is a lock ("mutex").
#define CAPABILITY(x) NUWATCH_THREAD_ANNOTATION(capability(x))
// An RAII type that holds a lock for its lifetime.
#define SCOPED_CAPABILITY NUWATCH_THREAD_ANNOTATION(scoped_lockable)
// A member that may be read or written only with the given mutex held.
#define GUARDED_BY(x) NUWATCH_THREAD_ANNOTATION(guarded_by(x))
// A pointer member whose pointee may be touched only with the given mutex held.
#define PT_GUARDED_BY(x) NUWATCH_THREAD_ANNOTATION(pt_guarded_by(x))
// A function that must be called with the mutex held (and returns with it held).
#define REQUIRES(...) NUWATCH_THREAD_ANNOTATION(requires_capability(__VA_ARGS__))
// A function that must be called without the mutex held (it takes it itself).
#define EXCLUDES(...) NUWATCH_THREAD_ANNOTATION(locks_excluded(__VA_ARGS__))
// A function that takes the mutex and returns with it held.
#define ACQUIRE(...) NUWATCH_THREAD_ANNOTATION(acquire_capability(__VA_ARGS__))
// A function that releases a mutex held on entry.
#define RELEASE(...) NUWATCH_THREAD_ANNOTATION(release_capability(__VA_ARGS__))
// A function that checks at run time that the mutex is held.
#define ASSERT_CAPABILITY(x) NUWATCH_THREAD_ANNOTATION(assert_capability(x))
// A function that returns a reference to the given mutex.
#define RETURN_CAPABILITY(x) NUWATCH_THREAD_ANNOTATION(lock_returned(x))
// Turns the analysis off for one function; say why beside it.
#define NO_THREAD_SAFETY_ANALYSIS NUWATCH_THREAD_ANNOTATION(no_thread_safety_analysis)
