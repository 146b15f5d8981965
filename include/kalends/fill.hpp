// Filling a whole stack: stack -> blocks -> method -> writer.
#pragma once

#include <cstdint>
#include <functional>
#include <map>
#include <optional>
#include <utility>
#include <vector>
#include <string>

#include "kalends/fill_method.hpp"
#include "kalends/stack.hpp"

namespace kalends {

/// A regular calendar for extra outputs: every N days from 1 January, or every calendar month.
/// Every year has as many periods (those of a 365-day year); the last N-day period of a year
/// runs to 31 December (shorter, or in a leap year one day longer where 365 is a multiple of N).
struct CalendarPeriod {
  enum class Kind { days, month } kind = Kind::month;
  int days = 0;
  /// "8d", "16d", "1M"; UsageError naming `option` otherwise.
  static CalendarPeriod parse(const std::string& text, const std::string& option = "--every");
  std::string label() const;
  /// 12, or ceil(365 / N). A period of N days outside 1..366 (a struct filled by hand) is a
  /// UsageError here and in span_of_day.
  int per_year() const;
  /// The period holding `day` (days since 1970): its first day and the first day after it. The
  /// one rule every command's periods follow (fill --every, seasons, suitability, extract).
  std::pair<std::int64_t, std::int64_t> span_of_day(std::int64_t day) const;
};

/// "1G", "512M", "1.5GiB", "2048MB" or plain bytes; UsageError otherwise.
std::int64_t parse_memory_size(const std::string& text);

enum class Compression { deflate, zstd, lzw, none };
Compression parse_compression(const std::string& text);

/// What a date marks in the composite it names: its first day (MODIS), its middle, or its
/// last day (monthly means stamped at the month's end, as CF files often do). `automatic`, the
/// default, is `end` where the dates are the last days of their months (dates_at_month_ends),
/// `middle` where they are their months' middles (dates_at_month_middles) and `start`
/// otherwise; engines resolve it with resolve_date_marks once they know the dates.
enum class DateMarks { start, middle, end, automatic };
DateMarks parse_date_marks(const std::string& text);  // "auto", "start", "middle", "end"; UsageError

struct FillRequest {
  std::string input;
  ValueRules rules;
  std::string qa_input;  // empty = no QA stack
  std::string qa_keep;   // keep rule, required with qa_input
  int qa_band = 1;       // band of each QA file (QA beside the value in one file per date)
  MethodOptions method;
  std::string out_dir;
  std::string name;  // empty = from the input
  bool smooth = false;
  std::optional<CalendarPeriod> every;
  /// For the calendar (`every`): a date's value stands for the middle of its composite, half a
  /// step after a start mark and before an end mark.
  DateMarks marks = DateMarks::automatic;
  std::int64_t memory_bytes = std::int64_t(1) << 30;
  /// Where memory_bytes holds no block, use what one block needs if that is at most this (0:
  /// refuse instead). For a budget the user did not choose; FillSummary says when it was used.
  std::int64_t memory_ceiling = 0;
  /// Only check the options, the input and the memory budget, then return an empty summary:
  /// no folder is made and nothing is written (validate checks every method before it runs the
  /// first; a job run, --dry-run and `kalends plan` check every fill step before the first step).
  bool check_only = false;
  int threads = 0;  // 0 (or less) = all cores
  Compression compression = Compression::deflate;
  std::string command_line;  // recorded in metadata
  bool keep_unchanged = false;  // leave outputs that would not change as they are
  /// Compute only this window of the input's pixel grid (a tile of a mosaic, a shard's strip):
  /// outputs cover the window and are georeferenced as it; halos are read from beyond it.
  std::optional<Window> region;
  /// With method.reach_days > 0: compute and write only the outputs of these years; the rest
  /// stay as an earlier run left them (fill-years.tsv keeps their counts).
  std::optional<std::vector<int>> only_years;
  /// out_dir belongs to this fill alone (a job step's folder): an earlier fill output there of
  /// a date no longer made is removed whatever input made it. Otherwise only outputs that this
  /// input made go (a folder shared by the fills of two stacks keeps the other's).
  bool out_dir_is_its_own = false;
};

struct FillSummary {
  int dates = 0, width = 0, height = 0, blocks = 0;
  int calendar_outputs = 0;
  int calendar_outside_season = 0;  // periods no composite of any year stands for: left empty
  CivilDate first_outside_season{};
  /// In-season periods no composite of their own year stands for (a year or months with no
  /// file at all): their values are the curve across that gap.
  int calendar_without_composite = 0;
  CivilDate first_without_composite{};
  std::int64_t pixel_dates = 0, observed = 0, missing = 0, rejected = 0, filled = 0,
               unfilled = 0;
  std::int64_t pixels_never_observed = 0;
  std::int64_t pixels_without_value = 0;  // flag 3 on every date (nothing within reach)
  bool dates_at_month_ends = false;  // see dates_at_month_ends (season.hpp)
  std::string monthly_marks_note;    // see monthly_marks_note (season.hpp); "" where none
  std::int64_t memory_for_one_block = 0;  // check_only: the smallest budget that holds one block
  /// Pixels (pixel-years with a reach) with observations that the method could not fit, by
  /// the method's reason.
  std::map<std::string, std::int64_t> series_not_fitted;
  double seconds = 0, kernel_seconds = 0;
  std::int64_t block_width = 0, block_height = 0;
  int blocks_at_once = 0;  // fewer than the threads when the budget allows no more
  std::string out_dir;
  int outputs_written = 0, outputs_unchanged = 0;
  int outputs_removed = 0;  // earlier outputs of dates (or a calendar) this fill no longer makes
  std::vector<std::string> outputs;  // every raster this run wrote or left unchanged
  std::string unapplied_scaling;  // see unapplied_scaling (stack.hpp); "" where none
  std::string mixed_value_rules;  // see mixed_value_rules (stack.hpp); "" where none
  std::string date_conflict;      // see date_conflict_note (stack.hpp); "" where none
  std::string mixed_names;        // see mixed_names_note (stack.hpp); "" where none
  std::string time_grid_note;     // a time grid on the smallest spacing (TimeGrid); "" where none
  /// The input of the fill-summary.json this fill replaced, where another input made it.
  std::string replaced_summary_of;
  /// Outputs of another input (the first: another_input) that this fill replaced under its names.
  int outputs_of_another_input = 0;
  std::string another_input;
  std::int64_t memory_raised_to = 0;  // the budget used instead of memory_bytes (memory_ceiling); 0 if none
};

using ProgressCallback = std::function<void(int blocks_done, int blocks_total)>;

/// Runs the fill. Inputs are all checked before anything is written; outputs appear under
/// their final names only when every one of them is complete.
FillSummary run_fill(const FillRequest& request, const ProgressCallback& progress = {});

/// The note on calendar layers in the season where the stack has no composite that year
/// (FillSummary::calendar_without_composite), or "".
std::string calendar_gap_note(const FillSummary& summary);

/// The lines a job's fill step shows about its input (pixels the method could not fit, a
/// scale factor left unapplied); `kalends fill` says the same in its own words.
std::vector<std::string> fill_notes(const FillRequest& request, const FillSummary& summary);

}  // namespace kalends
