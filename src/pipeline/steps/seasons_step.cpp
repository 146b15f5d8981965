// Step 'seasons': synoptic and year-specific seasonal layers (kalends seasons).
#include "kalends/fill.hpp"
#include "kalends/seasons.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

// The request a 'seasons' step runs, from its keys; reads no file.
SeasonsRequest seasons_request(const StepContext& c) {
  const ResolvedInput in = c.resolve(c.text("input"));
  SeasonsRequest r;
  r.input = in.pattern;
  r.rules = in.rules;
  r.period = CalendarPeriod::parse(c.text("period", "1M"), "--period");
  if (c.has("years")) std::tie(r.first_year, r.last_year) = parse_years(c.text("years"));
  r.marks = parse_date_marks(c.text("date_marks", "auto"));
  r.cycle.prominence_share = c.number("prominence", r.cycle.prominence_share);
  r.cycle.threshold_share = c.number("threshold", r.cycle.threshold_share);
  r.cycle.min_amplitude = c.number("min_amplitude", r.cycle.min_amplitude);
  take_run_settings(r, c);
  return r;
}

}  // namespace

StepKind seasons_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "seasons";
  kind.splits_by_area = true;
  kind.years_from_inputs = true;
  kind.years_read_beside = true;  // cycle_YYYY's peak search
  kind.keys = {{"input", T::text, StepKey::Role::reads},
               {"period", T::text}, {"years", T::text}, {"date_marks", T::text},
               {"prominence", T::number}, {"threshold", T::number}, {"min_amplitude", T::number}, {"name", T::text},
               {"compress", T::text}};
  kind.check = [](const StepOptions& o) {
    return o.count("input") ? std::string() : std::string("a 'seasons' step needs 'input'");
  };
  kind.check_values = [](const StepContext& c) { check_seasons_options(seasons_request(c)); };
  kind.run = [](const StepContext& c) {
    const SeasonsRequest r = seasons_request(c);
    const SeasonsSummary s = run_seasons(r);
    StepOutcome outcome{s.outputs_written, s.outputs_unchanged, "", seasons_notes(r, s), s.outputs_removed};
    outcome.rasters = s.outputs;
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
