// Step 'compare': where a synoptic layer misleads (kalends compare).
#include <filesystem>

#include "kalends/compare.hpp"
#include "kalends/error.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

StepKind compare_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "compare";
  kind.keys = {{"input", T::text, StepKey::Role::reads, "seasons"},
               {"zones", T::text, StepKey::Role::path},
               {"top", T::integer}, {"name", T::text}};
  kind.check = [](const StepOptions& o) {
    return o.count("input") ? std::string() : std::string("a 'compare' step needs 'input'");
  };
  kind.check_values = [](const StepContext& c) {
    const int top = c.integer("top", 0);  // had waited for the run
    if (top < 0 || top > 10000) throw UsageError("--top", "must be 0..10000");
  };
  kind.run = [](const StepContext& c) {
    CompareRequest r;
    r.seasons_dir = c.resolve(c.text("input")).folder;
    r.out_dir = c.folder;
    r.zones = c.text("zones");
    r.top = c.integer("top", r.top);
    r.command_line = c.command_line;
    r.name = c.text("name");  // the layer set, where the seasons folder holds several
    // Written and unchanged as the files say (every file had been counted as written).
    const CompareSummary s = run_compare(r);
    return StepOutcome{s.files_written, s.files_unchanged, "", compare_notes(s)};
  };
  return kind;
}

}  // namespace kalends::detail
