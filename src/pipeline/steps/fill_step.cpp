// Step 'fill': gap filling of one stack (kalends fill).
#include "kalends/fill.hpp"
#include "kalends/tiles.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

StepKind fill_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "fill";
  kind.years_by_reach = true;
  kind.keys = {{"input", T::text, StepKey::Role::reads},
               {"method", T::text}, {"lambda", T::text_or_number}, {"lambda_range", T::pair},
               {"order", T::integer}, {"envelope", T::text}, {"robust", T::boolean},
               {"iterations", T::integer}, {"harmonics", T::integer}, {"trend", T::boolean},
               {"reject_below", T::number}, {"smooth", T::boolean}, {"every", T::text},
               {"name", T::text}, {"max_gap", T::number}, {"max_extrapolation", T::number},
               {"reach", T::number}, {"compress", T::text}, {"keep", T::text},
               {"space_smoothing", T::number}, {"time_smoothing", T::number},
               {"climate_smoothing", T::number}, {"season_smoothing", T::number},
               {"halo", T::integer}, {"tolerance", T::number},
               {"tiles", T::text, StepKey::Role::path}};
  kind.check = [](const StepOptions& o) {
    return o.count("input") ? std::string() : std::string("a 'fill' step needs 'input'");
  };
  kind.run = [](const StepContext& c) {
    const ResolvedInput in = c.resolve(c.text("input"));
    FillRequest r;
    r.input = in.pattern;
    r.rules = in.rules;
    r.qa_input = in.qa;
    r.qa_keep = c.text("keep", in.keep);
    if (r.qa_input.empty()) r.qa_keep.clear();
    MethodOptions& m = r.method;
    m.method = c.text("method", m.method);
    if (c.has("lambda") && c.text("lambda") != "auto") m.lambda = c.number("lambda", 0);
    if (c.has("lambda_range")) std::tie(m.lambda_min, m.lambda_max) = c.pair("lambda_range");
    m.order = c.integer("order", m.order);
    m.envelope_upper = c.text("envelope", "none") == "upper";
    m.robust = c.flag("robust");
    m.iterations = c.integer("iterations", m.iterations);
    m.harmonics = c.integer("harmonics", m.harmonics);
    m.trend = c.flag("trend");
    m.reject_below = c.number("reject_below", m.reject_below);
    m.max_gap_days = c.number("max_gap", m.max_gap_days);
    m.max_extrapolation_days = c.number("max_extrapolation", m.max_extrapolation_days);
    m.reach_days = c.number("reach", m.reach_days);
    m.spacetime_space_smoothing = c.number("space_smoothing", m.spacetime_space_smoothing);
    m.spacetime_time_smoothing = c.number("time_smoothing", m.spacetime_time_smoothing);
    m.spacetime_climate_smoothing = c.number("climate_smoothing", m.spacetime_climate_smoothing);
    m.spacetime_season_smoothing = c.number("season_smoothing", m.spacetime_season_smoothing);
    m.spacetime_halo = c.integer("halo", m.spacetime_halo);
    m.spacetime_tolerance = c.number("tolerance", m.spacetime_tolerance);
    r.only_years = c.only_years;
    r.smooth = c.flag("smooth");
    if (c.has("every")) r.every = CalendarPeriod::parse(c.text("every"));
    r.name = c.text("name");
    r.out_dir = c.folder;
    r.memory_bytes = c.memory_bytes;
    r.threads = c.threads;
    r.compression = parse_compression(c.text("compress", "deflate"));
    r.command_line = c.command_line;
    r.keep_unchanged = true;
    r.region = c.region;
    if (c.has("tiles")) {
      // Outputs per tile, and the mosaic VRTs later steps read (see the runner's resolve).
      const TiledFillSummary tiled = run_tiled_fill(r, c.text("tiles"), true, c.progress, c.only_tiles);
      StepOutcome outcome;
      for (const FillSummary& s : tiled.tiles) {
        outcome.outputs_written += s.outputs_written;
        outcome.outputs_unchanged += s.outputs_unchanged;
      }
      return outcome;
    }
    const FillSummary s = run_fill(r, c.progress);
    return StepOutcome{s.outputs_written, s.outputs_unchanged, ""};
  };
  return kind;
}

}  // namespace kalends::detail
