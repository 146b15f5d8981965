#include "kalends/inspect.hpp"

#include <ogr_spatialref.h>

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <map>
#include <new>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/qa_pairing.hpp"
#include "kalends/error.hpp"
#include "kalends/qa_rule.hpp"

namespace kalends {

namespace {

// Stack::open's order: a date in the file name, else --date, else the band's own metadata
// (NetCDF time axis, GRIB valid time, description); a file that gives several dates has them
// from its bands.
std::string date_source_of(const Layer& layer, const ValueRules& rules, int layers_in_file) {
  if (layers_in_file > 1) return "band metadata";
  const auto in_name = date_from_name(detail::file_in_connection(layer.path));
  if (in_name && *in_name == layer.time) return "file name";
  if (rules.date && *rules.date == layer.time) return "--date";
  return "band metadata";
}

}  // namespace

InspectReport inspect_stack(const InspectRequest& request) {
  detail::start_gdal();
  std::optional<QaRule> keep_rule = qa_rule_of(request.qa_input, request.qa_keep, request.qa_band);
  const Stack stack = Stack::open(request.input, request.rules);
  std::optional<QaPairing> qa;
  if (keep_rule) qa = pair_qa(stack, *keep_rule, request.qa_input, request.qa_band);

  InspectReport report;
  report.input = request.input;
  report.name = stack.name();
  report.grid = stack.grid();
  report.crs_name = detail::crs_name_of(report.grid.crs_wkt);
  report.time_grid = TimeGrid::build(stack.times());
  std::vector<int> slots = report.time_grid.slot_of_date;
  std::sort(slots.begin(), slots.end());
  report.slots_with_data = int(std::unique(slots.begin(), slots.end()) - slots.begin());
  std::map<std::string, int> layers_in_file;
  for (const Layer& layer : stack.layers()) ++layers_in_file[layer.path];
  for (const Layer& layer : stack.layers())
    report.layers.push_back({layer, date_source_of(layer, request.rules, layers_in_file[layer.path])});
  report.unapplied_scaling = unapplied_scaling(stack);
  report.date_conflict = date_conflict_note(stack);
  report.mixed_names = mixed_names_note(stack);
  if (!request.read_values) return report;

  // Strips of rows, date by date: the working set is one strip and a byte per pixel.
  const Grid& grid = stack.grid();
  const int strip_rows = std::max(1, int(std::min<std::int64_t>(grid.height, (1 << 22) / std::max(1, grid.width))));
  // A damaged file declaring a huge raster (2 KB of 200,000 px a side) is named first: it had
  // been "out of memory: give a smaller --memory budget", which inspect does not have.
  require_readable(stack, 0, 0);
  std::vector<std::uint8_t> ever_observed;
  try {
    ever_observed.assign(std::size_t(grid.width) * grid.height, 0);
  } catch (const std::bad_alloc&) {
    throw Error(request.input, fmt::format("is {} x {} px: too large to count its pixels in this memory; give --quick "
                                           "for its dates and grid alone",
                                           grid.width, grid.height));
  }
  std::vector<float> values;
  std::vector<std::uint32_t> qa_values;
  auto reader = stack.reader();
  std::unique_ptr<StackReader> qa_reader = qa ? qa->stack.reader() : nullptr;
  for (std::size_t k = 0; k < report.layers.size(); ++k) {
    InspectedLayer& out = report.layers[k];
    double sum = 0, low = INFINITY, high = -INFINITY;
    for (int y = 0; y < grid.height; y += strip_rows) {
      const Window w{0, y, grid.width, std::min(strip_rows, grid.height - y)};
      values.resize(w.pixels());
      out.outside_valid_range += reader->read_values(k, w, values.data());
      if (qa_reader) {
        qa_values.resize(w.pixels());
        qa_reader->read_integers(qa->layer_of[k], w, qa_values.data());
      }
      for (std::int64_t p = 0; p < w.pixels(); ++p) {
        const float v = values[p];
        if (!std::isfinite(v)) continue;
        if (qa_reader && !qa->rule.keep(qa_values[p])) {
          ++out.rejected_by_qa;
          continue;
        }
        ++out.observed;
        sum += v;
        low = std::min(low, double(v));
        high = std::max(high, double(v));
        ever_observed[std::size_t(y) * grid.width + p] = 1;
      }
    }
    out.pixels = std::int64_t(grid.width) * grid.height;
    if (out.observed > 0) {
      out.minimum = low;
      out.maximum = high;
      out.mean = sum / double(out.observed);
    }
  }
  report.values_read = true;
  report.pixels_never_observed = std::count(ever_observed.begin(), ever_observed.end(), 0);
  return report;
}

}  // namespace kalends
