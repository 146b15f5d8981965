// Each subcommand registers its options on the app and returns the action to run.
#pragma once

#include <CLI/CLI.hpp>
#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "kalends/fill_method.hpp"
#include "kalends/season.hpp"
#include "kalends/stack.hpp"

namespace kalends::cli {

struct GlobalOptions {
  bool quiet = false;
  bool verbose = false;
  std::string command_line;
  int exit_code = 0;  // an action may set it (kalends run: 3 = partly done)
};

using Action = std::function<void()>;

/// For the options that take two numbers, A,B: where the text has more commas than that, the
/// likely cause (a decimal comma, as German or French settings write numbers), else "".
inline std::string decimal_comma_hint(const std::string& text) {
  int commas = 0;
  for (const char c : text) commas += c == ',';
  return commas > 1 ? " (write decimals with a point, 18.5,34.5: the comma separates the two numbers)" : "";
}

/// The `auto` rule of every --date-marks option (season/periods.cpp), for their help texts.
inline constexpr const char* date_marks_auto_help =
    "auto: end where nine in ten dates or more are the last days of their months, middle where they are their "
    "14th to 16th, else start";

/// `kalends fill`.
Action add_fill_command(CLI::App& app, GlobalOptions& global);
/// `kalends index`, `kalends seasons`, `kalends compare`.
Action add_index_command(CLI::App& app, GlobalOptions& global);
Action add_seasons_command(CLI::App& app, GlobalOptions& global);
Action add_compare_command(CLI::App& app, GlobalOptions& global);
/// `kalends inspect`: how a stack is read.
Action add_inspect_command(CLI::App& app, GlobalOptions& global);
/// `kalends validate`.
Action add_validate_command(CLI::App& app, GlobalOptions& global);

/// `kalends plan`: a job split into shards for a cluster.
Action add_plan_command(CLI::App& app, GlobalOptions& global);

/// `kalends diurnal`, `kalends suitability`.
Action add_diurnal_command(CLI::App& app, GlobalOptions& global);
Action add_suitability_command(CLI::App& app, GlobalOptions& global);

/// "1G", "512M", "1.5GiB", "2048MB" or plain bytes; UsageError otherwise.
std::int64_t parse_memory(const std::string& text);

/// The whole of `text` as a number; UsageError naming `option` otherwise. Empty text is no
/// value (std::nullopt), for options that override something only when given.
std::optional<double> optional_number(const std::string& text, const std::string& option);
/// The time of a --date-like option's YYYY-MM-DD; UsageError naming `option` otherwise, which
/// says a well-formed day that does not exist (2000-02-30) is no calendar date.
TimePoint parse_date_option(const std::string& text, const std::string& option);
double parse_number(const std::string& text, const std::string& option);
/// "auto" is no value (std::nullopt); anything else must be a number.
std::optional<double> number_or_auto(const std::string& text, const std::string& option);

/// "a,b,c" as its items; UsageError naming `option` for an empty item ("a,,b", "a,").
std::vector<std::string> split_list(const std::string& text, const std::string& option);
/// "1,2,3" as whole numbers; UsageError naming `option` and the item otherwise.
std::vector<int> parse_whole_numbers(const std::string& text, const std::string& option);
/// The note on standard error when a fill took more than the default --memory (memory_ceiling).
void print_memory_note(std::int64_t default_bytes, std::int64_t used_bytes);

/// "--subset COLUMN,ROW,WIDTH,HEIGHT" (pixels, as gdal_translate -srcwin); nothing when empty.
std::optional<Window> parse_subset(const std::string& text);

/// MIN,MAX; UsageError naming `option` otherwise.
std::pair<double, double> parse_range(const std::string& text, const std::string& option);

/// "12.3 %" of `whole`, or "n/a" when it is 0.
std::string percent(std::int64_t part, std::int64_t whole);

/// A note on stderr where the inputs' dates all fall on month ends but are read as starts:
/// monthly means stamped at their end then stand for the month after.
void note_monthly_marks(const std::string& note, DateMarks marks);

/// The gap-filling method's options (all but --method), shared by fill and validate. The texts
/// hold what is parsed after the command line is read (numbers or "auto", ranges).
struct MethodOptionTexts {
  MethodOptionTexts();
  std::string lambda, space_smoothing, time_smoothing, lambda_range, envelope = "none",
      never_observed = "fill";
};
void add_method_options(CLI::App* sub, MethodOptions& method, MethodOptionTexts& texts);
void apply_method_options(MethodOptions& method, const MethodOptionTexts& texts);
/// The options given on the command line, as job keys ("--lambda-range" -> "lambda_range"),
/// for check_options_apply.
std::vector<std::string> options_given(const CLI::App& sub);

/// --scale, --offset, --nodata, --valid-range and --band.
struct ValueRuleTexts {
  std::string scale, offset, nodata, valid_range;
};
void add_value_rule_options(CLI::App* sub, ValueRules& rules, ValueRuleTexts& texts);
void apply_value_rule_options(ValueRules& rules, const ValueRuleTexts& texts);

/// `kalends grid`.
Action add_grid_command(CLI::App& app, GlobalOptions& global);
std::vector<double> parse_extent(const std::string& text);
/// `kalends extract`, `kalends report`.
Action add_extract_command(CLI::App& app, GlobalOptions& global);
Action add_report_command(CLI::App& app, GlobalOptions& global);

/// `kalends run`, `kalends status`.
Action add_run_command(CLI::App& app, GlobalOptions& global);
Action add_status_command(CLI::App& app, GlobalOptions& global);

}  // namespace kalends::cli
