// Seasonal covariates from a filled stack: synoptic and year-specific layers, anomalies, cycle
// descriptors and where the synoptic cycle misleads.
#pragma once

#include <optional>
#include <string>
#include <tuple>
#include <vector>

#include "kalends/fill.hpp"
#include "kalends/season.hpp"
#include "kalends/stack.hpp"

namespace kalends {

struct SeasonsRequest {
  std::string input;  // a folder of `kalends fill` outputs, a glob, or a multi-band raster
  ValueRules rules;
  std::string out_dir;
  std::string name;  // empty = from the input
  CalendarPeriod period;  // default: calendar months
  std::optional<int> first_year, last_year;
  DateMarks marks = DateMarks::automatic;
  CycleOptions cycle;
  std::int64_t memory_bytes = std::int64_t(1) << 30;
  /// Where one block needs more than memory_bytes, the budget may rise to this (the user gave no
  /// --memory); 0 = refuse instead.
  std::int64_t memory_ceiling = 0;
  int threads = 0;
  Compression compression = Compression::deflate;
  std::string command_line;
  bool keep_unchanged = false;
  /// Compute only this window of the input's pixel grid (a tile, a shard's strip): outputs
  /// cover the window and are georeferenced as it.
  std::optional<Window> region;
  /// Years whose input changed since an earlier run into the same folder: only their
  /// year-specific layers and cycle descriptors (and those of their neighbours, which a cycle
  /// reads) are computed and written; the other years' stay as they are. Synoptic layers and
  /// anomalies, which every year shares, are always redone.
  std::optional<std::vector<int>> only_years;
};

struct SeasonsSummary {
  int outputs_written = 0, outputs_unchanged = 0;
  std::int64_t memory_raised_to = 0;  // the budget used instead of memory_bytes (memory_ceiling); 0 if none
  int outputs_removed = 0;  // an earlier run's year layers of years outside this run's
  int years = 0, periods = 0, files = 0, width = 0, height = 0;
  int first_year = 0, last_year = 0;
  double seconds = 0;
  bool dates_at_month_ends = false;  // see dates_at_month_ends (season.hpp)
  std::string monthly_marks_note;    // see monthly_marks_note (season.hpp); "" where none
  std::vector<std::string> outputs;
  /// Pixels with a synoptic value in some period, and those whose synoptic cycle has
  /// descriptors (a value in every period); the periods (0-based) with no value anywhere.
  std::int64_t pixels_with_values = 0, pixels_with_cycle = 0;
  std::vector<int> periods_without_value;
  std::vector<int> stale_years_removed;  // an earlier run's year layers outside this run's years
  /// Years whose cycle layer is empty at some pixels that have a synoptic cycle, and how many.
  std::vector<std::pair<int, std::int64_t>> years_with_cycle_gaps;
  /// Years whose cycle layer leaves season starts or ends empty (year, pixels with a start
  /// unknown, pixels with an end unknown): the record has no value where they lie.
  std::vector<std::tuple<int, std::int64_t, std::int64_t>> years_with_unknown_edges;
  /// Whether the input is a fill's (a flag band): then the observed_YYYY and
  /// synoptic_observed_years layers say what each value rests on.
  bool from_fill = false;
  /// Year-specific periods that the composites cover only in part (label "2004 month 05",
  /// days covered, days of the period), in order; their means rest on those days alone.
  std::vector<std::tuple<std::string, double, int>> partly_covered;
  /// Years of the range that no composite stands for on any day (a year missing from the
  /// stack): their layers are empty.
  std::vector<int> years_without_composite;
};

/// What a user should know about a seasons run's outputs (cycle layers left empty because
/// periods have no value), one line each; `kalends seasons` and a job's seasons step show them.
std::vector<std::string> seasons_notes(const SeasonsRequest& request, const SeasonsSummary& summary);

/// The names of the cycle descriptor bands, in order.
const std::vector<std::string>& cycle_band_names();

/// The checks that need no input (prominence, threshold); UsageError naming the option.
/// run_seasons calls it first.
void check_seasons_options(const SeasonsRequest& request);

SeasonsSummary run_seasons(const SeasonsRequest& request);

/// The folder-or-glob convention shared by commands that read earlier outputs: a folder means
/// its `*.tif` files.
std::string stack_input(const std::string& input);

}  // namespace kalends
