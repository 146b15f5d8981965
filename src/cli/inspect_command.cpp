// kalends inspect STACK [--qa QA --keep RULE] [--dates] [--quick] [--json]
#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <map>

#include "cli/commands.hpp"
#include "io/gdal_session.hpp"
#include "io/json_text.hpp"
#include "kalends/error.hpp"
#include "kalends/inspect.hpp"

namespace kalends::cli {

namespace {

std::string optional_text(const std::optional<double>& v) { return v ? fmt::format("{:.4g}", *v) : "-"; }

std::string grid_text(const InspectReport& r) {
  const Grid& g = r.grid;
  std::string text = fmt::format("{} x {} px", g.width, g.height);
  if (!g.has_geotransform) return text + ", no georeferencing (a pixel grid only)";
  const auto& t = g.geotransform;
  text += fmt::format(", cells {}, origin ({:.9g}, {:.9g})", detail::cell_size_text(t, g.crs_wkt), t[0], t[3]);
  return text + ", " + (r.crs_name.empty() ? std::string("no CRS") : r.crs_name);
}

// What one value rule is and whether the files or the user set it.
std::string rule_text(const char* name, const std::optional<double>& given, double from_file) {
  return given ? fmt::format("{} {:g} (given)", name, *given) : fmt::format("{} {:g}", name, from_file);
}

void print_text(const InspectReport& r, const ValueRules& rules, const std::string& keep, bool dates) {
  const auto& layers = r.layers;
  const Layer& first = layers.front().layer;
  fmt::print("kalends inspect: {}: {} date{} of '{}'\n", r.input, layers.size(), layers.size() == 1 ? "" : "s", r.name);
  fmt::print("  grid      {}\n", grid_text(r));
  std::map<std::string, int> sources;
  for (const InspectedLayer& l : layers) ++sources[l.date_source];
  std::string from;
  for (const auto& [source, count] : sources)
    from += (from.empty() ? "" : ", ") + (sources.size() > 1 ? fmt::format("{} from {}", count, source) : source);
  const std::int64_t span_days = (layers.back().layer.time.seconds - first.time.seconds) / 86400;
  fmt::print("  dates     {} .. {} ({} days), from {}\n", first.time.label(), layers.back().layer.time.label(),
             span_days, from);
  if (!r.date_conflict.empty()) fmt::print("            {}\n", r.date_conflict);
  if (!r.mixed_names.empty()) fmt::print("            {}\n", r.mixed_names);
  std::vector<TimePoint> times;
  for (const InspectedLayer& l : layers) times.push_back(l.layer.time);
  if (dates_at_month_ends(times))
    fmt::print("            the dates are the last days of their months: seasons, suitability, fill --every and\n"
               "            extract read each as the end of the month it closes (--date-marks start: the month after)\n");
  else if (dates_at_month_middles(times))
    fmt::print("            the dates are the middles of their months: seasons, suitability, fill --every and\n"
               "            extract read each as the middle of the days it stands for (--date-marks start: the days after)\n");
  const TimeGrid& t = r.time_grid;
  if (layers.size() > 1) {
    fmt::print("  time grid step {:g} days ({}), {} slots, {} with a date\n", t.step_days,
               t.from_smallest_spacing ? "the smallest spacing: on the median one, dates of mixed spacing would move "
                                         "a whole step"
                                       : t.placed_by_intervals ? "the median spacing; dates placed by their intervals, as "
                                                                 "the calendar drifts from the grid over the years"
                                                               : "the median spacing",
               t.size, r.slots_with_data);
    if (t.largest_shift_days >= t.step_days)
      fmt::print("            the grid misstates the time between two dates by up to {:g} days ({})\n",
                 std::round(t.largest_shift_days * 10) / 10,
                 t.fixed_days_of_month ? "dates on fixed days of every month, whose lengths differ: kept"
                                       : "the smallest spacing would need too many slots");
  } else {
    fmt::print("  time grid none: a single date (filling in time needs several)\n");
  }
  const auto nodata = [&](const Layer& l) { return l.nodata ? fmt::format("{:g}", *l.nodata) : std::string("none"); };
  fmt::print("  values    {}, {}, nodata {}{}{}{}\n", rule_text("scale", rules.scale, first.scale),
             rule_text("offset", rules.offset, first.offset),
             rules.nodata ? fmt::format("{:g} (given)", *rules.nodata) : nodata(first),
             first.own_mask.empty() ? "" : ", cells its " + first.own_mask + " marks 0 are missing",
             first.unit.empty() ? "" : ", unit " + first.unit,
             rules.valid_min ? fmt::format(", valid range {:g}..{:g}", *rules.valid_min, *rules.valid_max) : "");
  const auto same_nodata = [](const std::optional<double>& a, const std::optional<double>& b) {
    return a.has_value() == b.has_value() && (!a || *a == *b || (std::isnan(*a) && std::isnan(*b)));
  };
  bool mixed = false;
  for (const InspectedLayer& l : layers)
    mixed = mixed || l.layer.scale != first.scale || l.layer.offset != first.offset ||
            !same_nodata(l.layer.nodata, first.nodata);
  if (mixed) fmt::print("            (scale, offset or nodata differ between dates: see --dates)\n");
  if (!r.unapplied_scaling.empty())
    fmt::print("            the file states {}, which GDAL leaves unapplied:\n"
               "            conventions differ (CF multiplies, MODIS HDF divides); give --scale and --offset\n",
               r.unapplied_scaling);
  if (!r.values_read) {
    fmt::print("  (values not read: --quick)\n");
  } else {
    std::int64_t observed = 0, pixels = 0, rejected = 0, outside = 0;
    const InspectedLayer* least = &layers.front();
    const InspectedLayer* most = &layers.front();
    for (const InspectedLayer& l : layers) {
      observed += l.observed, pixels += l.pixels, rejected += l.rejected_by_qa, outside += l.outside_valid_range;
      if (l.observed < least->observed) least = &l;
      if (l.observed > most->observed) most = &l;
    }
    fmt::print("  observed  {} of pixel-dates; least {} on {}, most {} on {}\n", percent(observed, pixels),
               percent(least->observed, least->pixels), least->layer.time.label(),
               percent(most->observed, most->pixels), most->layer.time.label());
    // The range of what was observed, in physical units: a forgotten scale factor shows here
    // (NDVI of 8000, temperatures of 14000).
    double low = INFINITY, high = -INFINITY, sum = 0;
    for (const InspectedLayer& l : layers)
      if (l.minimum) {
        low = std::min(low, *l.minimum);
        high = std::max(high, *l.maximum);
        sum += *l.mean * double(l.observed);
      }
    if (observed > 0)
      fmt::print("  range     {:.4g} .. {:.4g}, mean {:.4g} (physical values observed)\n", low, high,
                 sum / double(observed));
    if (!keep.empty())
      fmt::print("  QA        {} of all pixel-dates ({} of those with a value) rejected by '{}'\n",
                 percent(rejected, pixels), percent(rejected, observed + rejected), keep);
    if (rules.valid_min) fmt::print("            {} of pixel-dates outside the valid range\n", percent(outside, pixels));
    fmt::print("  pixels never observed: {} of {}{}\n", r.pixels_never_observed,
               std::int64_t(r.grid.width) * r.grid.height,
               r.pixels_never_observed > 0
                   ? " (the other methods leave them empty; spacetime fills them from their "
                     "neighbours unless given --never-observed leave, for sea or outside a boundary)"
                   : "");
  }
  if (!dates) return;
  fmt::print("\n  {:<16} {:<13} {:>9} {:>9} {:>9} {:>9} {:>9}  {}\n", "date", "from", "observed", "QA out",
             "min", "mean", "max", "file (band), scale, offset, nodata");
  for (const InspectedLayer& l : layers)
    fmt::print("  {:<16} {:<13} {:>9} {:>9} {:>9} {:>9} {:>9}  {} ({}), {:g}, {:g}, {}\n", l.layer.time.label(),
               l.date_source, r.values_read ? percent(l.observed, l.pixels) : "-",
               r.values_read && !keep.empty() ? percent(l.rejected_by_qa, l.pixels) : "-", optional_text(l.minimum),
               optional_text(l.mean), optional_text(l.maximum), l.layer.path, l.layer.band, l.layer.scale,
               l.layer.offset, nodata(l.layer));
}

void print_json(const InspectReport& r) {
  using detail::json_escape;
  const auto number = [](const std::optional<double>& v) { return v ? detail::json_number(*v) : "null"; };
  // JSON has no NaN; a NaN nodata (float rasters) is written as the string "NaN", null being none.
  const auto nodata = [&](const std::optional<double>& v) {
    return v && std::isnan(*v) ? std::string("\"NaN\"") : number(v);
  };
  const Grid& g = r.grid;
  std::string geotransform;
  for (double v : g.geotransform) geotransform += (geotransform.empty() ? "" : ", ") + detail::json_number(v);
  fmt::print("{{\n  \"input\": \"{}\",\n  \"name\": \"{}\",\n  \"width\": {},\n  \"height\": {},\n", json_escape(r.input),
             json_escape(r.name), g.width, g.height);
  fmt::print("  \"geotransform\": {},\n  \"crs\": {},\n", g.has_geotransform ? "[" + geotransform + "]" : "null",
             r.crs_name.empty() ? "null" : "\"" + json_escape(r.crs_name) + "\"");
  fmt::print("  \"time_grid\": {{\"step_days\": {}, \"slots\": {}, \"slots_with_data\": {}}},\n",
             detail::json_number(r.time_grid.step_days), r.time_grid.size, r.slots_with_data);
  fmt::print("  \"unapplied_scaling\": {},\n",
             r.unapplied_scaling.empty() ? "null" : "\"" + json_escape(r.unapplied_scaling) + "\"");
  fmt::print("  \"date_conflict\": {},\n",
             r.date_conflict.empty() ? "null" : "\"" + json_escape(r.date_conflict) + "\"");
  fmt::print("  \"mixed_names\": {},\n", r.mixed_names.empty() ? "null" : "\"" + json_escape(r.mixed_names) + "\"");
  fmt::print("  \"values_read\": {},\n  \"pixels_never_observed\": {},\n  \"dates\": [\n", r.values_read,
             r.values_read ? std::to_string(r.pixels_never_observed) : "null");
  for (std::size_t i = 0; i < r.layers.size(); ++i) {
    const InspectedLayer& l = r.layers[i];
    const auto count = [&](std::int64_t v) { return r.values_read ? std::to_string(v) : std::string("null"); };
    fmt::print("    {{\"date\": \"{}\", \"from\": \"{}\", \"path\": \"{}\", \"band\": {}, \"scale\": {}, \"offset\": {}, "
               "\"nodata\": {}, \"mask\": {}, \"unit\": \"{}\", \"pixels\": {}, \"observed\": {}, \"rejected_by_qa\": {}, "
               "\"outside_valid_range\": {}, \"min\": {}, \"mean\": {}, \"max\": {}}}{}\n",
               l.layer.time.iso(), l.date_source, json_escape(l.layer.path), l.layer.band,
               detail::json_number(l.layer.scale), detail::json_number(l.layer.offset), nodata(l.layer.nodata),
               l.layer.own_mask.empty() ? "null" : "\"" + l.layer.own_mask + "\"", json_escape(l.layer.unit), std::int64_t(g.width) * g.height, count(l.observed), count(l.rejected_by_qa),
               count(l.outside_valid_range), number(l.minimum), number(l.mean), number(l.maximum),
               i + 1 < r.layers.size() ? "," : "");
  }
  fmt::print("  ]\n}}\n");
}

}  // namespace

Action add_inspect_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand(
      "inspect", "How kalends reads a stack: dates and where they come from, grid, value rules, what is observed");
  struct Options {
    InspectRequest request;
    ValueRuleTexts rule_texts;
    std::string date;
    bool dates = false, quick = false, json = false;
  };
  auto o = std::make_shared<Options>();
  InspectRequest& r = o->request;
  sub->add_option("input", r.input, "Quoted glob of single-date rasters ('ndvi/*.tif'), one variable of many files "
                  "('NETCDF:\"nc/*.nc\":ndvi'), or one multi-band raster")
      ->required();
  sub->add_option("--qa", r.qa_input, "Quoted glob or raster of QA layers, paired by date");
  sub->add_option("--keep", r.qa_keep, "QA keep rule, e.g. 'bits0-1 in 0,1'");
  sub->add_option("--qa-band", r.qa_band, "Band of each QA file")->capture_default_str();
  add_value_rule_options(sub, r.rules, o->rule_texts);
  sub->add_option("--date", o->date, "Date of files whose names carry none (YYYY-MM-DD)");
  sub->add_flag("--dates", o->dates, "Also a line per date: source of the date, observed share, min, mean, max");
  sub->add_flag("--quick", o->quick, "Dates, grid and value rules only, without reading the values");
  sub->add_flag("--json", o->json, "Everything as JSON on standard output");
  return [o, &global] {
    InspectRequest& r = o->request;
    apply_value_rule_options(r.rules, o->rule_texts);
    if (!o->date.empty()) {
      r.rules.date = parse_date_option(o->date, "--date");
    }
    r.read_values = !o->quick;
    const InspectReport report = inspect_stack(r);
    if (o->json) print_json(report);
    else if (!global.quiet) print_text(report, r.rules, r.qa_keep, o->dates);
  };
}

}  // namespace kalends::cli
