// Step 'grid': earlier steps' layers delivered on a study grid (kalends grid).
#include <filesystem>

#include "kalends/error.hpp"
#include "kalends/study_grid.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

// The request for one layer of a 'grid' step, from its keys; reads no file.
StudyGridRequest grid_request(const StepContext& c, const std::string& layer) {
  const ResolvedInput in = c.resolve(layer);
  StudyGridRequest r;
  r.inputs = {in.folder.empty() ? in.pattern : in.folder};
  r.out_dir = (std::filesystem::path(c.folder) / layer).string();
  r.crs = c.text("crs");
  if (c.has("resolution")) r.resolution = c.number("resolution", 0);
  if (c.has("extent")) r.extent = c.numbers("extent");
  r.clip = c.text("clip");
  r.resample = c.text("resample", r.resample);
  r.command_line = c.command_line;
  return r;
}

}  // namespace

StepKind grid_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "grid";
  kind.keys = {{"layers", T::texts, StepKey::Role::reads}, {"crs", T::text}, {"resolution", T::number},
               {"extent", T::texts}, {"clip", T::text, StepKey::Role::path}, {"resample", T::text}};
  kind.check = [](const StepOptions& o) {
    if (!o.count("layers")) return std::string("a 'grid' step needs 'layers' (earlier steps)");
    if (!o.count("crs")) return std::string("a 'grid' step needs 'crs', e.g. \"EPSG:4326\"");
    return std::string();
  };
  kind.check_values = [](const StepContext& c) {
    // An empty list had run as "done" and written nothing.
    if (c.list("layers").empty()) throw UsageError("--layers", "names no step; give at least one");
    for (const std::string& name : c.list("layers")) check_study_grid_options(grid_request(c, name));
  };
  kind.run = [](const StepContext& c) {
    StepOutcome outcome;
    for (const std::string& name : c.list("layers")) {
      const StudyGridSummary s = run_study_grid(grid_request(c, name));
      outcome.outputs_written += s.outputs_written;
      outcome.outputs_unchanged += s.outputs_unchanged;
      if (!s.caution.empty()) outcome.caution = s.caution;  // suitability's, shown with the step
      outcome.notes.insert(outcome.notes.end(), s.notes.begin(), s.notes.end());
    }
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
