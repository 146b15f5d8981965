// The gap-filling method's options and the value rules, shared by `kalends fill` and
// `kalends validate` (a method is scored with the settings it would fill with).
#include <algorithm>
#include <cstdio>

#include <fmt/format.h>

#include "cli/commands.hpp"
#include "kalends/season.hpp"
#include "kalends/error.hpp"

namespace kalends::cli {

namespace {

// How an auto-or-number option shows its default in --help.
std::string auto_or_number_text(const std::optional<double>& v) {
  return v ? fmt::format("{:g}", *v) : std::string("auto");
}

}  // namespace

std::pair<double, double> parse_range(const std::string& text, const std::string& option) {
  const auto comma = text.find(',');
  try {
    if (comma != std::string::npos) {
      std::size_t a = 0, b = 0;
      const double low = std::stod(text.substr(0, comma), &a);
      const double high = std::stod(text.substr(comma + 1), &b);
      if (a == comma && b == text.size() - comma - 1) return {low, high};
    }
  } catch (const std::exception&) {
  }
  throw UsageError(option + " '" + text + "'", "expected MIN,MAX" + decimal_comma_hint(text));
}

MethodOptionTexts::MethodOptionTexts()
    : lambda(auto_or_number_text(MethodOptions{}.lambda)),
      space_smoothing(auto_or_number_text(MethodOptions{}.spacetime_space_smoothing)),
      time_smoothing(auto_or_number_text(MethodOptions{}.spacetime_time_smoothing)) {}

void add_method_options(CLI::App* sub, MethodOptions& m, MethodOptionTexts& t) {
  sub->add_option("--lambda", t.lambda, "Whittaker smoothing: a number, or auto (GCV per pixel)")
      ->capture_default_str();
  sub->add_option("--lambda-range", t.lambda_range, "MIN,MAX searched by --lambda auto (default 0.01,1e6)");
  sub->add_option("--order", m.order, "Whittaker difference order 1..3")->capture_default_str();
  sub->add_option("--envelope", t.envelope, "upper: reweight toward the upper envelope")
      ->check(CLI::IsMember({"none", "upper"}))
      ->capture_default_str();
  sub->add_flag("--robust", m.robust, "Down-weight outliers on both sides");
  sub->add_option("--iterations", m.iterations, "Reweighting rounds for --envelope/--robust")
      ->capture_default_str();
  sub->add_option("--harmonics", m.harmonics, "Harmonic method: number of harmonics")
      ->capture_default_str();
  sub->add_flag("--trend", m.trend, "Harmonic method: add a linear trend");
  sub->add_option("--reject-below", m.reject_below,
                  "Harmonic method: reject values this many residual sd below the curve")
      ->capture_default_str();
  sub->add_option("--space-smoothing", t.space_smoothing,
                  "Spacetime method: smoothing of the anomaly across pixels: a number, or auto (GCV per block)")
      ->capture_default_str();
  sub->add_option("--time-smoothing", t.time_smoothing,
                  "Spacetime method: smoothing of the anomaly along time: a number, or auto (GCV per block)")
      ->capture_default_str();
  sub->add_option("--climate-smoothing", m.spacetime_climate_smoothing,
                  "Spacetime method: smoothing of the seasonal climatology across pixels")
      ->capture_default_str();
  sub->add_option("--season-smoothing", m.spacetime_season_smoothing,
                  "Spacetime method: smoothing of the climatology across the year")
      ->capture_default_str();
  sub->add_option("--halo", m.spacetime_halo,
                  "Spacetime method: pixels of context around each block; farther pixels are not used")
      ->capture_default_str();
  sub->add_option("--neighbour-radius", m.spacetime_neighbour_radius,
                  "Spacetime method: pixels searched for neighbours whose steady difference predicts "
                  "a gap; 0 = the smooth model alone")
      ->capture_default_str();
  sub->add_option("--tolerance", m.spacetime_tolerance,
                  "Spacetime method: relative residual at which the solver stops (its coarse-grid "
                  "starts: a tenth of it; 1e-5 and coarser: solved in single precision)")
      ->capture_default_str();
  sub->add_option("--fft-wisdom", m.spacetime_fft_wisdom,
                  "Spacetime method: auto = time the transforms once per block shape and keep the "
                  "result in the user cache, FILE = keep it there (and in FILE.single), none = plan "
                  "without timing")
      ->capture_default_str();
  sub->add_option("--max-gap", m.max_gap_days,
                  "Whittaker and harmonic methods: leave gaps between observations longer than this many "
                  "days unfilled; 0 = no limit")
      ->capture_default_str();
  sub->add_option("--max-extrapolation", m.max_extrapolation_days,
                  "Whittaker and harmonic methods: fill at most this many days before the first or after "
                  "the last observation; -1 = no limit")
      ->capture_default_str();
  sub->add_option("--never-observed", t.never_observed,
                  "Pixels with no observation on any date: fill (spacetime fills them from their "
                  "neighbours) or leave (empty, flag 3: sea, lakes, outside a boundary)")
      ->check(CLI::IsMember({"fill", "leave"}))
      ->capture_default_str();
  sub->add_option("--reach", m.reach_days,
                  "Fill each calendar year from the dates within this many days of it (a new date then "
                  "changes only the years it reaches); 0 = the whole series at once")
      ->capture_default_str();
}

void apply_method_options(MethodOptions& m, const MethodOptionTexts& t) {
  m.lambda = number_or_auto(t.lambda, "--lambda");
  m.spacetime_space_smoothing = number_or_auto(t.space_smoothing, "--space-smoothing");
  m.spacetime_time_smoothing = number_or_auto(t.time_smoothing, "--time-smoothing");
  if (!t.lambda_range.empty())
    std::tie(m.lambda_min, m.lambda_max) = parse_range(t.lambda_range, "--lambda-range");
  m.envelope_upper = t.envelope == "upper";
  m.fill_never_observed = t.never_observed == "fill";
}

std::vector<std::string> options_given(const CLI::App& sub) {
  std::vector<std::string> keys;
  for (const CLI::Option* option : sub.get_options())
    if (option->count() > 0 && !option->get_lnames().empty()) {
      std::string key = option->get_lnames().front();
      std::replace(key.begin(), key.end(), '-', '_');
      keys.push_back(key);
    }
  return keys;
}

void add_value_rule_options(CLI::App* sub, ValueRules& rules, ValueRuleTexts& t) {
  sub->add_option("--scale", t.scale, "Override the files' scale factor");
  sub->add_option("--offset", t.offset, "Override the files' offset");
  sub->add_option("--nodata", t.nodata, "Override the files' nodata value");
  sub->add_option("--valid-range", t.valid_range, "MIN,MAX in physical units; outside = missing");
  sub->add_option("--band", rules.band, "Band to read from each single-date file")->capture_default_str();
}

void apply_value_rule_options(ValueRules& rules, const ValueRuleTexts& t) {
  if (!t.scale.empty()) rules.scale = parse_number(t.scale, "--scale");
  if (!t.offset.empty()) rules.offset = parse_number(t.offset, "--offset");
  if (!t.nodata.empty()) rules.nodata = parse_number(t.nodata, "--nodata");
  if (!t.valid_range.empty()) {
    const auto [low, high] = parse_range(t.valid_range, "--valid-range");
    rules.valid_min = low;
    rules.valid_max = high;
  }
}

void note_monthly_marks(const std::string& note, DateMarks marks) {
  if (note.empty() || marks != DateMarks::automatic) return;
  std::fprintf(stderr, "note: %s.\n", note.c_str());
}

}  // namespace kalends::cli
