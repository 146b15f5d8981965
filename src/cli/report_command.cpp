// kalends report FOLDER --html report.html [--pixels 'c,r;c,r'] [--samples N] [--map-size PX]
#include <cstdio>
#include <fmt/format.h>

#include "cli/commands.hpp"
#include "io/text_file.hpp"
#include "kalends/error.hpp"
#include "kalends/report.hpp"

namespace kalends::cli {

Action add_report_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("report", "One self-contained HTML page: maps, validation, fill statistics, time series");
  struct Options {
    ReportRequest request;
    std::string pixels;
  };
  auto o = std::make_shared<Options>();
  ReportRequest& r = o->request;
  sub->add_option("folder", r.folder, "A job's output folder, or a step's")->required();
  sub->add_option("--html", r.html, "The page to write")->required();
  sub->add_option("--pixels", o->pixels, "Pixels to plot, 'column,row;column,row' (or 'column row;...'; default: spread over the grid)");
  sub->add_option("--samples", r.samples, "Pixels spread over the grid when --pixels is not given")->capture_default_str();
  sub->add_option("--map-size", r.map_size, "Longest side of each quicklook map (pixels)")->capture_default_str();
  sub->add_option("--title", r.title, "Title of the page (default: the folder)");
  return [o, &global] {
    ReportRequest& r = o->request;
    // Before the work, exit 2 (a missing folder had failed at the rename, exit 1, naming no file).
    detail::require_file_destination(r.html, "--html", "report.html");
    std::string rest = o->pixels;
    while (!rest.empty()) {
      const auto semicolon = rest.find(';');
      r.pixels.push_back(parse_pixel(rest.substr(0, semicolon), "--pixels"));
      rest = semicolon == std::string::npos ? "" : rest.substr(semicolon + 1);
    }
    if (r.map_size < 16 || r.map_size > 4096) throw UsageError("--map-size", "between 16 and 4096 pixels");
    const ReportSummary s = run_report(r);
    for (const std::string& note : s.notes) std::fprintf(stderr, "note: %s\n", note.c_str());
    if (!global.quiet)
      fmt::print("kalends report: {} maps, {} time series, {} validation reports ({} pixel plots), {} fill summaries "
                 "-> {} ({:.0f} kB)\n",
                 s.maps, s.plots, s.validation_reports, s.validation_plots, s.fill_summaries, r.html, s.bytes / 1024.0);
  };
}

}  // namespace kalends::cli
