// kalends run JOB, kalends status JOB
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <set>
#include <algorithm>

#include <fmt/format.h>

#include "cli/commands.hpp"
#include "io/json_text.hpp"
#include "cli/stop_signals.hpp"
#include "kalends/error.hpp"
#include "kalends/error.hpp"
#include "kalends/pipeline.hpp"

namespace kalends::cli {

namespace {

const char* action_name(StepReport::Action a) {
  switch (a) {
    case StepReport::Action::ran: return "ran";
    case StepReport::Action::up_to_date: return "up to date";
    case StepReport::Action::would_run: return "would run";
    case StepReport::Action::failed: return "failed";
    case StepReport::Action::not_reached: return "not reached";
    case StepReport::Action::at_finalize: return "later";
  }
  return "?";
}

// A dry run fails nothing: it says what the run would do.
const char* action_name(StepReport::Action a, bool dry_run) {
  return dry_run && a == StepReport::Action::failed ? "would fail" : action_name(a);
}

}  // namespace

Action add_run_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("run", "Run a job file: only the steps whose inputs or parameters changed");
  struct Options {
    RunOptions run;
    std::string log = "text";
    std::string shard;
  };
  auto o = std::make_shared<Options>();
  sub->add_option("job", o->run.job_file, "The job file (TOML)")->required();
  sub->add_option("--out", o->run.out_dir, "Output folder (overrides the job file's)");
  sub->add_flag("--dry-run", o->run.dry_run, "Say what would be done, and why; change nothing");
  sub->add_flag("--skip-bad", o->run.skip_bad, "Leave out bad input files, list them, exit 3");
  sub->add_flag("--wait", o->run.wait_for_lock, "Wait for another run on the same output folder to end");
  CLI::Option* shard_option = sub->add_option("--shard", o->shard,
                  "K or K/N: compute shard K of the plan (kalends plan) alone, into its own folder and state");
  sub->add_flag("--finalize", o->run.finalize,
                "Stitch the shards' outputs and run the steps that need the whole area (exit 4 while a shard "
                "is missing, failed or stale)");
  sub->add_option("--threads", o->run.threads, "Threads (overrides the job file's; 0 = the job's)")
      ->check(CLI::Range(0, 4096));
  sub->add_option("--log", o->log, "text or json (one JSON object per line)")
      ->check(CLI::IsMember({"text", "json"}))
      ->capture_default_str();
  return [o, shard_option, &global] {
    // Given at all, --shard must name one shard: an empty or fractional value (an unset
    // $SLURM_ARRAY_TASK_ID) must not turn an array task into a whole run.
    if (shard_option->count() > 0) {
      const auto whole = [&](const std::string& text) {
        if (text.empty() || text.size() > 6 || !std::all_of(text.begin(), text.end(), [](char c) { return c >= '0' && c <= '9'; }))
          throw UsageError("--shard", "'" + o->shard + "': give K or K/N with 1 <= K <= N");
        return std::stoi(text);
      };
      const auto slash = o->shard.find('/');
      o->run.shard = whole(o->shard.substr(0, slash));
      if (slash != std::string::npos) o->run.shard_count = whole(o->shard.substr(slash + 1));
      if (o->run.shard < 1 || (slash != std::string::npos && o->run.shard_count < o->run.shard))
        throw UsageError("--shard", "'" + o->shard + "': give K or K/N with 1 <= K <= N");
    }
    const bool json = o->log == "json";
    const bool dry_run = o->run.dry_run;
    const bool terminal = !json && !global.quiet && isatty(STDERR_FILENO);
    RunEvents events;
    auto started = std::make_shared<std::chrono::steady_clock::time_point>();
    events.step_started = [=, &global](const std::string& step, const std::string& kind, const std::string& reason) {
      *started = std::chrono::steady_clock::now();
      if (json)
        fmt::print("{{\"event\": \"step_started\", \"step\": \"{}\", \"kind\": \"{}\", \"reason\": \"{}\"}}\n",
                   detail::json_escape(step), kind, detail::json_escape(reason));
      else if (!global.quiet)
        fmt::print("{}: {} ({})\n", step, kind, reason);
      // Each line reaches a log file as it happens: a run killed later leaves what it did.
      std::fflush(stdout);
    };
    events.waiting = [=](const std::string& folder, const std::string& pid) {
      if (json)
        // A number, as pids are; null where the other run wrote none (it had been a string).
        fmt::print("{{\"event\": \"waiting\", \"out\": \"{}\", \"pid\": {}}}\n", detail::json_escape(folder),
                   !pid.empty() && pid.size() < 10 && pid.find_first_not_of("0123456789") == std::string::npos ? pid
                                                                                                              : "null");
      else
        fmt::print(stderr, "note: waiting for the run (pid {}) that holds {} to end\n", pid, folder);
      std::fflush(stdout);
    };
    events.progress = [=](const std::string& step, int done, int total) {
      if (!terminal) return;
      const double seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - *started).count();
      const double rate = seconds > 0 ? done / seconds : 0;
      const int width = 30, filled = total > 0 ? width * done / total : width;
      std::fprintf(stderr, "\r  %s [%s%s] %d/%d blocks, %.1f blocks/s, %.0f s left ", step.c_str(),
                   std::string(filled, '#').c_str(), std::string(width - filled, '.').c_str(), done, total, rate,
                   rate > 0 ? (total - done) / rate : 0.0);
      if (done == total) std::fprintf(stderr, "\n");
    };
    events.step_finished = [=](const StepReport& r) {
      if (!json) return;
      std::string notes;
      for (const std::string& note : r.notes) notes += (notes.empty() ? "\"" : ", \"") + detail::json_escape(note) + "\"";
      fmt::print("{{\"event\": \"step_finished\", \"step\": \"{}\", \"action\": \"{}\", \"reason\": \"{}\", "
                 "\"seconds\": {:.3f}, \"written\": {}, \"unchanged\": {}, \"removed\": {}, \"notes\": [{}]{}}}\n",
                 detail::json_escape(r.id), action_name(r.action, dry_run), detail::json_escape(r.reason), r.seconds,
                 r.outputs_written, r.outputs_unchanged, r.outputs_removed, notes,
                 r.caution.empty() ? "" : ", \"caution\": \"" + detail::json_escape(r.caution) + "\"");
      std::fflush(stdout);
    };
    if (json) stop_signals_write_json();
    RunReport report;
    try {
      report = run_job(o->run, events);
    } catch (const Error& e) {
      // A job file it cannot use, a folder another run holds: with a JSON log still one
      // `finished` event, so that a log of JSON lines says why the night failed.
      if (!json) throw;
      const int code = dynamic_cast<const InputError*>(&e) || dynamic_cast<const UsageError*>(&e) ? 2 : 1;
      fmt::print("{{\"event\": \"finished\", \"exit_code\": {}, \"error\": \"{}\"}}\n", code,
                 detail::json_escape(e.what()));
      global.exit_code = code;
      return;
    }
    if (json) {
      fmt::print("{{\"event\": \"finished\", \"exit_code\": {}, \"seconds\": {:.3f}, \"peak_memory_mib\": {:.0f}, "
                 "\"skipped\": [",
                 report.exit_code, report.seconds, report.peak_memory_bytes / 1048576.0);
      for (std::size_t i = 0; i < report.skipped_inputs.size(); ++i)
        fmt::print("{}\"{}\"", i ? ", " : "", detail::json_escape(report.skipped_inputs[i]));
      fmt::print("], \"notes\": [");
      for (std::size_t i = 0; i < report.notes.size(); ++i)
        fmt::print("{}\"{}\"", i ? ", " : "", detail::json_escape(report.notes[i]));
      fmt::print("], \"error\": \"{}\"}}\n", detail::json_escape(report.error));
    } else if (!global.quiet) {
      int ran = 0;
      for (const StepReport& r : report.steps) ran += r.action == StepReport::Action::ran;
      const bool nothing = ran == 0 && report.exit_code == 0 && !o->run.dry_run;
      if (report.exit_code == 4)
        fmt::print("kalends run: finalize refused, nothing changed -> {}\n", report.out_dir);
      else
        // Exit 3 (inputs skipped) still did what it could; 1 and 2 stopped at a step.
        fmt::print("kalends run: {} -> {}\n",
                   o->run.dry_run                  ? "dry run, nothing changed"
                   : report.exit_code == 3         ? "done, bad inputs left out"
                   : report.exit_code != 0         ? "failed"
                   : nothing                       ? "nothing new, nothing done"
                                                   : "done",
                   report.out_dir);
      for (const StepReport& r : report.steps) {
        // "up to date" says it all; it had been printed twice, as the action and the reason.
        const bool said = r.reason == action_name(r.action);
        const char* action = action_name(r.action, o->run.dry_run);
        // No padding after the action when nothing follows it (a log line with trailing blanks).
        if (said || r.reason.empty()) fmt::print("  {:<12} {}", r.id, action);
        else fmt::print("  {:<12} {:<11} {}", r.id, action, r.reason);
        if (r.action == StepReport::Action::ran)
          fmt::print(" — {:.1f} s, {} file{} written, {} unchanged{}", r.seconds, r.outputs_written,
                     r.outputs_written == 1 ? "" : "s", r.outputs_unchanged,
                     r.outputs_removed ? fmt::format(", {} removed (no longer made)", r.outputs_removed) : "");
        fmt::print("\n");
        for (const std::string& note : r.notes) fmt::print("  note: {}\n", note);
        if (!r.caution.empty()) fmt::print("  {}\n", r.caution);
      }
      for (const std::string& s : report.skipped_inputs) fmt::print("  skipped input: {}\n", s);
      for (const std::string& note : report.notes) fmt::print("  note: {}\n", note);
      fmt::print("  {:.1f} s, peak memory {:.0f} MiB\n", report.seconds, report.peak_memory_bytes / 1048576.0);
      if (!report.error.empty()) fmt::print(stderr, "kalends: {}\n", report.error);
    } else {
      // Quiet: on stderr the notes on the data, each caution once (as `kalends suitability -q`
      // shows it: the outputs could be misread without it), the inputs left out and the error;
      // no summary, whatever the exit code (a failed or partial run had printed it all).
      std::set<std::string> shown;
      for (const StepReport& r : report.steps) {
        for (const std::string& note : r.notes) fmt::print(stderr, "note: {}: {}\n", r.id, note);
        if (!r.caution.empty() && shown.insert(r.caution).second) fmt::print(stderr, "{}\n", r.caution);
      }
      for (const std::string& s : report.skipped_inputs) fmt::print(stderr, "skipped input: {}\n", s);
      for (const std::string& note : report.notes) fmt::print(stderr, "note: {}\n", note);
      if (!report.error.empty()) fmt::print(stderr, "kalends: {}\n", report.error);
    }
    global.exit_code = report.exit_code;
  };
}

Action add_status_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("status", "What is done, stale or failed for a job file");
  auto o = std::make_shared<RunOptions>();
  sub->add_option("job", o->job_file, "The job file (TOML)")->required();
  sub->add_option("--out", o->out_dir, "Output folder (overrides the job file's)");
  return [o, &global] {
    for (const StepStatus& s : job_status(*o)) {
      if (!global.quiet || s.state != "done")
        fmt::print("{:<12} {:<11} {:<11} {}{}\n", s.id, s.kind, s.state, s.detail,
                   s.outputs ? fmt::format(" ({} file{} in its folder)", s.outputs, s.outputs == 1 ? "" : "s") : "");
      // For a monitoring script: 1 where the last run failed a step or was stopped in one.
      if (s.state == "failed" || s.state == "interrupted" || s.state == "refused") global.exit_code = 1;
    }
  };
}

}  // namespace kalends::cli
