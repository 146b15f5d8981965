// kalends plan JOB --shards N: the job split for a Slurm job array, and the command to submit it.
#include <fmt/format.h>

#include "io/shell_word.hpp"
#include "cli/commands.hpp"
#include "kalends/pipeline.hpp"

namespace kalends::cli {

Action add_plan_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("plan", "Split a job into shards for a cluster (a Slurm job array)");
  struct Options {
    RunOptions run;
    int shards = 0;
  };
  auto o = std::make_shared<Options>();
  sub->add_option("job", o->run.job_file, "The job file (TOML)")->required();
  sub->add_option("--shards", o->shards, "Number of shards (array tasks)")->required()->check(CLI::Range(1, 100000));
  sub->add_option("--out", o->run.out_dir, "Output folder (overrides the job file's)");
  sub->add_option("--threads", o->run.threads, "Threads per task (default: the job's; 4 where it says all cores)")
      ->check(CLI::Range(0, 4096));
  sub->add_flag("--skip-bad", o->run.skip_bad,
                "Leave out bad input files, list them, exit 3; the array tasks are given --skip-bad too");
  return [o, &global] {
    PlanReport plan = plan_job(o->run, o->shards);
    if (o->run.skip_bad) plan.sbatch += " --skip-bad";
    if (!global.quiet) {
      fmt::print("kalends plan: {} shard{}, {} threads and {} MiB per task -> {}\n", plan.shards, plan.shards == 1 ? "" : "s", plan.threads,
                 plan.memory_mib, plan.plan_file);
      std::string split;
      for (const std::string& s : plan.split_steps) split += (split.empty() ? "" : ", ") + s;
      fmt::print("  split by rows: {}\n", split.empty() ? "(none)" : split);
      for (const auto& [id, why] : plan.whole_steps) fmt::print("  at --finalize: {} ({})\n", id, why);
      if (plan.split_steps.empty())
        fmt::print("  nothing to split: every step runs in --finalize, as in a plain kalends run on one machine\n");
      else
        for (const std::string& rows : plan.shard_rows) fmt::print("  shard {}\n", rows);
      fmt::print("submit with:\n");
    }
    // sbatch --export splits its list at commas: a program path with one would arrive cut short,
    // so it goes in the shell's environment instead, which --export=ALL passes on.
    if (plan.program.find(',') != std::string::npos)
      fmt::print("KALENDS_BIN={} {}--export=ALL {}\n", detail::shell_word(plan.program), plan.sbatch.substr(0, 7),
                 plan.sbatch.substr(7));
    else
      fmt::print("{}{} {}\n", plan.sbatch.substr(0, 7), detail::shell_word("--export=ALL,KALENDS_BIN=" + plan.program),
                 plan.sbatch.substr(7));
    if (!plan.script_note.empty()) fmt::print(stderr, "note: {}\n", plan.script_note);
    // As kalends run --skip-bad: the files left out on standard error, exit 3 (done in part).
    for (const std::string& skipped : plan.skipped_inputs) fmt::print(stderr, "kalends plan: skipped input: {}\n", skipped);
    if (!plan.skipped_inputs.empty()) global.exit_code = 3;
  };
}

}  // namespace kalends::cli
