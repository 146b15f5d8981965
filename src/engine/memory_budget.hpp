// How the --memory budget is shared out: GDAL's block cache, fixed overheads, and the blocks
// the workers hold at once.
#pragma once

#include <cstdint>

#include "kalends/block_plan.hpp"

namespace kalends::detail {

struct MemoryShare {
  std::int64_t gdal_cache = 0;
  std::int64_t fixed = 0;           // libraries, open datasets
  std::int64_t per_worker = 0;      // what one worker's block may use
  std::int64_t max_read_pixels = 0; // pixels of one block's read window
};

/// `bytes_per_pixel`: a worker's buffers per read pixel (all dates); `open_files`: datasets
/// held open for reading (per worker) and writing (shared).
MemoryShare share_memory(std::int64_t budget, int workers, std::int64_t bytes_per_pixel,
                         int read_files_per_worker, int write_files);

/// The smallest budget (whole MiB) whose share_memory gives each of `workers` a block of at
/// least `read_pixels` pixels: the inverse of share_memory, for messages that say what would do.
std::int64_t budget_for_read_pixels(std::int64_t read_pixels, int workers, std::int64_t bytes_per_pixel,
                                    int read_files_per_worker, int write_files);

/// How many of `threads` workers can hold a block at once, and the share that gives each a
/// block reading at least `smallest` (BlockPlan::smallest_read_window): all of them where the
/// budget allows, else fewer (the others then wait). UsageError naming --memory, with the
/// budget that would do, when not even one block fits.
struct BlockShare {
  MemoryShare share;
  int at_once = 1;
};
BlockShare share_for_blocks(std::int64_t budget, int threads, const Window& smallest, std::int64_t bytes_per_pixel,
                            int read_files_per_worker, int write_files);

/// Peak resident memory of this process so far (bytes), from getrusage.
std::int64_t peak_resident_bytes();

/// The machine's physical memory, or its container's limit where lower (bytes); 0 where
/// neither can be told.
std::int64_t usable_memory_bytes();

}  // namespace kalends::detail
