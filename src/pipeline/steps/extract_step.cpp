// Step 'extract': covariates at survey points (kalends extract). `input` names the steps (or
// inputs) whose layers are sampled; the table is `<step folder>/<table>` (default table.csv).
#include <cmath>
#include <filesystem>

#include "kalends/error.hpp"
#include "kalends/extract.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

// The request an 'extract' step runs, from its keys; reads no file.
ExtractRequest extract_request(const StepContext& c) {
  ExtractRequest r;
  for (const std::string& name : c.list("input")) {
    const ResolvedInput in = c.resolve(name);
    if (in.folder.empty())
      throw UsageError("--input '" + name + "'", "an 'extract' step reads earlier steps, and this is a job input");
    r.covariates.push_back(in.folder);
    r.name_prefixes.push_back(name);  // layers are named as in 'kalends extract OUT/': "fill.ndvi"
  }
  r.points.path = c.text("points");
  r.points.id_column = c.text("id_column", r.points.id_column);
  r.points.x_column = c.text("x_column", r.points.x_column);
  r.points.y_column = c.text("y_column", r.points.y_column);
  r.points.date_column = c.text("date_column", r.points.date_column);
  r.points.date_column_given = c.has("date_column");
  r.points.crs = c.text("crs", r.points.crs);
  r.sampling = parse_sampling(c.text("sampling", "nearest"));
  r.buffer_metres = c.number("buffer", 0);
  if (c.has("buffer") && !(r.buffer_metres > 0 && std::isfinite(r.buffer_metres)))  // 0 had meant no buffer
    throw UsageError("--buffer", "the radius must be positive (metres); leave the key out for no buffer");
  r.lags = c.integers("lags");
  r.marks = parse_date_marks(c.text("date_marks", "auto"));
  r.layers = c.list("layers");
  r.long_format = c.flag("long");
  r.include_descriptors = c.flag("descriptors");
  // A file name in the step folder, as the docs say: a path elsewhere ("../x.csv") was written
  // where the runner never looked, and a deleted table was never made again.
  const std::string table = c.text("table", "table.csv");
  if (table.empty() || table.find('/') != std::string::npos || table == "." || table == "..")
    throw UsageError("--table '" + table + "'", "is a file name in the step's folder (e.g. \"table.csv\"), not a path");
  r.out = (std::filesystem::path(c.folder) / table).string();
  return r;
}

}  // namespace

StepKind extract_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "extract";
  kind.keys = {{"input", T::texts, StepKey::Role::reads},
               {"points", T::text, StepKey::Role::path},
               {"table", T::text}, {"sampling", T::text}, {"buffer", T::number},
               {"lags", T::text}, {"layers", T::texts}, {"long", T::boolean}, {"descriptors", T::boolean},
               {"id_column", T::text}, {"x_column", T::text}, {"y_column", T::text},
               {"date_column", T::text}, {"crs", T::text}, {"date_marks", T::text}};
  kind.check = [](const StepOptions& o) {
    if (!o.count("input")) return std::string("an 'extract' step needs 'input' (the steps to sample)");
    if (!o.count("points")) return std::string("an 'extract' step needs 'points' (the survey table)");
    return std::string();
  };
  kind.check_values = [](const StepContext& c) {
    const ExtractRequest r = extract_request(c);
    check_extract_options(r);
  };
  // The survey table is small and the user's own: its columns, coordinates and dates are read
  // before the first step runs, so that a wrong column fails at once (and in --dry-run), yet
  // fails this step alone.
  kind.check_files = [](const StepContext& c) { read_survey_points(extract_request(c).points); };
  kind.run = [](const StepContext& c) {
    const ExtractRequest r = extract_request(c);
    std::filesystem::create_directories(c.folder);
    const ExtractResult result = run_extract(r);
    std::string caution;
    for (const std::string& text : result.cautions) caution += (caution.empty() ? "" : "\n  ") + text;
    return StepOutcome{result.table_written ? 1 : 0, result.table_written ? 0 : 1, caution, result.notes};
  };
  return kind;
}

}  // namespace kalends::detail
