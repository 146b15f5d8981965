// Step 'grid': earlier steps' layers delivered on a study grid (kalends grid).
#include <filesystem>

#include "kalends/study_grid.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

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
  kind.run = [](const StepContext& c) {
    StepOutcome outcome;
    for (const std::string& name : c.list("layers")) {
      const ResolvedInput in = c.resolve(name);
      StudyGridRequest r;
      r.inputs = {in.folder.empty() ? in.pattern : in.folder};
      r.out_dir = (std::filesystem::path(c.folder) / name).string();
      r.crs = c.text("crs");
      r.resolution = c.number("resolution", 0);
      if (c.has("extent")) {
        std::vector<double> extent;
        for (const std::string& v : c.list("extent")) extent.push_back(std::stod(v));
        r.extent = extent;
      }
      r.clip = c.text("clip");
      r.resample = c.text("resample", r.resample);
      r.command_line = c.command_line;
      const StudyGridSummary s = run_study_grid(r);
      outcome.outputs_written += s.outputs_written;
      outcome.outputs_unchanged += s.outputs_unchanged;
    }
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
