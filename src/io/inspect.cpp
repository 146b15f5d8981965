#include "kalends/inspect.hpp"

#include <ogr_spatialref.h>

#include <algorithm>
#include <cmath>
#include <map>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "kalends/error.hpp"
#include "kalends/qa_rule.hpp"

namespace kalends {

namespace {

std::string crs_name_of(const std::string& wkt) {
  if (wkt.empty()) return "";
  OGRSpatialReference srs;
  if (srs.importFromWkt(wkt.c_str()) != OGRERR_NONE) return "(unreadable CRS)";
  std::string name = srs.GetName() ? srs.GetName() : "unnamed CRS";
  const char* authority = srs.GetAuthorityName(nullptr);
  const char* code = srs.GetAuthorityCode(nullptr);
  if (!authority || !code) {
    // A CRS read from WKT without an identifier may still be one the EPSG database knows.
    srs.AutoIdentifyEPSG();
    authority = srs.GetAuthorityName(nullptr);
    code = srs.GetAuthorityCode(nullptr);
  }
  if (authority && code) name += std::string(" (") + authority + ":" + code + ")";
  return name;
}

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
  if (request.qa_input.empty() != request.qa_keep.empty())
    throw UsageError("--keep", request.qa_input.empty() ? "given without a QA stack (--qa)"
                                                        : "a keep rule is required with --qa");
  check_band(request.qa_band, "--qa-band");
  std::optional<QaRule> keep;
  if (!request.qa_keep.empty()) keep = QaRule::parse(request.qa_keep);
  const Stack stack = Stack::open(request.input, request.rules);
  std::optional<Stack> qa_stack;
  std::vector<std::size_t> qa_of;
  if (keep) {
    ValueRules qa_rules;
    qa_rules.band = request.qa_band;
    qa_stack = Stack::open(request.qa_input, qa_rules);
    qa_of = partners_by_date(stack, *qa_stack, "QA");
  }

  InspectReport report;
  report.input = request.input;
  report.name = stack.name();
  report.grid = stack.grid();
  report.crs_name = crs_name_of(report.grid.crs_wkt);
  report.time_grid = TimeGrid::build(stack.times());
  std::vector<int> slots = report.time_grid.slot_of_date;
  std::sort(slots.begin(), slots.end());
  report.slots_with_data = int(std::unique(slots.begin(), slots.end()) - slots.begin());
  std::map<std::string, int> layers_in_file;
  for (const Layer& layer : stack.layers()) ++layers_in_file[layer.path];
  for (const Layer& layer : stack.layers())
    report.layers.push_back({layer, date_source_of(layer, request.rules, layers_in_file[layer.path])});
  report.unapplied_scaling = unapplied_scaling(stack);
  if (!request.read_values) return report;

  // Strips of rows, date by date: the working set is one strip and a byte per pixel.
  const Grid& grid = stack.grid();
  const int strip_rows = std::max(1, int(std::min<std::int64_t>(grid.height, (1 << 22) / std::max(1, grid.width))));
  std::vector<std::uint8_t> ever_observed(std::size_t(grid.width) * grid.height, 0);
  std::vector<float> values;
  std::vector<std::uint32_t> qa;
  auto reader = stack.reader();
  std::unique_ptr<StackReader> qa_reader = qa_stack ? qa_stack->reader() : nullptr;
  for (std::size_t k = 0; k < report.layers.size(); ++k) {
    InspectedLayer& out = report.layers[k];
    double sum = 0, low = INFINITY, high = -INFINITY;
    for (int y = 0; y < grid.height; y += strip_rows) {
      const Window w{0, y, grid.width, std::min(strip_rows, grid.height - y)};
      values.resize(w.pixels());
      out.outside_valid_range += reader->read_values(k, w, values.data());
      if (qa_reader) {
        qa.resize(w.pixels());
        qa_reader->read_integers(qa_of[k], w, qa.data());
      }
      for (std::int64_t p = 0; p < w.pixels(); ++p) {
        const float v = values[p];
        if (!std::isfinite(v)) continue;
        if (qa_reader && !keep->keep(qa[p])) {
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
