// Jobs: a TOML file of inputs and steps, run incrementally against a state database in the
// output folder.
#pragma once

#include <functional>
#include <string>
#include <vector>

namespace kalends {

struct RunOptions {
  std::string job_file;
  std::string out_dir;   // overrides the job's [job] out
  bool dry_run = false;
  bool skip_bad = false;  // skip unreadable or mismatched inputs, list them, exit 3
  bool wait_for_lock = false;
  int threads = 0;        // overrides the job's threads (a cluster task: the cores it was given)
  /// Cluster runs (docs/cluster.md), after `kalends plan`: compute shard `shard` (1..N) of the
  /// plan alone, into its own folder and state; `shard_count` N as given, checked against the
  /// plan (0: the plan's).
  int shard = 0, shard_count = 0;
  /// Stitch the shards' outputs and run the steps that need the whole area; refused (exit 4)
  /// while a shard is missing, failed or stale.
  bool finalize = false;
};

/// What happened to one step.
struct StepReport {
  std::string id, kind;
  enum class Action { ran, up_to_date, would_run, failed, not_reached, at_finalize } action = Action::up_to_date;
  std::string reason;    // why it ran (or would run)
  double seconds = 0;
  int outputs_written = 0, outputs_unchanged = 0, outputs_removed = 0;
  std::string caution;  // a reminder to show with the step's outputs (suitability)
  std::vector<std::string> notes;  // about the step's input data: values taken as missing, pixels not fitted
};

struct RunReport {
  std::vector<StepReport> steps;
  std::vector<std::string> skipped_inputs;  // "path: reason"
  std::vector<std::string> notes;           // on the run as a whole (another job file's folder)
  double seconds = 0;
  long long peak_memory_bytes = 0;
  std::string out_dir;
  std::string error;  // first failure, one line
  int exit_code = 0;  // 0 done, 1 failed, 2 bad input or job file, 3 partly done (--skip-bad),
                     // 4 finalize refused: shards missing, failed or stale
};

/// Events for a progress display or a log: step start/end and block progress.
struct RunEvents {
  std::function<void(const std::string& step, const std::string& kind, const std::string& reason)> step_started;
  std::function<void(const std::string& step, int done, int total)> progress;
  std::function<void(const StepReport&)> step_finished;
  /// With wait_for_lock: another run holds the output folder; called once, before waiting.
  std::function<void(const std::string& folder, const std::string& pid)> waiting;
};

/// Runs (or with dry_run, plans) the job. Job-file errors throw UsageError with the file and
/// line; step failures are reported in the RunReport (exit_code), with the state database left
/// consistent so that the next run resumes.
RunReport run_job(const RunOptions& options, const RunEvents& events = {});

/// `kalends plan JOB --shards N`: splits the job for a cluster and writes the plan
/// (OUT/.kalends/plan.tsv). UsageError when the grid has fewer 256-row strips than shards.
struct PlanReport {
  std::string plan_file, out_dir;
  int shards = 0, threads = 0;
  long long memory_mib = 0;
  std::vector<std::string> split_steps;                           // computed by every shard
  std::vector<std::pair<std::string, std::string>> whole_steps;  // id, why: run in --finalize
  std::vector<std::string> shard_rows;                            // "1: ndvi rows 0-256", ...
  std::string sbatch;                                             // the command line to submit
  std::vector<std::string> skipped_inputs;  // --skip-bad: "path: reason" of files left out
  std::string script_note;  // where the array script named may not be where the tasks run, or ""
  std::string program;      // this kalends's own path, which the array tasks run (KALENDS_BIN)
};
PlanReport plan_job(const RunOptions& options, int shards);

/// What is done, stale or failed, from the state database, without running anything.
struct StepStatus {
  std::string id, kind, state;  // done, stale, failed, never run, interrupted, running; refused
                                // (id "program": a newer kalends wrote the state)
  std::string detail;           // when it finished, or the failure, or what changed
  int outputs = 0;
};
std::vector<StepStatus> job_status(const RunOptions& options);

}  // namespace kalends
