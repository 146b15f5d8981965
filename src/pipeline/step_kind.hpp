// The kinds of step a job file can declare. Each kind lives in its own file under steps/ and
// says which keys it accepts and how it runs; the job reader and the runner know nothing else
// of it. Adding a kind is one file and one line in step_registry.cpp.
#pragma once

#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <vector>

#include "kalends/fill.hpp"
#include "kalends/stack.hpp"
#include "pipeline/job_file.hpp"

namespace kalends::detail {

enum class KeyType { text, number, integer, boolean, number_or_auto, pair, texts };

struct StepKey {
  const char* name;
  KeyType type;
  /// reads: names an input or an earlier step; path: a file resolved against the job's folder.
  enum class Role { plain, reads, path } role = Role::plain;
  /// For a reads key: the kind of step it must name (compare reads a seasons step), or nullptr.
  const char* step_kind = nullptr;
};

/// What a step reads from one named input or earlier step.
struct ResolvedInput {
  std::string pattern;   // the stack pattern (an earlier step: its folder's *.tif)
  std::string qa, keep;  // QA stack and rule, where the input has them
  int qa_band = 1;
  std::string folder;    // an earlier step's output folder; empty for a job input
  ValueRules rules;
};

/// Everything a step may use while it runs; it writes only under `folder`.
struct StepContext {
  const StepOptions& options;
  std::string job_path{};
  std::string folder{};        // this step's output folder
  std::string out{};           // the job's output folder
  std::string replaced_out{};  // the job file's own 'out', where --out gave another folder
  std::string command_line{};  // recorded in the outputs' metadata
  std::int64_t memory_bytes = 0;
  int threads = 0;
  std::optional<std::vector<int>> only_years{};  // years to recompute, when the runner knows them
  std::optional<Window> region{};  // compute only this window of the inputs' grid (a shard)
  std::optional<std::vector<std::string>> only_tiles{};  // a tiled fill: tiles whose files changed
  std::function<ResolvedInput(const std::string& name)> resolve{};
  std::function<void(int done, int total)> progress{};

  bool has(const char* key) const { return options.count(key) != 0; }
  std::string text(const char* key, const std::string& fallback = "") const;
  double number(const char* key, double fallback) const;
  /// A number_or_auto key: "auto" is no value (std::nullopt), a number is that number.
  std::optional<double> number_or_auto(const char* key, std::optional<double> fallback) const;
  int integer(const char* key, int fallback) const;
  bool flag(const char* key) const { return text(key) == "true"; }
  std::pair<double, double> pair(const char* key) const;  // "a,b"
  std::vector<std::string> list(const char* key) const;    // a texts key's items
  /// A texts key whose items are numbers; UsageError("--key 'item'") for one that is not.
  std::vector<double> numbers(const char* key) const;
  std::vector<int> integers(const char* key) const;
};

/// What a raster-writing step's request takes from the run rather than from its own keys: its
/// folder, threads and memory, which years and area to compute, the command line recorded in
/// its files; and the two keys every such step has (name, compress).
template <class Request>
void take_run_settings(Request& r, const StepContext& c) {
  r.out_dir = c.folder;
  r.name = c.text("name");
  r.threads = c.threads;
  r.compression = parse_compression(c.text("compress", "deflate"));
  r.command_line = c.command_line;
  r.keep_unchanged = true;  // a rerun leaves identical files untouched
  r.region = c.region;
  if constexpr (requires { r.memory_bytes; }) r.memory_bytes = c.memory_bytes;
  if constexpr (requires { r.only_years; }) r.only_years = c.only_years;
}

struct StepOutcome {
  int outputs_written = 0, outputs_unchanged = 0;
  std::string caution;  // shown with the step's outputs
  std::vector<std::string> notes;  // what the step's command would print about its input data
  int outputs_removed = 0;  // earlier outputs the step no longer makes, removed
  /// Every raster the step made or kept, where it knows them all: after a whole run the runner
  /// removes the step's earlier rasters not among them (a renamed step's old names, which later
  /// steps would read with the new ones as one stack).
  std::optional<std::vector<std::string>> rasters{};
  /// Files the step wrote outside its folder (a report's 'html' elsewhere): recorded with its
  /// outputs, so that a deleted one makes the step stale.
  std::vector<std::string> written_elsewhere{};
};

struct StepKind {
  std::string name;
  std::vector<StepKey> keys;
  /// A job-file mistake the keys alone cannot catch (a required key missing), or "".
  std::function<std::string(const StepOptions&)> check;
  /// Reads every value as `run` would, without reading or writing any file, and throws
  /// UsageError naming the option ("--every '2W'") for one it cannot use. The job reader calls
  /// it with each input resolved to its own name, so that a bad value fails the job file when
  /// it is read (and `--dry-run`), not hours into an unattended run.
  std::function<void(const StepContext&)> check_values;
  /// Reads the small files of the user's that the step depends on (a survey table) and throws
  /// InputError for one it cannot use; nullptr where a kind has none. A run calls it before the
  /// first step, for each step it will run: a failure is that step's alone (the steps reading
  /// it wait, the others run), where a bad row had refused the whole job and `status` with it.
  std::function<void(const StepContext&)> check_files;
  std::function<StepOutcome(const StepContext&)> run;
  /// Opens the step's inputs and throws UsageError("--memory") where the run's budget cannot
  /// hold one block, writing nothing; nullptr where a kind has no such check. A job run,
  /// --dry-run and `kalends plan` call it for every step that reads job inputs alone, before
  /// the first step runs, so that an unattended job or a cluster array fails at once rather
  /// than hours in.
  std::function<void(const StepContext&)> check_memory;
  /// A reminder shown with the step's outputs however they were made (run, or stitched from
  /// shards): suitability's; nullptr for most kinds.
  const char* caution = nullptr;
  /// Whether a new composite reaches only some years (the 'reach' key), so the runner may
  /// recompute those alone.
  bool years_by_reach = false;
  /// Whether the step can redo only the years its input steps redid (seasons: a year's own
  /// layers depend on that year's values alone).
  bool years_from_inputs = false;
  /// Whether a year's layers also read the year before and the year after (seasons' cycle
  /// layers, whose peak search spans them): those are redone with it.
  bool years_read_beside = false;
  /// Whether the step may write outside its folder by design (a report's 'html'): its outputs
  /// all lying outside the output folder then do not mean a copied folder.
  bool writes_outside_folder = false;
  /// Per-pixel work (each output pixel from the same pixel of the inputs, or from a halo the
  /// engine reads itself, on tiles fixed by the grid, so that a strip of whole tile rows gives
  /// what the whole grid gives): a shard of a cluster run may compute its strip alone.
  bool splits_by_area = false;
  /// Merges the shards' copies of one of the step's files other than its rasters (a summary)
  /// into `path`, for a grid of `width` x `height`; false when the file is not one it knows.
  std::function<bool(const std::string& name, const std::vector<std::string>& shard_files,
                     const std::string& path, int width, int height)>
      merge_file;
};

/// Command-line options and the job-file keys that stand for them (engines name the option in
/// their errors), where a key is not simply the option's name: the runner rewrites errors and
/// notes with them, and the job reader names the key when given the option's name.
struct OptionKey {
  const char* option;  // "--day-time"
  const char* key;     // "day_hour"
};
const std::vector<OptionKey>& option_keys();

/// The items of a texts value as the job reader stores it ("a,b,c"); none for "".
std::vector<std::string> split_list(const std::string& text);

/// Whether `path` lies inside `folder` (or is it), both with their links resolved: a folder
/// reached through a symbolic link is the same folder.
bool path_inside(const std::string& path, const std::string& folder);

const std::vector<StepKind>& step_kinds();
const StepKind* find_step_kind(const std::string& name);
std::string step_kind_names();  // "index, fill, ..." for messages

// One function per kind, each in steps/<kind>_step.cpp.
StepKind index_step_kind();
StepKind fill_step_kind();
StepKind seasons_step_kind();
StepKind compare_step_kind();
StepKind suitability_step_kind();
StepKind grid_step_kind();
StepKind extract_step_kind();
StepKind report_step_kind();

}  // namespace kalends::detail
