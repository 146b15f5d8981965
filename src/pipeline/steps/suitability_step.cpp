// Step 'suitability': temperature suitability for malaria transmission (kalends suitability).
#include "kalends/fill.hpp"
#include "kalends/suitability.hpp"
#include "kalends/error.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

// The request a 'suitability' step runs, from its keys; reads no file.
SuitabilityRequest suitability_request(const StepContext& c) {
  SuitabilityRequest r;
  TemperatureInputs& t = r.inputs;
  const char* names[] = {"day", "night", "tmin", "tmax", "temperature"};
  std::string* fields[] = {&t.day, &t.night, &t.tmin, &t.tmax, &t.temperature};
  for (int k = 0; k < 5; ++k)
    if (c.has(names[k])) {
      const ResolvedInput in = c.resolve(c.text(names[k]));
      *fields[k] = in.pattern;
      t.rules = in.rules;
      t.rules_of[names[k]] = in.rules;  // each input read with its own keys
    }
  t.unit = parse_temperature_unit(c.text("units", "auto"));
  t.day_hour = c.number("day_hour", t.day_hour);
  t.night_hour = c.number("night_hour", t.night_hour);
  t.marks = parse_date_marks(c.text("date_marks", "auto"));
  r.model = parse_model_kind(c.text("model", "r0-2013"));
  r.parasite = parse_parasite(c.text("parasite", "falciparum"));
  // As the command: a key of another model would do nothing (it had been taken silently).
  const std::string model = c.text("model", "r0-2013");
  if (c.has("parasite") && model != "degree-day")
    throw UsageError("--parasite", "applies to model = \"degree-day\" only (the model here: " + model + ")");
  if (c.has("window") && model != "window")
    throw UsageError("--window", "applies to model = \"window\" only (the model here: " + model + ")");
  if (c.has("window")) {
    const auto [low, high] = c.pair("window");
    set_window(r, low, high);
  }
  r.parameters_file = c.text("parameters");
  r.period = CalendarPeriod::parse(c.text("period", "1M"), "--period");
  if (c.has("years")) std::tie(r.first_year, r.last_year) = parse_years(c.text("years"));
  r.threshold = c.number("threshold", r.threshold);
  take_run_settings(r, c);
  return r;
}

}  // namespace

StepKind suitability_step_kind() {
  using T = KeyType;
  const auto reads = StepKey::Role::reads;
  StepKind kind;
  kind.name = "suitability";
  kind.splits_by_area = true;
  kind.years_from_inputs = true;
  kind.keys = {{"day", T::text, reads}, {"night", T::text, reads}, {"tmin", T::text, reads},
               {"tmax", T::text, reads}, {"temperature", T::text, reads},
               {"model", T::text}, {"parasite", T::text}, {"window", T::pair}, {"period", T::text},
               {"years", T::text}, {"threshold", T::number}, {"units", T::text},
               {"day_hour", T::number}, {"night_hour", T::number}, {"date_marks", T::text},
               {"parameters", T::text, StepKey::Role::path}, {"name", T::text}, {"compress", T::text}};
  kind.check = [](const StepOptions& o) {
    for (const char* k : {"day", "night", "tmin", "tmax", "temperature"})
      if (o.count(k)) return std::string();
    return std::string("a 'suitability' step needs 'day' and 'night', 'tmin' and 'tmax', or 'temperature'");
  };
  kind.check_values = [](const StepContext& c) { check_suitability_options(suitability_request(c)); };
  kind.caution = suitability_caution;
  kind.run = [](const StepContext& c) {
    const SuitabilityRequest r = suitability_request(c);
    const SuitabilitySummary s = run_suitability(r);
    StepOutcome outcome{s.outputs_written, s.outputs_unchanged, suitability_caution, s.notes, s.outputs_removed};
    outcome.rasters = s.outputs;
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
