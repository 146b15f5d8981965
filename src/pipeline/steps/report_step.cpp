// Step 'report': the HTML page of the job's outputs (kalends report), written as
// `<step folder>/report.html`, or where 'html' says (a path resolved against the job file).
#include <filesystem>
#include <regex>

#include "io/text_file.hpp"
#include "kalends/error.hpp"
#include "kalends/report.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

// The request a 'report' step runs, from its keys; reads no file.
ReportRequest report_request(const StepContext& c) {
  ReportRequest r;
  r.folder = c.out;
  r.steps = c.list("after");
  // 'html' is written, not read, so it is no path key (those are checksummed as inputs).
  const std::filesystem::path html(c.text("html"));
  r.html = !c.has("html") ? (std::filesystem::path(c.folder) / "report.html").string()
           : html.is_absolute() ? html.string()
                                : (std::filesystem::path(c.job_path).parent_path() / html).string();
  // "COLUMN ROW" items: ["100 200", "40 80"]. A comma splits an item in two (list keys are
  // comma lists), which is named rather than read as two half pixels.
  for (const std::string& pair : c.list("pixels")) {
    if (pair.find_first_of(" \t") == std::string::npos || pair.find_first_not_of(" \t0123456789") != std::string::npos)
      throw UsageError("--pixels '" + pair + "'", "expected \"COLUMN ROW\" per item, two whole numbers of 0 or more, as in "
                                                 "pixels = [\"120 340\", \"400 80\"] (a comma inside an item splits it)");
    r.pixels.push_back(parse_pixel(pair, "--pixels"));
  }
  r.samples = c.integer("samples", r.samples);
  r.map_size = c.integer("map_size", r.map_size);
  // The command's limits, at the job file's line (map_size = 0 had drawn 1 x 1 px maps).
  if (r.map_size < 16 || r.map_size > 4096) throw UsageError("--map-size", "between 16 and 4096 pixels");
  if (r.samples < 1 || r.samples > 64) throw UsageError("--samples", "between 1 and 64 pixels");

  r.title = c.text("title");
  return r;
}

}  // namespace

StepKind report_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "report";
  kind.writes_outside_folder = true;  // its 'html'
  // 'after' names the steps the page shows, so that it is redone when they change.
  kind.keys = {{"after", T::texts, StepKey::Role::reads}, {"html", T::text},
               {"pixels", T::texts}, {"samples", T::integer}, {"map_size", T::integer}, {"title", T::text}};
  kind.check = [](const StepOptions& o) {
    return o.count("after") ? std::string() : std::string("a 'report' step needs 'after' (the steps it shows)");
  };
  kind.check_values = [](const StepContext& c) {
    const ReportRequest r = report_request(c);
    // An 'html' in a folder that does not exist had failed only when the step ran, after the
    // steps before it; named at its line when the job file is read.
    if (c.has("html")) require_file_destination(r.html, "--html", "report.html");
  };
  kind.run = [](const StepContext& c) {
    ReportRequest r = report_request(c);
    std::vector<std::string> notes;
    // A run into another folder (--out: a trial, a cluster's shards) had replaced the page of the
    // job's own folder, whose state still said it was done. Its page goes in this run's folder.
    if (!c.replaced_out.empty() && c.has("html") && !path_inside(r.html, c.out)) {
      const std::string moved = (std::filesystem::path(c.folder) / std::filesystem::path(r.html).filename()).string();
      notes.push_back("'html' " + r.html + " lies outside the output folder --out gave (" + c.out + "); the page is " +
                      moved + ", and the one beside the job's own folder stays as it was");
      r.html = moved;
    }
    std::filesystem::create_directories(c.folder);
    const ReportSummary s = run_report(r);
    notes.insert(notes.end(), s.notes.begin(), s.notes.end());
    StepOutcome outcome{s.written ? 1 : 0, s.written ? 0 : 1, "", notes};
    // A page outside the step folder is recorded too: deleted, it is made again (it had stayed
    // "done" for good).
    if (std::filesystem::path(r.html).parent_path().lexically_normal() !=
        std::filesystem::path(c.folder).lexically_normal())
      outcome.written_elsewhere.push_back(std::filesystem::absolute(r.html).lexically_normal().string());
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
