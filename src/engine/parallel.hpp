// Parallel loops inside one block's fill. The engine already runs blocks as tasks of its arena
// (--threads); these loops share that arena's threads, so a stack of one block still uses them
// all. `isolate` keeps a thread that waits for its loop from starting another block, whose
// worker buffers are its own (engine/block_runner.hpp).
//
// Results do not depend on the number of threads: loops write disjoint parts, and sums are
// made of fixed chunks added in order.
#pragma once

#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <algorithm>
#include <array>
#include <cstddef>
#include <vector>

namespace kalends::detail {

/// f(begin, end) over [0, n) in pieces of at least `grain`, in parallel.
template <typename F>
void parallel_ranges(std::size_t n, std::size_t grain, F&& f) {
  if (n == 0) return;
  if (n <= grain) {
    f(std::size_t(0), n);
    return;
  }
  tbb::this_task_arena::isolate([&] {
    tbb::parallel_for(tbb::blocked_range<std::size_t>(0, n, std::max<std::size_t>(1, grain)),
                      [&](const tbb::blocked_range<std::size_t>& r) { f(r.begin(), r.end()); });
  });
}

/// N sums over [0, n) at once: partial(begin, end) returns std::array<double, N> for a chunk of
/// `chunk`; the chunks are added in order.
template <std::size_t N, typename F>
std::array<double, N> deterministic_sums(std::size_t n, std::size_t chunk, F&& partial) {
  const std::size_t chunks = (n + chunk - 1) / chunk;
  std::vector<std::array<double, N>> parts(chunks);
  parallel_ranges(chunks, 1, [&](std::size_t a, std::size_t b) {
    for (std::size_t k = a; k < b; ++k) parts[k] = partial(k * chunk, std::min(n, (k + 1) * chunk));
  });
  std::array<double, N> sum{};
  for (const auto& part : parts)
    for (std::size_t j = 0; j < N; ++j) sum[j] += part[j];
  return sum;
}

/// The sum over [0, n) of partial(begin, end) on chunks of `chunk`, added in chunk order.
template <typename F>
double deterministic_sum(std::size_t n, std::size_t chunk, F&& partial) {
  return deterministic_sums<1>(n, chunk, [&](std::size_t a, std::size_t b) {
    return std::array<double, 1>{partial(a, b)};
  })[0];
}

/// body(k) for every k in [0, n), in parallel pieces of at least `grain`.
template <typename F>
void parallel_each(std::size_t n, std::size_t grain, F&& body) {
  parallel_ranges(n, grain, [&](std::size_t a, std::size_t b) {
    for (std::size_t k = a; k < b; ++k) body(k);
  });
}

/// The sum of term(k) over [0, n), in chunks of `chunk` added in order: the same whatever the
/// threads.
template <typename F>
double deterministic_sum_of(std::size_t n, std::size_t chunk, F&& term) {
  return deterministic_sum(n, chunk, [&](std::size_t a, std::size_t b) {
    double sum = 0;
    for (std::size_t k = a; k < b; ++k) sum += term(k);
    return sum;
  });
}

}  // namespace kalends::detail
