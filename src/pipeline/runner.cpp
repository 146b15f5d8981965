// kalends run / status: a job's steps in order, each skipped when its fingerprint (program
// version, parameters, and the checksums of what it reads) matches the state database.
#include <fcntl.h>
#include <glob.h>
#include <sys/file.h>
#include <sys/resource.h>
#include <sys/stat.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <chrono>
#include <cstring>
#include <filesystem>
#include <fmt/format.h>
#include <fmt/ranges.h>
#include <fstream>
#include <iterator>
#include <limits>
#include <map>
#include <set>

#include "engine/calendar.hpp"
#include "engine/memory_budget.hpp"
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/pipeline.hpp"
#include "kalends/season.hpp"
#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/lock_probe.hpp"
#include "io/output_set.hpp"
#include "io/shell_word.hpp"
#include "pipeline/job_file.hpp"
#include "pipeline/shard_plan.hpp"
#include "pipeline/shard_stitch.hpp"
#include "pipeline/state.hpp"
#include "pipeline/step_kind.hpp"
#include "kalends/tiles.hpp"
#include "kalends/time_grid.hpp"

namespace kalends {

namespace {

// The job's output folder: --out, made absolute as the job file's `out` is (outputs record
// their inputs' paths, which a relative --out left depending on where the run was started).
std::string output_folder(const RunOptions& options, const detail::Job& job) {
  std::string folder = job.out;
  if (!options.out_dir.empty()) {
    std::filesystem::path out = std::filesystem::absolute(options.out_dir).lexically_normal();
    if (!out.has_filename() && out.has_parent_path()) out = out.parent_path();
    folder = out.string();
  }
  // A file there (or above it), or a link to nothing, had failed at the lock file (exit 1),
  // after a dry run that said every step would run; fill refuses the same as bad usage.
  const std::string option =
      options.out_dir.empty() ? options.job_file + ": 'out' '" + folder + "'" : "--out '" + options.out_dir + "'";
  std::error_code ec;
  for (std::filesystem::path p = folder; !p.empty(); p = p.parent_path()) {
    if (std::filesystem::is_symlink(p, ec) && !std::filesystem::exists(p, ec))
      throw UsageError(option, p.string() + " is a symbolic link to a place that does not exist");
    if (std::filesystem::exists(p, ec)) {
      if (!std::filesystem::is_directory(p, ec))
        throw UsageError(option, p == std::filesystem::path(folder)
                                     ? "is a file, not a folder: give the folder the job's outputs go in"
                                     : "lies under " + p.string() + ", a file, not a folder");
      break;
    }
    if (p == p.parent_path()) break;
  }
  return folder;
}

namespace fs = std::filesystem;
using detail::Job;
using detail::JobInput;
using detail::JobStep;

// ---- files of an input -------------------------------------------------------------------

std::vector<std::string> files_of(const std::string& pattern) {
  std::string path = pattern;
  // NETCDF:"daily/*.nc":var -> the files of daily/*.nc; NETCDF:"file.nc":var -> file.nc
  if (const auto connection = detail::connection_pattern(pattern)) path = connection->files;
  else if (detail::file_in_connection(path) != path)
    return {detail::file_in_connection(path)};
  if (!detail::has_glob_characters(path)) return {path};
  glob_t g{};
  std::vector<std::string> files;
  if (::glob(path.c_str(), 0, nullptr, &g) == 0)
    for (std::size_t i = 0; i < g.gl_pathc; ++i) files.emplace_back(g.gl_pathv[i]);
  globfree(&g);
  std::sort(files.begin(), files.end());
  return files;
}

struct Scan {
  std::vector<detail::InputRecord> records;  // to remember
  std::map<std::string, std::string> checksum;
};

// When a file last changed, in nanoseconds, as the state database records it (its column
// 'mtime_ns'): the later of the modification and the status-change time. The modification time
// alone can be set back (cp -p, rsync -t, unzip, touch -r): a file replaced by one of the same
// size had then kept its cached checksum. The status-change time cannot be set by a user.
std::int64_t mtime_ns(const struct stat& st) {
  const std::int64_t modified = std::int64_t(st.st_mtim.tv_sec) * 1000000000 + st.st_mtim.tv_nsec;
  const std::int64_t changed = std::int64_t(st.st_ctim.tv_sec) * 1000000000 + st.st_ctim.tv_nsec;
  return std::max(modified, changed);
}

// Whether `path` is as the database last saw it (same size and change time), so that its
// recorded checksum, or its recorded fault, still holds.
bool unchanged_since(const std::string& path, const std::optional<detail::InputRecord>& known) {
  struct stat st {};
  return known && ::stat(path.c_str(), &st) == 0 && known->size == st.st_size && known->mtime_ns == mtime_ns(st);
}

// Checksums, reused from the database while size and change time are unchanged.
std::string checksum_of(const std::string& path, const detail::StateDatabase* db, Scan& scan) {
  if (auto it = scan.checksum.find(path); it != scan.checksum.end()) return it->second;
  struct stat st {};
  if (::stat(path.c_str(), &st) != 0) throw InputError(path, "no such file");
  const std::int64_t mtime = mtime_ns(st);
  const auto known = db ? db->input(path) : std::nullopt;
  std::string sum;
  if (known && known->size == st.st_size && known->mtime_ns == mtime) {
    sum = known->checksum;
  } else {
    sum = detail::file_checksum(path);
  }
  scan.records.push_back({path, std::int64_t(st.st_size), mtime, sum});
  scan.checksum[path] = sum;
  return sum;
}

// ---- the lock ----------------------------------------------------------------------------

// Where a shard's step keeps the notes it printed, for --finalize (hidden: no output).
constexpr const char* shard_notes_file = ".kalends-notes";

class FolderLock {
 public:
  FolderLock(const std::string& folder, bool wait,
             const std::function<void(const std::string&, const std::string&)>& waiting = {}) {
    const std::string path = (fs::path(folder) / "lock").string();
    fd_ = ::open(path.c_str(), O_RDWR | O_CREAT, 0644);
    if (fd_ < 0) throw OutputError(path, "cannot create the lock file");
    // Said before waiting: a --wait run had waited in silence, and a cron log did not say why.
    bool held = ::flock(fd_, LOCK_EX | LOCK_NB) != 0;
    int error = held ? errno : 0;
    if (held && error == EWOULDBLOCK && wait) {
      if (waiting) waiting(fs::path(folder).parent_path().string(), detail::pid_in_lock(fd_));
      held = ::flock(fd_, LOCK_EX) != 0;
      error = held ? errno : 0;
    }
    if (held && error != EWOULDBLOCK) {
      // Not held by another run: this file system has no locks (it had named the pid of a run
      // long ended). Its state database could not be kept whole either (SQLite locks it).
      ::close(fd_);
      fd_ = -1;
      throw OutputError(path, fmt::format("cannot be locked ({}): on a file system without locks two runs could "
                                          "write at once; give the job an output folder on one with locks",
                                          std::strerror(error)));
    }
    if (held) {
      const std::string pid = detail::pid_in_lock(fd_);
      ::close(fd_);
      fd_ = -1;
      throw OutputError(folder, fmt::format("another kalends run (pid {}) is working on this output folder; "
                                            "try again when it ends, or use --wait",
                                            pid));
    }
    const std::string me = std::to_string(::getpid());
    (void)!::ftruncate(fd_, 0);
    (void)!::pwrite(fd_, me.data(), me.size(), 0);
  }
  ~FolderLock() {
    if (fd_ >= 0) ::close(fd_);  // closing releases the lock, also when the process dies
  }

 private:
  int fd_ = -1;
};

// The pid of the run that holds `folder`'s lock now, or "" when none does.
std::string running_pid(const std::string& folder) { return detail::job_run_holding(folder).value_or(""); }

ValueRules rules_of(const JobInput& input) {
  ValueRules r;
  r.scale = input.scale;
  r.offset = input.offset;
  r.nodata = input.nodata;
  r.valid_min = input.valid_min;
  r.valid_max = input.valid_max;
  r.band = input.band;
  return r;
}

std::string step_folder(const std::string& out, const std::string& id) { return (fs::path(out) / id).string(); }

// The array script `plan` names for the program at `self`: an installed kalends's
// (PREFIX/share/kalends beside PREFIX/bin), else the source tree's it was built from, else the
// tree's relative path.
std::string cluster_template(const fs::path& self) {
  std::error_code ec;
  if (!self.empty()) {
    const fs::path installed = self.parent_path().parent_path() / "share" / "kalends" / "kalends-array.sbatch";
    if (fs::exists(installed, ec)) return installed.string();
  }
  if (fs::exists(KALENDS_CLUSTER_TEMPLATE, ec)) return KALENDS_CLUSTER_TEMPLATE;
  return "tools/cluster/kalends-array.sbatch";
}

detail::ResolvedInput resolve_job_input(const JobInput& input, const std::vector<std::string>& excluded) {
  detail::ResolvedInput r;
  r.pattern = input.stack;
  r.qa = input.qa;
  r.keep = input.keep;
  r.qa_band = input.qa_band;
  r.rules = rules_of(input);
  r.rules.exclude = excluded;
  return r;
}

// Where a budget error points: the job file's line, or the default it fell back to.
std::string memory_key(const Job& job) {
  return job.memory_line > 0 ? fmt::format("{}:{}: [job] memory", job.path, job.memory_line)
                             : fmt::format("{}: [job] memory (not set: {})", job.path, job.memory);
}

// Every step that reads job inputs alone and whose kind can check its budget, checked before
// the first step runs: a job whose third fill cannot hold one block fails at once, not after
// hours of the first two (nor in every task of a cluster array). `wanted` says whether a step
// is to be checked and for which rows. Returns the steps refused, each with the error naming the
// job file's key. Anything else wrong (an input missing) is left to the step itself, in the
// job's words; a damaged file is left out of the check, as --skip-bad would leave it out.
std::vector<std::pair<std::string, UsageError>> check_budgets(
    const Job& job, const std::string& base, std::int64_t memory, int threads,
    const std::vector<std::string>& excluded_before,
    const std::function<bool(const JobStep&, std::optional<Window>& region)>& wanted,
    std::map<std::string, InputError>* bad_inputs = nullptr) {
  std::vector<std::pair<std::string, UsageError>> refused;
  for (const JobStep& step : job.steps) {
    // Each step finds the bad files it reads itself: shared, only the first step that read one
    // had been said to fail on it.
    std::vector<std::string> excluded = excluded_before;
    const detail::StepKind* kind = detail::find_step_kind(step.kind);
    if (!kind || !kind->check_memory || step.inputs.empty() ||
        !std::all_of(step.inputs.begin(), step.inputs.end(), [&](const std::string& n) { return job.inputs.count(n) > 0; }))
      continue;
    std::optional<Window> region;
    try {
      if (!wanted(step, region)) continue;
    } catch (const std::exception&) {
      continue;
    }
    detail::StepContext context{step.options};
    context.job_path = job.path;
    context.folder = step_folder(base, step.id);
    context.memory_bytes = memory;
    context.threads = threads;
    context.region = region;
    context.resolve = [&](const std::string& name) { return resolve_job_input(job.inputs.at(name), excluded); };
    for (int attempt = 0; attempt < 1000; ++attempt) {
      try {
        kind->check_memory(context);
      } catch (const UsageError& e) {
        if (e.where() == "--memory")
          refused.emplace_back(step.id, UsageError(memory_key(job), fmt::format("step '{}': {}", step.id, e.reason())));
      } catch (const InputError& e) {
        std::error_code ec;
        if (!e.where().empty() && fs::is_regular_file(e.where(), ec) &&
            std::find(excluded.begin(), excluded.end(), e.where()) == excluded.end()) {
          // The step itself fails on it (or, with --skip-bad, leaves it out): a dry run says so.
          if (bad_inputs) bad_inputs->try_emplace(step.id, e);
          excluded.push_back(e.where());
          continue;
        }
      } catch (const std::exception&) {
        // a folder that cannot be listed, say: the step says so in the job's words when it runs
      }
      break;
    }
  }
  return refused;
}

// The hidden .partial files a run writes before renaming them into place; a killed run
// leaves them behind.
std::vector<fs::path> partials(const std::string& folder) {
  std::vector<fs::path> found;
  std::error_code ec;
  if (!fs::exists(folder)) return found;
  for (const auto& entry : fs::recursive_directory_iterator(folder, ec)) {
    const std::string name = entry.path().filename().string();
    if (entry.is_regular_file() && name.size() > 8 && name.front() == '.' &&
        name.compare(name.size() - 8, 8, ".partial") == 0)
      found.push_back(entry.path());
  }
  return found;
}

void remove_partials(const std::string& folder) {
  std::error_code ec;
  for (const fs::path& p : partials(folder)) fs::remove(p, ec);
}

// "lambda 10 -> 20; reach 183 (new); every 1M (gone)" between two parameter descriptions
// ("key<TAB>value" lines); "" where the earlier one is unknown (a state of an earlier version)
// or they agree.
std::string changed_parameters(const std::string& before, const std::string& now) {
  if (before.empty()) return "";
  const auto parse = [](const std::string& text) {
    std::map<std::string, std::string> pairs;
    std::size_t at = 0;
    while (at < text.size()) {
      const std::size_t end = std::min(text.find('\n', at), text.size());
      const std::string line = text.substr(at, end - at);
      if (const auto tab = line.find('\t'); tab != std::string::npos) pairs[line.substr(0, tab)] = line.substr(tab + 1);
      at = end + 1;
    }
    return pairs;
  };
  const auto old_pairs = parse(before), new_pairs = parse(now);
  const auto shown = [](const std::string& v) { return v.empty() ? std::string("(none)") : v; };
  std::vector<std::string> changes;
  for (const auto& [key, value] : new_pairs) {
    const auto it = old_pairs.find(key);
    if (it == old_pairs.end()) changes.push_back(key + " " + shown(value) + " (new)");
    else if (it->second != value) changes.push_back(key + " " + shown(it->second) + " -> " + shown(value));
  }
  for (const auto& [key, value] : old_pairs)
    if (!new_pairs.count(key)) changes.push_back(key + " " + shown(value) + " (gone)");
  std::string text;
  for (std::size_t i = 0; i < changes.size() && i < 4; ++i) text += (text.empty() ? "" : "; ") + changes[i];
  if (changes.size() > 4) text += fmt::format("; {} more", changes.size() - 4);
  return text;
}

// Whether a step's recorded outputs lie under another folder than `out`, none of them here: the
// output folder was copied (`cp -a out copy`, the job's out changed to the copy). The originals
// still exist, so without this the copy's steps had counted as done whatever it lacked.
bool recorded_elsewhere(const detail::StepRecord& record, const std::string& out) {
  // A kind that writes outside its folder by design (a report's 'html') says nothing of a copy.
  const detail::StepKind* kind = detail::find_step_kind(record.kind);
  return !record.outputs.empty() && !(kind && kind->writes_outside_folder) &&
         std::none_of(record.outputs.begin(), record.outputs.end(), [&](const std::string& p) {
           // Links resolved: compared as typed, a folder reached through a link had counted as a
           // copy, redone whole whenever the path changed.
           return detail::path_inside(p, out);
         });
}

// Whether every output a step recorded is still there, under `out`.
bool outputs_exist(const detail::StepRecord& record, const std::string& out) {
  return !recorded_elsewhere(record, out) &&
         std::all_of(record.outputs.begin(), record.outputs.end(), [](const std::string& p) { return fs::exists(p); });
}

// Whether an output is one the user does not see (a tiled fill's .mosaic views): below a
// hidden folder of `out`, or hidden itself.
bool hidden_output(const std::string& path, const std::string& out) {
  for (const auto& part : fs::path(path).lexically_relative(out))
    if (const std::string name = part.string(); name.size() > 1 && name[0] == '.' && name != "..") return true;
  return false;
}

// "outputs missing", with how many of the step's recorded outputs a user sees are gone and the
// first of them (relative to `out`), so that the user can tell a deleted file from a lost folder.
std::string outputs_missing(const detail::StepRecord& record, const std::string& out) {
  if (recorded_elsewhere(record, out))
    return "outputs recorded in another folder (first: " + record.outputs.front() +
           "): a copied output folder is redone, once";
  std::size_t missing = 0, seen = 0;
  std::string first;
  for (const std::string& p : record.outputs) {
    if (hidden_output(p, out)) continue;
    ++seen;
    if (!fs::exists(p) && missing++ == 0) first = fs::path(p).lexically_relative(out).string();
  }
  if (missing == 0) return "outputs missing";
  return fmt::format("outputs missing: {} of {} (first: {})", missing, seen, first);
}

// Input files added, changed or removed between two runs (path -> checksum).
std::set<std::string> changed_files(const std::map<std::string, std::string>& before,
                                    const std::map<std::string, std::string>& now) {
  std::set<std::string> changed;
  for (const auto& [f, sum] : now)
    if (auto it = before.find(f); it == before.end() || it->second != sum) changed.insert(f);
  for (const auto& [f, sum] : before)
    if (!now.count(f)) changed.insert(f);
  return changed;
}

// The failed steps of a run (or of the last runs, for status), and the steps that wait for them
// through what they read, directly or through other steps.
class FailedSteps {
 public:
  void failed(const std::string& id) { root_[id] = id; }
  /// The failed step `step` waits for, as a reason ("reads step 'fill', which failed"), and
  /// `step` recorded as waiting for it too; "" where it reads no failed or waiting step.
  std::string waiting(const JobStep& step) {
    const auto waits = std::find_if(step.inputs.begin(), step.inputs.end(),
                                    [&](const std::string& name) { return root_.count(name) != 0; });
    if (waits == step.inputs.end()) return "";
    const std::string root = root_.at(*waits);
    root_[step.id] = root;
    return *waits == root ? fmt::format("reads step '{}', which failed", root)
                          : fmt::format("reads step '{}', which waits for failed step '{}'", *waits, root);
  }

 private:
  std::map<std::string, std::string> root_;  // step id -> the failed step it waits for
};

// The end of the command line a job's step writes into its rasters' KALENDS_COMMAND: how the
// runner knows a raster in a step's folder for one that step wrote.
std::string written_by_step(const std::string& id) { return "(step " + id + ")"; }

class Runner {
 public:
  Runner(const RunOptions& options, const RunEvents& events) : options_(options), events_(events) {}

  RunReport run() {
    const auto started = std::chrono::steady_clock::now();
    job_ = detail::read_job(options_.job_file);
    out_ = output_folder(options_, job_);
    if (out_.empty()) throw UsageError(options_.job_file, "no output folder: set 'out' in [job] or give --out");
    report_.out_dir = out_;
    base_ = out_;
    if (options_.shard && options_.finalize)
      throw UsageError("--finalize", "a shard's run and the finalize are separate runs: give one of --shard, --finalize");
    if (options_.shard || options_.finalize) load_plan();
    if (options_.shard) {
      if (options_.shard < 1 || options_.shard > plan_->shards)
        throw UsageError("--shard", fmt::format("{}: the plan has shards 1 to {}", options_.shard, plan_->shards));
      shard_ = options_.shard;
      base_ = plan_->shard_folder(shard_);
      report_.out_dir = base_;
      // A shard keeps a state of its own: the job's, which a newer kalends may have written, is
      // the main folder's (an older kalends had run every shard and was refused at --finalize).
      detail::require_state_not_newer((fs::path(out_) / ".kalends" / "state.sqlite").string());
    }
    const fs::path state_dir = fs::path(base_) / ".kalends";
    std::optional<FolderLock> lock;
    if (options_.dry_run && !fs::exists(state_dir / "state.sqlite")) {
      // A dry run of a job never run changes nothing: not even the output folder is made.
      db_ = std::make_unique<detail::StateDatabase>(":memory:");
    } else {
      std::error_code ec;
      fs::create_directories(state_dir, ec);
      if (ec) throw OutputError(state_dir.string(), "cannot create: " + ec.message());
      lock.emplace(state_dir.string(), options_.wait_for_lock, events_.waiting);
      require_room_for_state((state_dir / "state.sqlite").string());
      db_ = std::make_unique<detail::StateDatabase>((state_dir / "state.sqlite").string(), false, !options_.dry_run);
      note_another_job_file();
    }
    memory_ = job_.memory;
    if (options_.skip_bad) leave_out_known_bad_inputs();
    if (options_.finalize && !shards_ready()) {
      report_.exit_code = 4;
      report_.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
      report_.peak_memory_bytes = detail::peak_resident_bytes();
      return report_;
    }
    for (const JobStep& step : job_.steps)
      if (const auto record = db_->step(step.id); record && record->status == "done")
        recorded_at_start_[step.id] = record->fingerprint;
    // The budgets of the steps that will run, before the first of them (--finalize only stitches
    // the split steps, whose budgets `kalends plan` checked).
    const int threads = options_.threads > 0 ? options_.threads : job_.threads;
    std::map<std::string, InputError> bad_inputs;
    // A step refused fails at once, before any step runs, and stops only the steps that read it
    // (it had stopped the whole job, independent steps too, with no reason given for them).
    const auto refused =
        check_budgets(job_, base_, cli_memory(), threads, excluded_, [&](const JobStep& step, std::optional<Window>& region) {
          const detail::PlannedStep* planned = plan_ ? plan_->step(step.id) : nullptr;
          if (planned && (shard_ ? !planned->split : planned->split)) return false;
          if (up_to_date(step)) return false;
          if (shard_) region = plan_->window(planned->root, shard_);
          return true;
        },
        &bad_inputs);
    // The small files of the user's that steps read (survey tables), before any step runs: a
    // bad one fails its step at once, and that step alone.
    std::map<std::string, Error> unusable_file;
    for (const JobStep& step : job_.steps) {
      const detail::StepKind* kind = detail::find_step_kind(step.kind);
      if (!kind || !kind->check_files) continue;
      const detail::PlannedStep* planned = plan_ ? plan_->step(step.id) : nullptr;
      if (planned && (shard_ ? !planned->split : options_.finalize && planned->split)) continue;
      try {
        if (up_to_date(step)) continue;
      } catch (const Error&) {
        // An input it cannot read: the step fails on that when it is reached.
      }
      try {
        kind->check_files(context_for(step, step_folder(base_, step.id)));
      } catch (const Error& e) {
        unusable_file.emplace(step.id, e);
      }
    }
    // A failed step stops only the steps that read it, directly or through others: a bad points
    // file for one extract step had left every later step of the night undone ("not reached").
    FailedSteps stopped;
    int failures = 0;
    for (const JobStep& step : job_.steps) {
      StepReport r;
      r.id = step.id;
      r.kind = step.kind;
      if (std::string why = stopped.waiting(step); !why.empty()) {
        r.action = StepReport::Action::not_reached;
        r.reason = std::move(why);
        if (events_.step_finished) events_.step_finished(r);
        report_.steps.push_back(r);
        continue;
      }
      const detail::PlannedStep* planned = plan_ ? plan_->step(step.id) : nullptr;
      if (shard_ && !planned->split) {
        r.action = StepReport::Action::at_finalize;
        r.reason = "in --finalize: " + planned->why_whole;
        report_.steps.push_back(r);
        continue;
      }
      auto fail_step = [&](const Error& e, int exit_code) {
        r.action = StepReport::Action::failed;
        r.reason = e.what();
        if (!options_.dry_run) {
          try {
            db_->step_failed(step.id, step.kind, e.what());
          } catch (const Error&) {
            // A full disk can refuse this too; the step then simply has no 'done' record.
          }
        }
        // The first failure is the run's error and exit code; the table lists every one.
        if (failures++ == 0) {
          report_.error = e.what();
          report_.exit_code = exit_code;
        }
        stopped.failed(step.id);
      };
      if (const auto over = std::find_if(refused.begin(), refused.end(), [&](const auto& r) { return r.first == step.id; });
          over != refused.end()) {
        fail_step(over->second, 2);
        if (events_.step_finished) events_.step_finished(r);
        report_.steps.push_back(r);
        continue;
      }
      // A composite the step cannot read (no QA layer for its date, a damaged file): the run
      // fails the step on it, unless --skip-bad; a dry run had said "would run".
      if (const auto bad = bad_inputs.find(step.id); options_.dry_run && !options_.skip_bad && bad != bad_inputs.end()) {
        const Error& e = bad->second;
        fail_step(InputError(job_option_names(job_wording(e.where(), step)), job_wording(e.reason(), step)), 2);
        if (events_.step_finished) events_.step_finished(r);
        report_.steps.push_back(r);
        continue;
      }
      if (const auto bad = unusable_file.find(step.id); bad != unusable_file.end()) {
        const Error& e = bad->second;  // in the job's words, as the errors of a step that runs
        fail_step(InputError(job_option_names(job_wording(e.where(), step)), job_wording(e.reason(), step)), 2);
        if (events_.step_finished) events_.step_finished(r);
        report_.steps.push_back(r);
        continue;
      }
      try {
        if (options_.finalize && planned->split) stitch_step(step, *planned, r);
        else run_step(step, r);
      } catch (const Error& caught) {
        // The engines name the command's option; in a job the budget is the job file's.
        const bool usage = dynamic_cast<const UsageError*>(&caught) != nullptr;
        const bool input = dynamic_cast<const InputError*>(&caught) != nullptr;
        const Error e = usage && caught.where() == "--memory"
                            ? UsageError(memory_key(job_), caught.reason())
                        : usage ? UsageError(job_option_names(job_wording(caught.where(), step)),
                                             job_wording(caught.reason(), step))
                        : input ? InputError(job_option_names(job_wording(caught.where(), step)),
                                             job_wording(caught.reason(), step))
                                : caught;
        // 2 for bad input or options (a job's memory too small for one block), as the commands.
        fail_step(e, usage || input ? 2 : 1);
      } catch (const std::filesystem::filesystem_error& caught) {
        // A library's own failure had passed the step by: no record, so `status` called it
        // interrupted, and the run printed no table.
        fail_step(Error(caught.path1().string(), caught.code().message()), 1);
      } catch (const std::bad_alloc&) {
        fail_step(Error("step '" + step.id + "'", "out of memory: give a smaller [job] memory, or run where more "
                                                  "memory is free"), 1);
      } catch (const std::exception& caught) {
        fail_step(Error("step '" + step.id + "'", caught.what()), 1);
      }
      if (events_.step_finished) events_.step_finished(r);
      report_.steps.push_back(r);
    }
    if (failures > 1) report_.error += fmt::format(" ({} steps failed; the table names each)", failures);
    if (!options_.dry_run) {
      try {
        db_->remember_inputs(scan_.records);
        db_->remember_skipped(report_.skipped_inputs);
      } catch (const Error& e) {
        // The steps' own records are already safe; the checksums are only a cache.
        if (report_.error.empty()) report_.error = e.what();
        if (report_.exit_code == 0) report_.exit_code = 1;
      }
    }
    if (report_.exit_code == 0 && !report_.skipped_inputs.empty()) report_.exit_code = 3;
    report_.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
    report_.peak_memory_bytes = detail::peak_resident_bytes();
    return report_;
  }

  // A file-size limit (ulimit -f) below what the state database needs had let every step do its
  // work, publish its files and then fail to record it ("disk I/O error"): refused before any
  // step, naming the limit. Room to grow: 64 KiB (a limit between that and what the outputs
  // need fails at the first output, as a full disk does).
  static void require_room_for_state(const std::string& path) {
    rlimit limit{};
    if (getrlimit(RLIMIT_FSIZE, &limit) != 0 || limit.rlim_cur == RLIM_INFINITY) return;
    std::error_code ec;
    const std::uintmax_t size = fs::exists(path, ec) ? fs::file_size(path, ec) : 0;
    const std::uintmax_t needed = size + (64 << 10);
    if (std::uintmax_t(limit.rlim_cur) < needed)
      throw OutputError(path, fmt::format("the file-size limit (ulimit -f) of {} KiB is below what the state "
                                          "database needs ({} KiB: its size and room to grow); raise it "
                                          "(ulimit -f unlimited) and run again",
                                          std::uintmax_t(limit.rlim_cur) >> 10, needed >> 10));
  }

  // The engines' advice names a command's options; a job sets the step's keys instead.
  static std::string job_wording(std::string reason, const JobStep& step) {
    const std::string option_advice = "give --units kelvin or --units celsius";
    if (const auto at = reason.find(option_advice); at != std::string::npos)
      reason.replace(at, option_advice.size(),
                     fmt::format("set units = \"kelvin\" or \"celsius\" in step '{}'", step.id));
    const std::string marks_advice = "give --date-marks start";
    if (const auto at = reason.find(marks_advice); at != std::string::npos)
      reason.replace(at, marks_advice.size(), "give date_marks = \"start\"");
    const std::string options_named = "the unit (--units) or scale factor (--scale)";
    if (const auto at = reason.find(options_named); at != std::string::npos)
      reason.replace(at, options_named.size(),
                     fmt::format("the unit ('units' of step '{}') or scale factor ('scale' of its input)", step.id));
    // An option that is a key of this step under its own name ("--extent" of a grid step): the
    // key, as the job file writes it (a grid step's note had named --extent).
    if (const detail::StepKind* kind = detail::find_step_kind(step.kind))
      for (const detail::StepKey& key : kind->keys) {
        std::string option = std::string("--") + key.name;
        std::replace(option.begin(), option.end(), '_', '-');
        for (auto at = reason.find(option); at != std::string::npos; at = reason.find(option, at + 1)) {
          const std::size_t end = at + option.size();
          if (end < reason.size() && (std::isalnum(static_cast<unsigned char>(reason[end])) || reason[end] == '-'))
            continue;  // a longer option (--day in --day-time)
          reason.replace(at, option.size(), std::string("'") + key.name + "'");
        }
      }
    return reason;
  }

  // An engine's error names the command's option; a job file has the key of that name.
  static std::string job_option_names(std::string where) {
    for (const auto& [option, key] : detail::option_keys())
      for (auto at = where.find(option); at != std::string::npos; at = where.find(option, at))
        where.replace(at, std::strlen(option), std::string("'") + key + "'");
    return where;
  }

  // Inputs the last run left out as bad and that have not changed since (same size and
  // modification time as then) and still lack what they lacked are left out again without being
  // read: otherwise every run and status would find "inputs changed" in the file that is not
  // used. Returns them as
  // "path: reason".
  std::vector<std::string> leave_out_known_bad_inputs() {
    std::vector<std::string> left_out;
    if (!db_) return left_out;
    for (const auto& [path, reason] : db_->skipped()) {
      // A value file refused for want of its QA partner is read again once the partner comes.
      if (!unchanged_since(path, db_->input(path)) || partner_now_present(reason)) continue;
      excluded_.push_back(path);
      left_out.push_back(path + ": " + reason);
      report_.skipped_inputs.push_back(left_out.back());
    }
    return left_out;
  }

  std::vector<StepStatus> status() {
    job_ = detail::read_job(options_.job_file);
    out_ = output_folder(options_, job_);
    base_ = out_;
    const fs::path state = fs::path(out_) / ".kalends" / "state.sqlite";
    // A run going now: the steps it has not finished are being (re)made, not merely stale.
    const std::string running = running_pid((fs::path(out_) / ".kalends").string());
    if (fs::exists(state)) {
      // A run killed inside a transaction leaves a journal that a read-only reader cannot roll
      // back ("attempt to write a readonly database"); with no run going, recover it as the
      // next run would, which restores the last committed state.
      std::error_code ec;
      const bool hot_journal = running.empty() && fs::exists(state.string() + "-journal", ec);
      if (hot_journal) {
        try {
          db_ = std::make_unique<detail::StateDatabase>(state.string(), false);
        } catch (const Error&) {
          db_.reset();  // not writable here: read it as it is
        }
      }
      if (!db_) db_ = std::make_unique<detail::StateDatabase>(state.string(), true);
    }
    std::vector<StepStatus> list;
    // Steps are judged as the nightly --skip-bad run will see them: without the bad files it
    // left out, while those are unchanged. Each is listed after the steps.
    const std::vector<std::string> left_out = leave_out_known_bad_inputs();
    // A failed step recorded, or the failed step `step` waits for named ("" if none): the next
    // run does it only once that one is fixed, which "never run" alone did not say.
    FailedSteps failed;
    auto waiting_on = [&](const JobStep& step, const StepStatus& s) -> std::string {
      if (s.state != "failed") return failed.waiting(step);
      failed.failed(step.id);
      return "";
    };
    for (const JobStep& step : job_.steps) {
      StepStatus s;
      s.id = step.id;
      s.kind = step.kind;
      std::string fingerprint;
      try {
        fingerprint = fingerprint_of(step);
      } catch (const Error& e) {
        // A run that failed on it (a missing input folder) had been listed stale, status exit 0.
        const auto record = db_ ? db_->step(step.id) : std::nullopt;
        s.state = !record ? "never run" : record->status == "failed" ? "failed" : "stale";
        s.detail = s.state == "failed" ? record->finished + " UTC: " + record->message
                                       : std::string("an input cannot be read: ") + e.what();
        // A step reading one that failed on this input: that failed step, not the input.
        if (const std::string why = waiting_on(step, s); !why.empty()) s.detail = why;
        list.push_back(s);
        continue;
      }
      const auto record = db_ ? db_->step(step.id) : std::nullopt;
      const std::string folder = step_folder(out_, step.id);
      const bool interrupted = !partials(folder).empty() || fs::exists(fs::path(folder) / half_published_marker);
      if (!record && interrupted) {
        s.state = "interrupted";
        s.detail = "a run stopped while writing it (hidden .partial files); the next run does it";
      } else if (!record) {
        s.state = "never run";
      } else if (record->status == "failed") {
        s.state = "failed";
        s.detail = record->finished + " UTC: " + record->message;
      } else if (record->status == "running" && !running.empty()) {
        // Marked by the run going now: what it was before (the mark keeps the last fingerprint,
        // empty for a step never done or failed last time).
        if (record->fingerprint.empty()) {
          s.state = "never run";
        } else {
          s.state = "stale";
          s.detail = !outputs_exist(*record, out_) ? outputs_missing(*record, out_) : why_changed(*record, step, fingerprint);
        }
      } else if (record->status == "running") {
        // Marked when a run started it, and never done or failed: that run was stopped.
        s.state = "interrupted";
        s.detail = "a run stopped while running it (" + record->finished + " UTC); the next run redoes it";
      } else {
        // The files a user sees: not the hidden ones (a tiled fill's .mosaic views), which the
        // run's "files written" does not count either.
        s.outputs = int(std::count_if(record->outputs.begin(), record->outputs.end(), [&](const std::string& p) {
          return fs::exists(p) && !hidden_output(p, out_);  // a missing one is counted as missing
        }));
        const bool complete = outputs_exist(*record, out_);
        if (record->fingerprint == fingerprint && complete) {
          s.state = "done";
          s.detail = fmt::format("{} UTC, {:.1f} s", record->finished, record->seconds);
        } else {
          s.state = "stale";
          s.detail = !complete ? outputs_missing(*record, out_) : why_changed(*record, step, fingerprint);
        }
        // Stopped while redoing it (not new inputs since a finished run): say so first.
        if (interrupted && s.state != "done") {
          s.state = "interrupted";
          s.detail = "a run stopped while rewriting it (hidden .partial files); the next run redoes it; before that: " +
                     s.detail;
        }
      }
      if (const std::string why = waiting_on(step, s); !why.empty() && (s.state == "never run" || s.state == "stale"))
        s.detail = s.detail.empty() ? why : why + "; " + s.detail;
      if (!running.empty() && s.state != "done") {
        // Its hidden .partial files are the running run's own, so "interrupted" is not said.
        const bool had_record = s.state == "stale" || s.state == "failed";
        s.detail = fmt::format("a run (pid {}) is going now; before it: {}", running,
                               had_record ? s.state + (s.detail.empty() ? "" : " (" + s.detail + ")") : "never done");
        s.state = "running";
      }
      list.push_back(s);
    }
    for (const std::string& input : left_out)
      list.push_back({"input", "bad", "left out",
                      input + " (unchanged since the run that found it; a run without --skip-bad stops on it)"});
    // A state a newer kalends wrote: this one's runs are refused, which "done" alone hid.
    if (db_)
      if (const std::string newest = db_->newest_program(); detail::newer_than_this_program(newest))
        list.push_back({"program", "kalends", "refused",
                        fmt::format("the state was written by kalends {}; this one ({}) refuses to run here: use {} "
                                    "or later",
                                    newest, KALENDS_VERSION, newest)});
    // A cluster run's shards, after the steps: what each still lacks before --finalize.
    if (detail::planned_shard_count(out_) > 0) {
      try {
        // Judged as the shards' --skip-bad runs see it: a bad input file gives no grid.
        const std::size_t listed = report_.skipped_inputs.size();
        options_.skip_bad = true;
        load_plan();
        for (std::size_t k = listed; k < report_.skipped_inputs.size(); ++k)
          list.push_back({"input", "bad", "left out",
                          report_.skipped_inputs[k] + " (shards run with --skip-bad leave it out; without, they stop on it)"});
        for (int k = 1; k <= plan_->shards; ++k) {
          StepStatus s;
          s.id = fmt::format("{}/{}", k, plan_->shards);
          s.kind = "shard";
          const ShardCheck check = shard_lacks(k);
          s.detail = check.detail;
          // As a step's: a monitoring script reads "failed", "interrupted" and "refused" (exit 1).
          s.state = check.state;
          list.push_back(s);
        }
      } catch (const UsageError& e) {
        StepStatus s;
        s.id = "plan";
        s.kind = "shards";
        s.state = "stale";
        s.detail = e.what();
        list.push_back(s);
      }
    }
    return list;
  }

 private:
  // " --out FOLDER" where the user gave one, for the commands an error suggests.
  std::string out_option() const { return options_.out_dir.empty() ? "" : " --out " + options_.out_dir; }

  // The plan of `kalends plan`, made again from the job: a job or grid changed since is refused.
  void load_plan() {
    const int shards = detail::planned_shard_count(out_);
    if (shards == 0)
      throw UsageError(out_, "no shard plan in this output folder: run 'kalends plan " + options_.job_file +
                                 out_option() + " --shards N' first");
    if (options_.shard_count && options_.shard_count != shards)
      throw UsageError("--shard", fmt::format("{}/{}: the plan has {} shards (run kalends plan again to change it)",
                                              options_.shard, options_.shard_count, shards));
    int threads = 0;
    std::ifstream in(fs::path(out_) / ".kalends" / "plan.tsv");
    std::string text((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    if (const auto at = text.find("\nthreads\t"); at != std::string::npos) threads = std::atoi(text.c_str() + at + 9);
    // The bad files a --skip-bad run leaves out give no grid; listed as the steps' are.
    const std::size_t known_bad = excluded_.size();
    plan_ = detail::make_shard_plan(job_, out_, shards, threads, &excluded_,
                                    options_.skip_bad ? &report_.skipped_inputs : nullptr);
    // A file the plan could open but a shard found bad (pixels cut short) is left out by every
    // shard and the finalize alike: judged without it, the shards' steps are up to date.
    // A finalize without --skip-bad is told of such a file, while it is as the shard found it
    // (it had said only that the shards' inputs changed, and resubmitting them changed nothing).
    // A shard run without --skip-bad is told too: it had read the file's rows that still read,
    // said done, and stayed stale for the finalize, however often it was run again.
    if (options_.skip_bad || options_.finalize || options_.shard)
      for (int k = 1; k <= shards; ++k) {
        const fs::path shard_state = fs::path(plan_->shard_folder(k)) / ".kalends" / "state.sqlite";
        if (!fs::exists(shard_state)) continue;
        const detail::StateDatabase shard_db(shard_state.string(), true);
        for (const auto& [path, reason] : shard_db.skipped()) {
          if (!options_.skip_bad) {
            if (unchanged_since(path, shard_db.input(path)))
              throw InputError(path, reason + "; shard " + std::to_string(k) + " left it out (--skip-bad): " +
                                         (options_.finalize ? "give --finalize --skip-bad too"
                                                            : "give this shard --skip-bad too, as the plan's sbatch line does") +
                                         ", or repair the file and run the shards again");
            continue;
          }
          if (std::find(excluded_.begin(), excluded_.end(), path) == excluded_.end()) {
            excluded_.push_back(path);
            report_.skipped_inputs.push_back(path + ": " + reason);
          }
        }
      }
    // Remembered as a step's scan remembers them: status and the next run then leave them out
    // while they are unchanged.
    for (std::size_t k = known_bad; k < excluded_.size(); ++k) checksum_of(excluded_[k], db_.get(), scan_);
    if (plan_->text() != text) {
      const auto planned_job = text.find("\njob\t");
      const std::string job_line = planned_job == std::string::npos ? "" : text.substr(planned_job + 5, text.find('\n', planned_job + 5) - planned_job - 5);
      if (!job_line.empty() && job_line != plan_->job_path)
        throw UsageError(plan_->file(), "made for another job file (" + job_line + "); give that one, or run kalends plan " +
                                            options_.job_file + out_option() + " again");
      throw UsageError(plan_->file(), "out of date: the job file or its inputs' grids changed since it was made; "
                                      "run kalends plan again (and the shards)");
    }
  }

  // What shard `k` lacks (detail "" and state "done" when every split step is done and up to
  // date), with the state `kalends status` lists and finalize acts on.
  struct ShardCheck {
    std::string detail;
    std::string state;  // done, running, refused (a newer kalends ran it), failed, interrupted, not done
  };
  ShardCheck shard_lacks(int k) {
    shard_ = k;
    fingerprints_.clear();
    const fs::path path = fs::path(plan_->shard_folder(k)) / ".kalends" / "state.sqlite";
    std::string what;
    std::set<std::string> reasons;  // one per split step, "" where it is done
    bool failed = false, interrupted = false;
    std::unique_ptr<detail::StateDatabase> db;
    if (fs::exists(path)) db = std::make_unique<detail::StateDatabase>(path.string(), true);
    // A strip a newer kalends computed is not this one's to stitch (or to call done).
    if (db)
      if (const std::string newest = db->newest_program(); detail::newer_than_this_program(newest))
        return {fmt::format("written by kalends {}, newer than this one ({})", newest, KALENDS_VERSION), "refused"};
    // A shard still at work: the step it marked as running is being run, not interrupted (an
    // operator told "interrupted" may kill or resubmit a live task).
    const std::string pid = running_pid((fs::path(plan_->shard_folder(k)) / ".kalends").string());
    for (const JobStep& step : job_.steps) {
      if (!plan_->step(step.id)->split) continue;
      const auto record = db ? db->step(step.id) : std::nullopt;
      std::string why;
      if (!record) why = "never run";
      else if (record->status == "failed") {
        why = "failed" + (record->message.empty() ? "" : ": " + record->message);
        failed = true;
      } else if (record->status == "running") {
        why = pid.empty() ? "interrupted (a run stopped while running it)" : "being run";
        interrupted = interrupted || pid.empty();
      }
      else if (record->fingerprint != fingerprint_of(step)) why = "stale: " + why_changed(*record, step, fingerprint_of(step));
      else if (!outputs_exist(*record, out_)) why = outputs_missing(*record, out_);
      if (!why.empty()) what += (what.empty() ? "" : ", ") + step.id + " " + why;
      reasons.insert(why);
    }
    if (!db) what = "never run";
    else if (reasons.size() == 1 && !what.empty()) what = "every step " + *reasons.begin();
    // A shard still at work is not to be submitted again.
    if (!pid.empty()) what = "running (pid " + pid + ")" + (what.empty() ? "" : ": " + what);
    shard_ = 0;
    fingerprints_.clear();
    const char* state = !pid.empty() ? "running" : failed ? "failed" : interrupted ? "interrupted" : what.empty() ? "done" : "not done";
    return {what, state};
  }

  // Whether every shard holds every split step done and up to date; otherwise the error names
  // the shards and what they lack.
  bool shards_ready() {
    std::string problems, list;
    int missing = 0;
    bool newer = false;
    for (int k = 1; k <= plan_->shards; ++k) {
      const ShardCheck check = shard_lacks(k);
      if (check.state == "done") continue;
      problems += fmt::format("{}{}/{} ({})", problems.empty() ? "" : "; ", k, plan_->shards, check.detail);
      if (check.state != "running" && check.state != "refused") list += (list.empty() ? "" : ",") + std::to_string(k);
      newer = newer || check.state == "refused";
      ++missing;
    }
    if (problems.empty()) return true;
    // A shard a newer kalends ran: running it again with this one is refused too.
    if (list.empty() && newer) {
      report_.error = fmt::format("finalize refused: {} of {} shards not done: {}; finalize with that kalends, or "
                                  "remove the shard's .kalends/state.sqlite and run it again with this one",
                                  missing, plan_->shards, problems);
      return false;
    }
    report_.error =
        list.empty()
            ? fmt::format("finalize refused: {} of {} shards not done: {}; wait for them to end, then --finalize",
                          missing, plan_->shards, problems)
            : fmt::format("finalize refused: {} of {} shards not done: {}; run them again (sbatch --array={} ..., "
                          "or kalends run {}{} --shard K{}), then --finalize",
                          missing, plan_->shards, problems, list, options_.job_file, out_option(),
                          options_.skip_bad ? " --skip-bad" : "");
    return false;
  }

  // The notes each shard's step left: one line where every shard said the same, else each
  // shard's own, named.
  std::vector<std::string> shard_notes(const std::vector<detail::ShardPart>& parts) const {
    std::vector<std::vector<std::string>> by_shard;
    for (const detail::ShardPart& part : parts) {
      std::ifstream in(fs::path(part.folder) / shard_notes_file);
      std::vector<std::string> lines;
      for (std::string line; std::getline(in, line);)
        if (!line.empty()) lines.push_back(line);
      by_shard.push_back(std::move(lines));
    }
    std::vector<std::string> notes;
    std::set<std::string> shown;
    for (std::size_t k = 0; k < by_shard.size(); ++k)
      for (const std::string& line : by_shard[k]) {
        const bool everywhere = std::all_of(by_shard.begin(), by_shard.end(), [&](const std::vector<std::string>& other) {
          return std::find(other.begin(), other.end(), line) != other.end();
        });
        if (!everywhere) notes.push_back(fmt::format("shard {}/{}: {}", k + 1, by_shard.size(), line));
        // The same words from every shard: once, but a count in them is each shard's, not the
        // whole area's ("16384 of the 16384 pixels" of one strip of three had read as the total).
        else if (shown.insert(line).second)
          notes.push_back(by_shard.size() > 1 && std::any_of(line.begin(), line.end(), [](char c) { return c >= '0' && c <= '9'; })
                              ? fmt::format("each of the {} shards: {}", by_shard.size(), line)
                              : line);
      }
    return notes;
  }

  // A split step in --finalize: the shards' strips stitched into the step's folder.
  void stitch_step(const JobStep& step, const detail::PlannedStep& planned, StepReport& report) {
    const std::string fingerprint = fingerprint_of(step);
    const auto record = db_->step(step.id);
    const bool complete = record && outputs_exist(*record, out_);
    if (record && record->status == "done" && record->fingerprint == fingerprint && complete) {
      report.action = StepReport::Action::up_to_date;
      report.reason = "up to date";
      return;
    }
    report.reason = fmt::format("stitching {} shard{}", plan_->shards, plan_->shards == 1 ? "" : "s");
    if (options_.dry_run) {
      report.action = StepReport::Action::would_run;
      return;
    }
    if (events_.step_started) events_.step_started(step.id, step.kind, report.reason);
    const auto started = std::chrono::steady_clock::now();
    const std::string folder = step_folder(out_, step.id);
    remove_partials(folder);
    std::vector<detail::ShardPart> parts;
    for (int k = 1; k <= plan_->shards; ++k)
      parts.push_back({step_folder(plan_->shard_folder(k), step.id), plan_->shard_folder(k), plan_->window(planned.root, k)});
    const Grid& grid = plan_->grids.at(planned.root);
    const detail::StitchOutcome outcome =
        detail::stitch_parts(parts, grid.width, grid.height, folder, out_, *detail::find_step_kind(step.kind),
                             options_.threads > 0 ? options_.threads : job_.threads, cli_memory());
    report.outputs_written = outcome.written;
    report.outputs_unchanged = outcome.unchanged;
    report.notes = shard_notes(parts);
    if (outcome.removed > 0)
      report.notes.push_back(fmt::format("removed {} stitched file(s) that no shard makes any more", outcome.removed));
    if (const char* caution = detail::find_step_kind(step.kind)->caution) report.caution = caution;
    report.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
    report.action = StepReport::Action::ran;
    db_->step_done({step.id, step.kind, fingerprint, "done", "", "", report.seconds, detail::files_below(folder),
                    inputs_of(step), parameters_described(step)});
  }

  // Fingerprints: "<parameters>:<what it reads>", so a change can be explained. A shard's
  // include its rows, so that a new plan makes them stale.
  std::string fingerprint_of(const JobStep& step) {
    if (auto it = fingerprints_.find(step.id); it != fingerprints_.end()) return it->second;
    const std::string fp = fingerprint_with(step, [this](const std::string& name) { return source_fingerprint(name); });
    fingerprints_[step.id] = fp;
    return fp;
  }

  // Whether the step was up to date when this run began: its record against what the earlier
  // steps had then recorded (before this run redid any of them). Only then may it redo just
  // the years those steps redo now; after a run stopped between them it must redo them all.
  bool current_at_start(const JobStep& step, const detail::StepRecord& record) {
    bool known = true;
    const std::string then = fingerprint_with(step, [&](const std::string& name) -> std::string {
      if (job_.inputs.count(name)) return source_fingerprint(name);
      const auto it = recorded_at_start_.find(name);
      if (it == recorded_at_start_.end()) known = false;
      return it == recorded_at_start_.end() ? std::string() : it->second;
    });
    return known && then == record.fingerprint;
  }

  template <class Upstream>
  std::string fingerprint_with(const JobStep& step, Upstream upstream) {
    std::string params = std::string(KALENDS_VERSION) + "|" + step.kind;
    for (const auto& [k, v] : step.options) params += "|" + k + "=" + v;
    if (shard_) {
      const detail::PlannedStep* planned = plan_->step(step.id);
      const Window w = plan_->window(planned->root, shard_);
      params += fmt::format("|shard {}/{} of {}: rows {}-{}", shard_, plan_->shards, planned->root, w.y, w.y + w.height);
    }
    std::string reads;
    for (const std::string& name : step.inputs) reads += "|" + name + "=" + upstream(name);
    // Files named by path keys (a zones raster, survey points) are read too: their content counts.
    if (const detail::StepKind* kind = detail::find_step_kind(step.kind))
      for (const detail::StepKey& key : kind->keys)
        if (key.role == detail::StepKey::Role::path && step.options.count(key.name)) {
          const std::string& file = step.options.at(key.name);
          std::error_code ec;
          if (std::filesystem::is_regular_file(file, ec))
            reads += "|" + std::string(key.name) + "=" + checksum_of(file, db_.get(), scan_);
        }
    return detail::text_checksum(params) + ":" + detail::text_checksum(reads);
  }

  // The parameters as "key<TAB>value" lines, kept beside the fingerprint to say which changed:
  // the program version, the step's keys, and the rules of the job inputs it reads.
  std::string parameters_described(const JobStep& step) {
    std::string text = std::string("program version\t") + KALENDS_VERSION + "\n";
    for (const auto& [k, v] : step.options) text += k + "\t" + v + "\n";
    for (const std::string& name : step.inputs)
      if (auto in = job_.inputs.find(name); in != job_.inputs.end()) {
        const JobInput& input = in->second;
        const std::string key = "inputs." + name + ".";
        text += key + "stack\t" + input.stack + "\n" + key + "qa\t" + input.qa + "\n" + key + "keep\t" + input.keep + "\n";
        const std::pair<const char*, std::optional<double>> numbers[] = {
            {"scale", input.scale}, {"offset", input.offset}, {"nodata", input.nodata},
            {"valid_range minimum", input.valid_min}, {"valid_range maximum", input.valid_max}};
        for (const auto& [what, v] : numbers) text += key + what + "\t" + (v ? fmt::format("{:g}", *v) : "") + "\n";
        text += key + "band\t" + std::to_string(input.band) + "\n" + key + "qa_band\t" + std::to_string(input.qa_band) + "\n";
      }
    return text;
  }

  std::string source_fingerprint(const std::string& name) {
    if (auto in = job_.inputs.find(name); in != job_.inputs.end()) {
      const JobInput& input = in->second;
      std::string text = input.stack + "|" + input.qa + "|" + input.keep;
      for (const auto& v : {input.scale, input.offset, input.nodata, input.valid_min, input.valid_max})
        text += "|" + (v ? fmt::format("{:.17g}", *v) : std::string("-"));
      text += "|" + std::to_string(input.band);
      if (input.qa_band != 1) text += "|qa band " + std::to_string(input.qa_band);  // older states stay valid
      for (const bool is_qa : {false, true}) {
        const std::string& pattern = is_qa ? input.qa : input.stack;
        if (pattern.empty()) continue;
        const auto files = files_of(pattern);
        if (files.empty()) {
          // The reason, as the commands give it: no match, a missing folder, one not readable;
          // and the job file's line, where a job has several inputs.
          const std::string line = fmt::format(" ({}:{}, [inputs.{}] {})", options_.job_file,
                                               is_qa ? input.qa_line : input.stack_line, name, is_qa ? "qa" : "stack");
          try {
            const auto connection = detail::connection_pattern(pattern);
            detail::expand_glob(connection ? connection->files : pattern);
          } catch (const InputError& e) {
            throw InputError(e.where(), e.reason() + line);
          }
          throw InputError(pattern, "no file matches this pattern" + line);
        }
        for (const std::string& f : files) {
          if (std::find(excluded_.begin(), excluded_.end(), f) != excluded_.end()) continue;
          std::string sum;
          try {
            sum = checksum_of(f, db_.get(), scan_);
          } catch (const InputError& e) {
            // A file it cannot read (no permission): with --skip-bad left out as a damaged one
            // is (it had stopped the step), named with the reason.
            if (!options_.skip_bad || e.where() != f) throw;
            excluded_.push_back(f);
            report_.skipped_inputs.push_back(f + ": " + e.reason());
            fingerprints_.clear();
            // Its size and time, so that `status` and the next runs know it unchanged (a
            // damaged file has them with its checksum; this one has no checksum to give).
            struct stat st {};
            if (::stat(f.c_str(), &st) == 0) scan_.records.push_back({f, std::int64_t(st.st_size), mtime_ns(st), ""});
            continue;
          }
          text += "|" + f + "=" + sum;
        }
      }
      return detail::text_checksum(text);
    }
    for (const JobStep& s : job_.steps)
      if (s.id == name) return fingerprint_of(s);
    throw UsageError(options_.job_file, "unknown input '" + name + "'");
  }

  // The files a step reads directly from the job's inputs, with their checksums.
  std::map<std::string, std::string> inputs_of(const JobStep& step) {
    std::map<std::string, std::string> files;
    for (const std::string& name : step.inputs) {
      const auto in = job_.inputs.find(name);
      if (in == job_.inputs.end()) continue;
      for (const std::string& pattern : {in->second.stack, in->second.qa}) {
        if (pattern.empty()) continue;
        for (const std::string& f : files_of(pattern))
          if (std::find(excluded_.begin(), excluded_.end(), f) == excluded_.end())
            files[f] = checksum_of(f, db_.get(), scan_);
      }
    }
    return files;
  }

  // With a reach, the years that the files added, changed or removed since the last run reach,
  // within the years of the files before and now; nothing when that cannot be told (a file
  // without a date in its name, a multi-band file).
  std::optional<std::vector<int>> years_reached(const std::set<std::string>& changed, double reach,
                                                const std::map<std::string, std::string>& before,
                                                const std::map<std::string, std::string>& now) const {
    int first = std::numeric_limits<int>::max(), last = std::numeric_limits<int>::min();
    for (const auto* files : {&before, &now})
      for (const auto& [f, sum] : *files)
        if (const auto date = date_from_name(f)) {
          first = std::min(first, date->date().year);
          last = std::max(last, date->date().year);
        }
    std::set<int> years;
    for (const std::string& f : changed) {
      const auto date = date_from_name(f);
      if (!date) return std::nullopt;
      for (int year : kalends::years_reached(date->days(), reach))
        if (year >= first && year <= last) years.insert(year);
    }
    // A composite also moves the time grid other years are filled on: past the last date (or
    // before the first) new empty slots enter the slices that reach that far, and a new step or
    // a date pushed to the next slot moves slots. Each year whose slice, the days of its
    // slots, is not the same on the grid before and now is redone too.
    auto slices = [&](const std::map<std::string, std::string>& files) {
      std::set<TimePoint> dates;
      for (const auto& [f, sum] : files)
        if (const auto date = date_from_name(f)) dates.insert(*date);
      const TimeGrid grid = TimeGrid::build(std::vector<TimePoint>(dates.begin(), dates.end()));
      std::map<int, std::vector<double>> by_year;
      const double start = grid.start.seconds / 86400.0;
      for (int year = first; year <= last; ++year)
        for (int slot = 0; slot < grid.size; ++slot)
          if (const double day = start + grid.slot_days[slot]; in_year_slice(year, day, reach))
            by_year[year].push_back(day);
      return by_year;
    };
    const auto slices_before = slices(before), slices_now = slices(now);
    for (int year = first; year <= last; ++year) {
      const auto a = slices_before.find(year), b = slices_now.find(year);
      const bool had = a != slices_before.end(), has = b != slices_now.end();
      if (had != has || (had && a->second != b->second)) years.insert(year);
    }
    if (years.empty()) return std::nullopt;
    return std::vector<int>(years.begin(), years.end());
  }

  // Why a step with a record is stale: its parameters, or what it reads. The file counts are
  // the step's own inputs' (not the whole job's), from the checksums its last run recorded.
  std::string why_changed(const detail::StepRecord& record, const JobStep& step, const std::string& now) {
    const std::string& before = record.fingerprint;
    if (before.empty()) return "failed last time";
    const bool params = before.substr(0, 16) != now.substr(0, 16);
    const bool reads = before.substr(17) != now.substr(17);
    // Which parameters, where the last run kept them: "lambda 10 -> 20; every 1M -> 16d" (a job
    // input's rules among them: inputs.ndvi.keep).
    std::string why = changed_parameters(record.parameters, parameters_described(step));
    if (why.empty() && params) why = "parameters or program version changed";
    if (reads) {
      std::string what;
      if (!record.inputs.empty()) {
        const std::map<std::string, std::string> files = inputs_of(step);
        int added = 0, changed = 0, removed = 0;
        for (const auto& [f, sum] : files)
          if (auto it = record.inputs.find(f); it == record.inputs.end()) ++added;
          else if (it->second != sum) ++changed;
        for (const auto& [f, sum] : record.inputs) removed += files.count(f) == 0;
        if (added || changed || removed)
          what = fmt::format("its inputs changed ({} new, {} changed{} files)", added, changed,
                             removed ? fmt::format(", {} removed", removed) : "");
      }
      // Files unchanged and a rule named: the rule is the change.
      if (what.empty() && why.find("inputs.") == std::string::npos) what = "its inputs changed";
      if (!what.empty()) why += (why.empty() ? "" : "; ") + what;
    }
    return why.empty() ? "outputs missing" : why;
  }

  detail::ResolvedInput resolve(const std::string& name) {
    if (auto in = job_.inputs.find(name); in != job_.inputs.end()) return resolve_job_input(in->second, excluded_);
    // An earlier step's folder; a tiled fill is read through its mosaic: one VRT per date.
    detail::ResolvedInput r;
    std::string folder = step_folder(base_, name);
    for (const JobStep& s : job_.steps)
      if (s.id == name && s.options.count("tiles")) folder = (fs::path(folder) / "mosaic").string();
    r.folder = folder;
    // The folder as a literal ('proj [2023]/out/fill' had read 'proj 2/out/fill').
    r.pattern = (fs::path(detail::glob_escape(folder)) / (folder.ends_with("mosaic") ? "*.vrt" : "*.tif")).string();
    if (fs::exists(fs::path(folder) / "qa")) r.qa = (fs::path(detail::glob_escape(folder)) / "qa" / "qa_*").string();
    // An index step passes its red input's QA through, one band per date: its rule comes along,
    // so that the fill reading it need not say it again (it had to, or stopped for want of it).
    for (const JobStep& s : job_.steps)
      if (s.id == name && s.kind == "index")
        if (const auto red = s.options.find("red"); red != s.options.end())
          if (const auto in = job_.inputs.find(red->second); in != job_.inputs.end()) r.keep = in->second.keep;
    r.rules.exclude = excluded_;
    return r;
  }

  bool up_to_date(const JobStep& step) {
    const auto record = db_->step(step.id);
    return record && record->status == "done" && record->fingerprint == fingerprint_of(step) && outputs_exist(*record, out_);
  }

  void run_step(const JobStep& step, StepReport& report) {
    const std::string fingerprint = fingerprint_of(step);
    const auto record = db_->step(step.id);
    const bool complete = record && outputs_exist(*record, out_);
    if (record && record->status == "done" && record->fingerprint == fingerprint && complete) {
      report.action = StepReport::Action::up_to_date;
      report.reason = "up to date";
      years_redone_[step.id] = std::vector<int>{};
      return;
    }
    report.reason = !record                       ? "never run"
                    : record->status == "failed"  ? "failed last time"
                    : record->status == "running" ? "stopped while running last time"
                    : !complete                   ? outputs_missing(*record, out_)
                                                  : why_changed(*record, step, fingerprint);
    if (options_.dry_run) {
      report.action = StepReport::Action::would_run;
      return;
    }
    only_years_.reset();
    const detail::StepKind* kind = detail::find_step_kind(step.kind);
    const double reach =
        kind && kind->years_by_reach && step.options.count("reach") ? std::stod(step.options.at("reach")) : 0;
    // A rerun with the same parameters after a complete run may redo only part of the step.
    const bool same_parameters = record && record->status == "done" && complete &&
                                 record->fingerprint.substr(0, 16) == fingerprint.substr(0, 16);
    const bool tiled = step.options.count("tiles") != 0;
    const bool compared = same_parameters && !record->inputs.empty() && (reach > 0 || tiled);
    std::map<std::string, std::string> now;
    std::set<std::string> changed;
    if (compared) {
      now = inputs_of(step);
      changed = changed_files(record->inputs, now);
    }
    if (reach > 0 && compared) {
      const std::optional<DateMarks> calendar =
          step.options.count("every")
              ? std::optional<DateMarks>(parse_date_marks(step.options.count("date_marks") ? step.options.at("date_marks")
                                                                                           : "auto"))
              : std::nullopt;
      // A calendar's periods, in every year, depend on the stack's season (the days of the
      // year some composite stands for): a composite that moves it changes every year's
      // calendar (only its own year had been redone).
      auto season = [&](const std::map<std::string, std::string>& files) {
        std::set<TimePoint> dates;
        for (const auto& [f, sum] : files)
          if (const auto date = date_from_name(f)) dates.insert(*date);
        const std::vector<TimePoint> times(dates.begin(), dates.end());
        return detail::season_label(TimeGrid::build(times), resolve_date_marks(*calendar, times));
      };
      if (calendar && season(record->inputs) != season(now)) {
        report.reason += "; recomputing every year: the days of the year the composites stand for changed, and "
                         "with them every year's calendar";
      } else {
        only_years_ = years_reached(changed, reach, record->inputs, now);
        if (only_years_)
          report.reason += fmt::format("; recomputing the years it reaches: {}", fmt::join(*only_years_, ", "));
      }
    }
    only_tiles_.reset();
    if (tiled && compared) {
      // A tile set: only the tiles whose files changed (the fill adds the neighbours its halo
      // reaches) - unless the set of dates changed, which changes every tile's time grid.
      std::set<std::string> tiles, dates_before, dates_now;
      for (const auto& [f, sum] : record->inputs)
        if (const auto d = date_from_name(f)) dates_before.insert(d->label());
      for (const auto& [f, sum] : now)
        if (const auto d = date_from_name(f)) dates_now.insert(d->label());
      bool known = dates_before == dates_now;
      for (const std::string& f : changed) {
        const std::string tile = tile_name_in(f, step.options.at("tiles"));
        if (tile.empty()) known = false;
        tiles.insert(tile);
      }
      if (known && !tiles.empty()) {
        only_tiles_ = std::vector<std::string>(tiles.begin(), tiles.end());
        report.reason += fmt::format("; tiles with new data: {}", fmt::join(*only_tiles_, ", "));
      }
    }
    if (kind && kind->years_from_inputs && same_parameters && current_at_start(step, *record)) {
      // Only earlier steps that redid some years: those years, and the next (its first period
      // may take a composite from the end of a redone year).
      std::set<int> years;
      bool known = true;
      for (const std::string& name : step.inputs) {
        const auto it = years_redone_.find(name);
        if (it == years_redone_.end() || !it->second) {
          known = false;
          break;
        }
        for (int y : *it->second) years.insert({y, y + 1});
        // The year before a redone one reads it too where a year's layers read their neighbours
        // (seasons' cycle layers; they had been left as they were).
        if (kind->years_read_beside)
          for (int y : *it->second) years.insert(y - 1);
      }
      if (known && !years.empty()) {
        // The year after the last one with data has nothing to redo.
        int last = std::numeric_limits<int>::min();
        for (const std::string& name : step.inputs)
          for (const std::string& f : detail::files_below(step_folder(base_, name)))
            if (const auto date = date_from_name(f)) last = std::max(last, date->date().year);
        years.erase(years.upper_bound(last), years.end());
        // A step limited to some years ('years' of seasons and suitability) redoes only those;
        // the message had named the others too.
        if (const auto limit = step.options.find("years"); limit != step.options.end()) {
          const auto [first, final] = parse_years(limit->second);
          years.erase(years.begin(), years.lower_bound(first));
          years.erase(years.upper_bound(final), years.end());
        }
        if (!years.empty()) {
          only_years_ = std::vector<int>(years.begin(), years.end());
          report.reason += fmt::format("; redoing the year layers of {} and the synoptic layers",
                                       fmt::join(*only_years_, ", "));
        }
      }
    }
    // The input files as this run found them, before the step reads them: recorded as what it
    // read, so that a composite arriving (or withdrawn) while it runs is new (or removed) to the
    // next run. Listed at the end, it had been taken for read, and its years never redone.
    const std::map<std::string, std::string> inputs_at_start = compared ? now : inputs_of(step);
    if (events_.step_started) events_.step_started(step.id, step.kind, report.reason);
    const auto started = std::chrono::steady_clock::now();
    const auto earlier = db_->step(step.id);
    db_->step_running(step.id, step.kind);
    const std::string folder = step_folder(base_, step.id);
    remove_partials(folder);
    // With --skip-bad, a bad input file is left out and the step tried again.
    // A failed step's time is reported too (the JSON log's step_finished had said 0).
    struct Timer {
      StepReport& report;
      std::chrono::steady_clock::time_point started;
      ~Timer() { report.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count(); }
    } timer{report, started};
    std::optional<std::vector<std::string>> rasters;
    written_elsewhere_.clear();
    for (int attempt = 0;; ++attempt) {
      try {
        rasters = execute(step, folder, report);
        break;
      } catch (const InputError& e) {
        if (!options_.skip_bad || attempt > 1000 || e.where().empty() || !fs::is_regular_file(e.where()) ||
            std::find(excluded_.begin(), excluded_.end(), e.where()) != excluded_.end())
          throw;
        // A file rewritten since the run listed it is on its way, not damaged: left out, its old
        // outputs had stayed (its years not redone) and the file was recorded as bad.
        if (changed_since_scan(e.where()))
          throw InputError(e.where(), "changed while this run read it (a delivery in progress?), so it was not left "
                                      "out as damaged; nothing of this step was written: run again when it is complete");
        excluded_.push_back(e.where());
        report_.skipped_inputs.push_back(e.where() + ": " + e.reason());
        fingerprints_.clear();
      }
    }
    if (rasters && earlier && !only_years_ && !only_tiles_)
      report.outputs_removed += remove_rasters_no_longer_made(step, folder, earlier->outputs, *rasters);
    report.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
    report.action = StepReport::Action::ran;
    years_redone_[step.id] = only_years_;
    std::map<std::string, std::string> inputs_read = inputs_at_start;
    for (const std::string& left_out : excluded_) inputs_read.erase(left_out);
    std::vector<std::string> outputs = detail::files_below(folder);
    outputs.insert(outputs.end(), written_elsewhere_.begin(), written_elsewhere_.end());
    detail::StepRecord done{step.id, step.kind, fingerprint_of(step), "done", "", "", report.seconds, outputs,
                            inputs_read, parameters_described(step)};
    db_->step_done(done);
  }

  // Whether `path` changed (size, or modification or status-change time) since this run listed
  // and checksummed it.
  bool changed_since_scan(const std::string& path) const {
    for (const detail::InputRecord& record : scan_.records)
      if (record.path == path) return !unchanged_since(path, record);
    return false;
  }

  // Two job files writing one output folder take each other's steps as their own: `status` of
  // one lists only its steps, and steps of one id rewrite each other's outputs, night after
  // night. Said, not refused: a job file moved or renamed is the same job (its old path is
  // gone), and a copy with the same text does the same.
  void note_another_job_file() {
    std::error_code ec;
    const std::string mine = fs::weakly_canonical(fs::absolute(options_.job_file, ec), ec).string();
    const std::string last = db_->last_job_file();
    auto text_of = [](const std::string& path) {
      std::ifstream in(path, std::ios::binary);
      return std::string((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    };
    if (!last.empty() && last != mine && fs::is_regular_file(last, ec) && text_of(last) != text_of(mine))
      report_.notes.push_back(fmt::format(
          "this output folder was last run by another job file, {}: two job files sharing one output folder take "
          "each other's steps as their own (status lists only its own; steps of one id rewrite each other's "
          "outputs); give each job its own 'out'",
          last));
    if (!options_.dry_run && last != mine) db_->remember_job_file(mine);
  }

  // Run whole, the step's earlier rasters that it no longer makes (the files of its old name
  // after 'name' or 'index' changed) go, or later steps read them with the new ones as one stack
  // ("duplicate date"), or as current. Only rasters this step wrote, as their metadata says, in
  // its folder or a subfolder it writes into now (its calendar): a raster of the user's kept
  // there (a mask, a backup in a subfolder, a copy such as calendar-1M.bak) is recorded among
  // the folder's files too, and had been removed. Returns how many went.
  static int remove_rasters_no_longer_made(const JobStep& step, const std::string& folder,
                                           const std::vector<std::string>& earlier,
                                           const std::vector<std::string>& rasters) {
    std::set<std::string> made, made_in;
    for (const std::string& path : rasters) {
      made.insert(fs::path(path).lexically_normal().string());
      made_in.insert(fs::path(path).lexically_normal().parent_path().string());
    }
    const fs::path own = fs::path(folder).lexically_normal();
    int removed = 0;
    for (const std::string& path : earlier) {
      const fs::path file = fs::path(path).lexically_normal();
      const fs::path parent = file.parent_path();
      const bool placed = parent == own || (parent.parent_path() == own && made_in.count(parent.string()));
      std::error_code ec;
      if (!placed || file.extension() != ".tif" || made.count(file.string()) || !fs::is_regular_file(file, ec))
        continue;
      const auto metadata = detail::raster_metadata(file.string());
      const auto command = metadata.find("KALENDS_COMMAND");
      if (!metadata.count("KALENDS_VERSION") || command == metadata.end() ||
          !command->second.ends_with(written_by_step(step.id)))
        continue;
      if (fs::remove(file, ec)) ++removed;
    }
    return removed;
  }

  // What every step's work is given: its keys, the job file, its folder, the job's output folder,
  // and the inputs and earlier steps it reads by name.
  detail::StepContext context_for(const JobStep& step, const std::string& folder) {
    detail::StepContext context{step.options};
    context.job_path = job_.path;
    context.folder = folder;
    context.out = out_;
    // The same folder by another spelling (a symbolic link, a mount) shares the job's state: its
    // page stays where the job says (a link to the job's own folder had moved it, "done").
    std::error_code ec;
    if (!options_.out_dir.empty() && !job_.out.empty() &&
        fs::weakly_canonical(job_.out, ec).lexically_normal() != fs::weakly_canonical(out_, ec).lexically_normal())
      context.replaced_out = job_.out;
    context.resolve = [this](const std::string& name) { return resolve(name); };
    return context;
  }

  std::optional<std::vector<std::string>> execute(const JobStep& step, const std::string& folder, StepReport& report) {
    const detail::StepKind* kind = detail::find_step_kind(step.kind);
    if (!kind) throw UsageError(job_.path, "unknown step '" + step.kind + "'");
    detail::StepContext context = context_for(step, folder);
    context.command_line = "kalends run " + fs::path(job_.path).filename().string() + " " + written_by_step(step.id);
    context.memory_bytes = cli_memory();
    context.threads = options_.threads > 0 ? options_.threads : job_.threads;
    if (shard_) {
      const detail::PlannedStep* planned = plan_->step(step.id);
      // An earlier step's strip is already only the shard's rows.
      if (planned->reads_inputs) context.region = plan_->window(planned->root, shard_);
    }
    context.only_years = only_years_;
    context.only_tiles = only_tiles_;
    context.progress = [&](int done, int total) {
      if (events_.progress) events_.progress(step.id, done, total);
    };
    const detail::StepOutcome outcome = kind->run(context);
    written_elsewhere_ = outcome.written_elsewhere;
    report.outputs_written = outcome.outputs_written;
    report.outputs_unchanged = outcome.outputs_unchanged;
    report.outputs_removed = outcome.outputs_removed;
    report.caution = outcome.caution;
    // A step's notes in the job's words, as its errors (the command's advice names options).
    report.notes.clear();
    for (const std::string& note : outcome.notes) report.notes.push_back(job_wording(note, step));
    // A shard keeps its step's notes beside its strip (hidden: not an output), for --finalize
    // to show; the shard's own log is seldom read.
    if (shard_ && fs::is_directory(context.folder)) {
      std::string text;
      for (const std::string& note : outcome.notes) text += note + "\n";
      detail::write_text_atomically((fs::path(context.folder) / shard_notes_file).string(), text);
    }
    return outcome.rasters;
  }

  std::int64_t cli_memory() const;

  RunOptions options_;
  RunEvents events_;
  Job job_;
  std::string out_, memory_;
  std::string base_;  // where step folders and the state lie: out_, or a shard's folder
  std::optional<detail::ShardPlan> plan_;
  int shard_ = 0;  // the shard whose fingerprints and folders are meant; 0: the whole job
  std::unique_ptr<detail::StateDatabase> db_;
  Scan scan_;
  std::map<std::string, std::string> fingerprints_;
  std::vector<std::string> excluded_;
  std::vector<std::string> written_elsewhere_;  // the last step's files outside its folder
  std::optional<std::vector<int>> only_years_;  // for the step being run
  std::optional<std::vector<std::string>> only_tiles_;  // for a tiled fill being run
  std::map<std::string, std::optional<std::vector<int>>> years_redone_;  // by steps of this run; nullopt: all
  std::map<std::string, std::string> recorded_at_start_;  // each step's fingerprint when last done, as the run began
  RunReport report_;
};

std::int64_t Runner::cli_memory() const { return parse_memory_size(memory_); }

}  // namespace

RunReport run_job(const RunOptions& options, const RunEvents& events) {
  Runner runner(options, events);
  return runner.run();
}

PlanReport plan_job(const RunOptions& options, int shards) {
  const Job job = detail::read_job(options.job_file);
  const std::string out = output_folder(options, job);
  if (out.empty()) throw UsageError(options.job_file, "no output folder: set 'out' in [job] or give --out");
  detail::require_state_not_newer((fs::path(out) / ".kalends" / "state.sqlite").string());
  std::vector<std::string> left_out;
  PlanReport report;
  const detail::ShardPlan plan =
      detail::make_shard_plan(job, out, shards, options.threads, &left_out, options.skip_bad ? &report.skipped_inputs : nullptr);
  // A budget too small for one block of a split step (its first shard's rows), or of a step
  // left whole for --finalize (a tile set's fill): found here, not by every array task nor at
  // the finalize after them.
  std::map<std::string, InputError> bad_inputs;
  if (const auto refused = check_budgets(job, plan.shard_folder(1), parse_memory_size(job.memory), plan.threads,
                                         left_out, [&](const JobStep& step, std::optional<Window>& region) {
                                           const detail::PlannedStep* planned = plan.step(step.id);
                                           if (!planned) return false;
                                           if (planned->split) region = plan.window(planned->root, 1);
                                           return true;
                                         }, &bad_inputs);
      !refused.empty())
    throw refused.front().second;
  // A composite a step cannot use (no QA file for its date): every shard would fail on it, as
  // `run --dry-run` says; --skip-bad plans without it (the plan had been written, and each
  // array task failed).
  if (!options.skip_bad)
    for (const JobStep& step : job.steps)  // the first in the job's order
      if (const auto bad = bad_inputs.find(step.id); bad != bad_inputs.end())
        throw InputError(bad->second.where(), bad->second.reason() +
                                                  fmt::format(" (step '{}'; give --skip-bad to plan without it)", step.id));
  std::error_code ec;
  fs::create_directories(fs::path(out) / ".kalends", ec);
  if (ec) throw OutputError(out, "cannot create: " + ec.message());
  // Not under a run of the folder (a --finalize reads the plan as it goes).
  const FolderLock lock((fs::path(out) / ".kalends").string(), options.wait_for_lock);
  detail::write_text_atomically(plan.file(), plan.text());
  report.plan_file = plan.file();
  report.out_dir = out;
  report.shards = plan.shards;
  report.threads = plan.threads;
  report.memory_mib = (plan.memory_bytes + 1048575) / 1048576;
  for (const detail::PlannedStep& s : plan.steps)
    if (s.split) report.split_steps.push_back(s.id);
    else report.whole_steps.emplace_back(s.id, s.why_whole);
  for (int k = 1; k <= plan.shards; ++k) {
    std::map<std::pair<int, int>, std::string> rows;  // the same rows of several inputs, said once
    for (const auto& [root, grid] : plan.grids) {
      const Window w = plan.window(root, k);
      std::string& roots = rows[{w.y, w.y + w.height}];
      roots += (roots.empty() ? "" : ", ") + root;
    }
    std::string text;
    for (const auto& [range, roots] : rows)
      text += fmt::format("{}rows {}-{} of {}", text.empty() ? "" : "; ", range.first, range.second - 1, roots);
    report.shard_rows.push_back(fmt::format("{}: {}", k, text));
  }
  std::string name;
  for (char c : job.name.empty() ? fs::path(job.path).stem().string() : job.name)
    name += std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '_' ? c : '-';
  // This program, which the array tasks run too (KALENDS_BIN), and the script it names.
  const fs::path self = fs::read_symlink("/proc/self/exe", ec);
  report.program = self.empty() ? "kalends" : self.string();
  const std::string sbatch_template = cluster_template(self);
  // A program outside the tree it was built from that names that tree's script (a copy with no
  // PREFIX/share/kalends beside it): the nodes may not see it.
  {
    const fs::path tree = fs::path(KALENDS_CLUSTER_TEMPLATE).parent_path().parent_path().parent_path();
    const auto [mismatch, rest] = std::mismatch(tree.begin(), tree.end(), self.begin(), self.end());
    if (sbatch_template == KALENDS_CLUSTER_TEMPLATE && !self.empty() && mismatch != tree.end())
      report.script_note = fmt::format("the array script named is the source tree's ({}), as {} has none at "
                                       "PREFIX/share/kalends/kalends-array.sbatch beside it: every node must see "
                                       "that path",
                                       sbatch_template, self.string());
  }
  report.sbatch = fmt::format("sbatch --array=1-{} --cpus-per-task={} --mem={}M --job-name=kalends-{} {} {}",
                              plan.shards, plan.threads, report.memory_mib, name, detail::shell_word(sbatch_template),
                              detail::shell_word(fs::absolute(job.path).string()));
  if (!options.out_dir.empty()) report.sbatch += " --out " + detail::shell_word(fs::absolute(out).string());
  return report;
}

std::vector<StepStatus> job_status(const RunOptions& options) {
  Runner runner(options, {});
  return runner.status();
}

}  // namespace kalends
