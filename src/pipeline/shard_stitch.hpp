// Stitching a split step's outputs: the shards' strips of every raster into one raster of the
// whole grid, written like the engines write theirs (tiled, compressed, atomically).
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "kalends/block_plan.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

struct ShardPart {
  std::string folder;  // the step's folder in the shard
  std::string base;    // the shard's folder: provenance naming it names the job's out folder instead
  Window window;       // the rows it covers
};

struct StitchOutcome {
  int written = 0, unchanged = 0, removed = 0;  // removed: stitched files no shard makes any more
};

/// Stitches `parts` (in row order, covering `width` x `height`) into `folder`. Every shard must
/// hold the same files; rasters must cover their windows; other files are merged by the step
/// kind or must be the same in every shard. OutputError or InputError names the file otherwise.
/// Stitched files of an earlier finalize that the shards no longer hold are removed.
/// GDAL's block cache takes a sixteenth of `memory_bytes`, between 8 and 128 MiB, as in the engines.
StitchOutcome stitch_parts(const std::vector<ShardPart>& parts, int width, int height, const std::string& folder,
                           const std::string& out, const StepKind& kind, int threads,
                           std::int64_t memory_bytes);

}  // namespace kalends::detail
