// Step 'report': the HTML page of the job's outputs (kalends report), written as
// `<step folder>/report.html`, or where 'html' says (a path resolved against the job file).
#include <filesystem>

#include "kalends/report.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

StepKind report_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "report";
  // 'after' names the steps the page shows, so that it is redone when they change.
  kind.keys = {{"after", T::texts, StepKey::Role::reads}, {"html", T::text},
               {"pixels", T::texts}, {"samples", T::integer}, {"map_size", T::integer}, {"title", T::text}};
  kind.check = [](const StepOptions& o) {
    return o.count("after") ? std::string() : std::string("a 'report' step needs 'after' (the steps it shows)");
  };
  kind.run = [](const StepContext& c) {
    ReportRequest r;
    r.folder = c.out;
    std::filesystem::create_directories(c.folder);
    // 'html' is written, not read, so it is no path key (those are checksummed as inputs).
    const std::filesystem::path html(c.text("html"));
    r.html = !c.has("html") ? (std::filesystem::path(c.folder) / "report.html").string()
             : html.is_absolute() ? html.string()
                                  : (std::filesystem::path(c.job_path).parent_path() / html).string();
    for (const std::string& pair : c.list("pixels")) {  // "column row" pairs, e.g. ["100 200", "40 80"]
      const auto space = pair.find(' ');
      r.pixels.emplace_back(std::stoi(pair.substr(0, space)), std::stoi(pair.substr(space + 1)));
    }
    r.samples = c.integer("samples", r.samples);
    r.map_size = c.integer("map_size", r.map_size);
    r.title = c.text("title");
    run_report(r);
    return StepOutcome{1, 0, ""};
  };
  return kind;
}

}  // namespace kalends::detail
