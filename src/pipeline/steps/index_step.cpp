// Step 'index': NDVI or EVI from band stacks (kalends index).
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/spectral_index.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

SpectralIndex index_kind(const StepContext& c) {
  const std::string index = c.text("index", "ndvi");
  if (index != "ndvi" && index != "evi") throw UsageError("--index '" + index + "'", "expected ndvi or evi");
  return index == "evi" ? SpectralIndex::evi : SpectralIndex::ndvi;
}

// The request an 'index' step runs, from its keys; reads no file.
IndexRequest index_request(const StepContext& c) {
  IndexRequest r;
  const ResolvedInput red = c.resolve(c.text("red")), nir = c.resolve(c.text("nir"));
  r.red = red.pattern;
  r.nir = nir.pattern;
  r.rules = red.rules;
  r.rules_of = {{"red", red.rules}, {"nir", nir.rules}};  // each input read with its own keys
  if (c.has("blue")) {
    const ResolvedInput blue = c.resolve(c.text("blue"));
    r.blue = blue.pattern;
    r.rules_of["blue"] = blue.rules;
  }
  r.red_band = c.integer("red_band", 1);
  r.nir_band = c.integer("nir_band", 1);
  r.blue_band = c.integer("blue_band", 1);
  r.red_band_given = c.has("red_band");
  r.nir_band_given = c.has("nir_band");
  r.blue_band_given = c.has("blue_band");
  r.kind = index_kind(c);
  r.qa = red.qa;
  r.qa_band = red.qa_band;
  take_run_settings(r, c);
  return r;
}

}  // namespace

StepKind index_step_kind() {
  using T = KeyType;
  const auto reads = StepKey::Role::reads;
  StepKind kind;
  kind.name = "index";
  kind.splits_by_area = true;
  kind.keys = {{"red", T::text, reads}, {"nir", T::text, reads}, {"blue", T::text, reads},
               {"red_band", T::integer}, {"nir_band", T::integer}, {"blue_band", T::integer},
               {"index", T::text}, {"name", T::text}, {"compress", T::text}};
  kind.check = [](const StepOptions& o) {
    return o.count("red") && o.count("nir") ? std::string() : std::string("an 'index' step needs 'red' and 'nir'");
  };
  kind.check_values = [](const StepContext& c) { check_index_options(index_request(c)); };
  // Before the first step runs (and in --dry-run): a band file without its partner or its QA
  // fails the step then, not hours into the night (a dry run had said "would run").
  kind.check_memory = [](const StepContext& c) {
    IndexRequest r = index_request(c);
    r.out_dir = c.folder;
    r.check_only = true;
    run_index(r);
  };
  kind.run = [](const StepContext& c) {
    const IndexSummary s = run_index(index_request(c));
    StepOutcome outcome{s.outputs_written, s.outputs_unchanged, "", s.notes};
    outcome.rasters = s.outputs;
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
