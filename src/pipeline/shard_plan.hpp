// How a job is split for a cluster: which steps a shard computes for its strip of the grid,
// which wait for `kalends run --finalize`, and which rows each shard owns.
#pragma once

#include <cstdint>
#include <map>
#include <string>
#include <vector>

#include "kalends/block_plan.hpp"
#include "kalends/stack.hpp"
#include "pipeline/job_file.hpp"

namespace kalends::detail {

struct PlannedStep {
  std::string id, kind;
  bool split = false;       // computed by each shard for its rows; otherwise in --finalize
  std::string why_whole;    // why it is not split
  std::string root;         // the job input whose grid it covers (split steps)
  bool reads_inputs = false;  // reads job inputs directly: a shard asks the engine for its window
};

struct ShardPlan {
  static constexpr int tile = 256;  // strips are whole rows of output tiles
  int shards = 1;
  std::string job_path, out;
  std::vector<PlannedStep> steps;
  std::map<std::string, Grid> grids;  // by root input
  std::int64_t memory_bytes = 0;      // to ask of the workload manager per task
  int threads = 1;                    // per task

  const PlannedStep* step(const std::string& id) const;
  /// Shard `k` (1..shards) of a grid of `height` rows of 256-row strips: a contiguous range of
  /// strips, strip counts differing by at most one between shards.
  Window window(const std::string& root, int k) const;
  std::string shard_folder(int k) const;  // OUT/.kalends/shards/K-of-N
  std::string file() const;               // OUT/.kalends/plan.tsv
  /// The plan as written to file(): one line per fact, tab-separated.
  std::string text() const;
};

/// Plans `shards` shards of `job` writing into `out`. UsageError when a grid has fewer strips
/// than shards. `threads`: per task (0: the job's, or 4 where the job says all cores). Input
/// files in `left_out` are not read; with `skipped` (--skip-bad), a bad input file (InputError
/// naming it) is added to `left_out`, "path: reason" to `skipped`, and the grid read without it.
ShardPlan make_shard_plan(const Job& job, const std::string& out, int shards, int threads,
                          std::vector<std::string>* left_out = nullptr, std::vector<std::string>* skipped = nullptr);

/// The number of shards in the plan file of `out`, or 0 where there is none.
int planned_shard_count(const std::string& out);

}  // namespace kalends::detail
