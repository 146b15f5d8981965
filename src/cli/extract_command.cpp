// kalends extract COVARIATES... --points FILE --out TABLE.csv [--sampling bilinear]
//   [--buffer METRES] [--lags 1,2,3] [--layers 'fill.*,seasons.ndvi_synoptic_mean'] [--long]
#include <fmt/format.h>

#include <cmath>
#include <cstdio>

#include "cli/commands.hpp"
#include "io/text_file.hpp"
#include "kalends/error.hpp"
#include "kalends/extract.hpp"

namespace kalends::cli {

Action add_extract_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand(
      "extract", "Covariate values at survey points and dates, with flags, errors and reasons");
  struct Options {
    ExtractRequest request;
    std::string sampling = "nearest", lags, layers, buffer, marks = "auto";
  };
  auto o = std::make_shared<Options>();
  ExtractRequest& r = o->request;
  sub->add_option("covariates", r.covariates, "Folders written by kalends (a job's out/ or a step's), or rasters")
      ->required();
  sub->add_option("--points", r.points.path, "Survey points: CSV, or any vector format OGR reads")->required();
  sub->add_option("--out", r.out, "Table to write (CSV)")->required();
  sub->add_option("--sampling", o->sampling, "nearest or bilinear")->capture_default_str();
  sub->add_option("--buffer", o->buffer, "Also the mean within this radius (metres) of cells with a value");
  sub->add_option("--lags", o->lags, "Periods before the survey's, e.g. 1,2,3");
  sub->add_option("--layers", o->layers, "Comma-separated layer names or globs (default: all)");
  sub->add_flag("--long", r.long_format, "One row per point, layer and lag instead of one per point");
  sub->add_flag("--descriptors", r.include_descriptors,
                "Also the descriptor layers (cycle, summaries), each band as a fixed layer");
  sub->add_option("--id-column", r.points.id_column, "Column of the point identifier")->capture_default_str();
  sub->add_option("--x-column", r.points.x_column, "CSV column of the longitude or easting")->capture_default_str();
  sub->add_option("--y-column", r.points.y_column, "CSV column of the latitude or northing")->capture_default_str();
  CLI::Option* date_column =
      sub->add_option("--date-column", r.points.date_column, "Column of the survey date (YYYY-MM-DD or YYYY-MM)")
          ->capture_default_str();
  sub->add_option("--crs", r.points.crs, "CRS of CSV coordinates (EPSG code, WKT or PROJ string)")
      ->capture_default_str();
  sub->add_option("--date-marks", o->marks,
                  std::string("What a dated layer's date marks in its composite: start, middle or end; ") +
                      date_marks_auto_help)
      ->capture_default_str();
  return [o, date_column, &global] {
    ExtractRequest& r = o->request;
    // The library takes an empty name as "keep the table in memory"; here it had run, written
    // nothing and exited 0.
    detail::require_file_destination(r.out, "--out", "table.csv");
    r.points.date_column_given = date_column->count() > 0;
    r.sampling = parse_sampling(o->sampling);
    r.buffer_metres = optional_number(o->buffer, "--buffer").value_or(0);
    if (!o->buffer.empty() && !(r.buffer_metres > 0 && std::isfinite(r.buffer_metres)))
      throw UsageError("--buffer", "the radius must be a positive, finite number of metres");
    r.lags = parse_whole_numbers(o->lags, "--lags");
    r.layers = split_list(o->layers, "--layers");
    r.marks = parse_date_marks(o->marks);
    const ExtractResult result = run_extract(r);
    for (const std::string& note : result.notes) std::fprintf(stderr, "note: %s\n", note.c_str());
    // Shown even with -q, as `kalends suitability` shows it: a value in a survey table is
    // where it is most easily read as a risk.
    for (const std::string& caution : result.cautions) std::fprintf(stderr, "%s\n", caution.c_str());
    if (!global.quiet)
      fmt::print("kalends extract: {} points x {} layers{}: {} values, {} missing (see the reason columns) -> {}\n",
                 result.points.points.size(), result.series.size(),
                 r.lags.empty() ? "" : fmt::format(" with {} lags", r.lags.size()),
                 result.values.size() - result.missing, result.missing, r.out);
  };
}

}  // namespace kalends::cli
