// Running a plan's blocks in parallel: each worker thread takes blocks one at a time with its
// own state (readers, buffers), so nothing is shared but the outputs' locks.
#pragma once

#include <algorithm>

#include <tbb/enumerable_thread_specific.h>
#include <tbb/info.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include "kalends/block_plan.hpp"

namespace kalends::detail {

/// The arena for `threads` requested: at most what TBB can run at once here (the cores this
/// process may use). More would only oversubscribe, and TBB then warns on standard error in
/// every run, which breaks a JSON log. The values never depend on the threads.
inline int arena_threads(int threads) { return std::max(1, std::min(threads, tbb::info::default_concurrency())); }

/// Calls process(block, worker) for every block of `plan` on `threads` threads, at most
/// `at_once` blocks at a time (0: `threads`); `worker` is the calling thread's own element of
/// `workers`. With fewer blocks at once than threads (a memory budget too small for a block per
/// thread), the other threads work inside the blocks' parallel loops (engine/parallel.hpp).
/// Exceptions stop the run and reach the caller.
template <typename Worker, typename Process>
void run_blocks(const BlockPlan& plan, int threads, tbb::enumerable_thread_specific<Worker>& workers,
                Process&& process, int at_once = 0) {
  const std::size_t lanes = std::size_t(at_once > 0 && at_once < threads ? at_once : threads);
  tbb::task_arena arena(arena_threads(threads));
  arena.execute([&] {
    if (lanes >= std::size_t(threads)) {
      // Grain 1 and a simple partitioner: blocks are large and few, one task each.
      tbb::parallel_for(
          tbb::blocked_range<std::size_t>(0, plan.blocks.size(), 1),
          [&](const tbb::blocked_range<std::size_t>& range) {
            Worker& worker = workers.local();
            for (std::size_t b = range.begin(); b < range.end(); ++b) process(plan.blocks[b], worker);
          },
          tbb::simple_partitioner());
      return;
    }
    // One task per lane, each taking every lanes-th block in turn: never more than `lanes`
    // blocks (and workers' buffers) at once.
    tbb::parallel_for(
        tbb::blocked_range<std::size_t>(0, lanes, 1),
        [&](const tbb::blocked_range<std::size_t>& range) {
          for (std::size_t lane = range.begin(); lane < range.end(); ++lane) {
            Worker& worker = workers.local();
            for (std::size_t b = lane; b < plan.blocks.size(); b += lanes) process(plan.blocks[b], worker);
          }
        },
        tbb::simple_partitioner());
  });
}

}  // namespace kalends::detail
