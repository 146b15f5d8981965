// kalends grid INPUT... --out DIR --crs CRS [--resolution R] [--extent ...] [--clip AREA]
#include <fmt/format.h>

#include <cstdio>
#include <sstream>

#include "cli/commands.hpp"
#include "kalends/error.hpp"
#include "kalends/study_grid.hpp"

namespace kalends::cli {

std::vector<double> parse_extent(const std::string& text) {
  std::vector<double> values;
  std::stringstream in(text);
  std::string part;
  while (std::getline(in, part, ',')) values.push_back(parse_number(part, "--extent"));
  if (values.size() != 4) throw UsageError("--extent '" + text + "'", "expected XMIN,YMIN,XMAX,YMAX");
  return values;
}

Action add_grid_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand(
      "grid", "Reproject and aggregate layers to a study grid (CRS, resolution, extent), clipped, as COG");
  struct Options {
    StudyGridRequest request;
    std::string extent;
  };
  auto o = std::make_shared<Options>();
  StudyGridRequest& r = o->request;
  sub->add_option("input", r.inputs, "Folders of layers (e.g. a step's output) or rasters")->required();
  sub->add_option("--out", r.out_dir, "Output folder")->required();
  sub->add_option("--crs", r.crs, "Target CRS, e.g. EPSG:4326")->required();
  sub->add_option("--resolution", r.resolution, "Cell size in the target CRS's units (default: GDAL's choice)");
  sub->add_option("--extent", o->extent, "XMIN,YMIN,XMAX,YMAX in the target CRS");
  sub->add_option("--clip", r.clip, "Study area: any vector source GDAL reads; cells outside are nodata");
  sub->add_option("--resample", r.resample,
                  "For continuous bands: average (area-weighted mean), nearest, bilinear, cubic, min, max, med; "
                  "a fill's flag takes the flag covering most of the cell among cells with a value")
      ->check(CLI::IsMember(study_grid_resampling_names()))
      ->capture_default_str();
  return [o, &global] {
    StudyGridRequest& r = o->request;
    if (!o->extent.empty()) r.extent = parse_extent(o->extent);
    r.command_line = global.command_line;
    const StudyGridSummary s = run_study_grid(r);
    for (const std::string& note : s.notes) std::fprintf(stderr, "note: %s\n", note.c_str());
    // Suitability's caution goes with its layers wherever they are handed on (also with -q).
    if (!s.caution.empty()) std::fprintf(stderr, "%s\n", s.caution.c_str());
    if (!global.quiet)
      fmt::print("kalends grid: {} layer{} on a {} x {} grid -> {} ({} written, {} unchanged)\n", s.outputs.size(),
                 s.outputs.size() == 1 ? "" : "s",
                 s.width, s.height, r.out_dir, s.outputs_written, s.outputs_unchanged);
  };
}

}  // namespace kalends::cli
