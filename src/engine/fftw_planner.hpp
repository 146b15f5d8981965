#pragma once
// The lock around FFTW's planner. FFTW keeps one planner and one store of wisdom per process,
// and only its execute functions are thread-safe ("Thread safety" in the FFTW 3 manual, from
// memory): making or destroying a plan, and importing or exporting wisdom, from two threads at
// once corrupts its memory. Each plan cache locks its own plans, but two caches (two fills run
// by a program that uses the library from two threads, or a fill beside a seasons run) share
// the planner: every such call takes this one lock.
#include <mutex>

namespace kalends::detail {

inline std::mutex& fftw_planner_mutex() {
  static std::mutex mutex;
  return mutex;
}

}  // namespace kalends::detail
