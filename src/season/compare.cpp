// kalends compare: quantiles and histograms of synoptic miss, per zone on request, the largest
// anomalies, a per-year summary, and a class raster of how year-specific each pixel is.
//
// Years are summarised by the share of pixel-periods beyond +-1 standardised anomaly: with n
// years a standardised anomaly (sd with ddof 1) cannot exceed (n - 1) / sqrt(n) in size, 1.15
// for three years, so the usual +-1.5 or +-2 would never trigger on short records. The largest
// anomalies are ranked by size in the variable's units, for the same reason.
#include "kalends/compare.hpp"

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <fmt/ranges.h>
#include <map>
#include <optional>
#include <regex>
#include <set>

#include "io/gdal_session.hpp"
#include "io/json_text.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/season.hpp"
#include "kalends/stack.hpp"

namespace kalends {

namespace fs = std::filesystem;

namespace {

std::vector<float> read_band(GDALDataset& ds, int band, const std::string& path) {
  std::vector<float> data(std::size_t(ds.GetRasterXSize()) * ds.GetRasterYSize());
  CPLErrorReset();
  if (ds.GetRasterBand(band)->RasterIO(GF_Read, 0, 0, ds.GetRasterXSize(), ds.GetRasterYSize(),
                                       data.data(), ds.GetRasterXSize(), ds.GetRasterYSize(),
                                       GDT_Float32, 0, 0, nullptr) != CE_None)
    throw InputError(path, "cannot read band " + std::to_string(band) + " (" +
                               detail::gdal_message("read failed") + ")");
  return data;
}

// Linear interpolation between order statistics (numpy.quantile's default).
double quantile(std::vector<float>& sorted, double q) {
  if (sorted.empty()) return NAN;
  const double pos = q * double(sorted.size() - 1);
  const std::size_t lo = std::size_t(std::floor(pos)), hi = std::min(lo + 1, sorted.size() - 1);
  return sorted[lo] + (pos - double(lo)) * (sorted[hi] - sorted[lo]);
}


struct Distribution {
  std::vector<double> quantiles;  // 5, 25, 50, 75, 95 %
  double mean = NAN;
  std::size_t count = 0;
};

Distribution describe(std::vector<float> values) {
  values.erase(std::remove_if(values.begin(), values.end(), [](float v) { return !std::isfinite(v); }),
               values.end());
  std::sort(values.begin(), values.end());
  Distribution d;
  d.count = values.size();
  for (double q : {0.05, 0.25, 0.5, 0.75, 0.95}) d.quantiles.push_back(quantile(values, q));
  double s = 0;
  for (float v : values) s += v;
  d.mean = values.empty() ? NAN : s / double(values.size());
  return d;
}

std::string distribution_json(const Distribution& d) {
  return fmt::format("{{\"count\": {}, \"mean\": {}, \"p05\": {}, \"p25\": {}, \"p50\": {}, \"p75\": {}, \"p95\": {}}}",
                     d.count, detail::json_number(d.mean), detail::json_number(d.quantiles[0]), detail::json_number(d.quantiles[1]),
                     detail::json_number(d.quantiles[2]), detail::json_number(d.quantiles[3]), detail::json_number(d.quantiles[4]));
}

struct Anomaly {
  double standardised = 0, raw = 0;
  int x = 0, y = 0, year = 0;
  std::string period;
  double observed = NAN;  // the share of the period's value resting on observations (fill outputs)
};

// The days each period of a year layer rests on (KALENDS_DAYS_COVERED), band -> days and the
// band's name; empty where the layer is missing or says nothing of its days.
std::map<int, std::pair<double, std::string>> covered_days(const std::string& path) {
  std::map<int, std::pair<double, std::string>> covered;
  std::error_code ec;
  if (!fs::exists(path, ec)) return covered;
  GDALDatasetUniquePtr ds = detail::open_raster(path);
  for (int b = 1; b <= ds->GetRasterCount(); ++b)
    if (const char* days = ds->GetRasterBand(b)->GetMetadataItem("KALENDS_DAYS_COVERED"))
      covered[b] = {std::atof(days), ds->GetRasterBand(b)->GetDescription()};
  return covered;
}

}  // namespace

std::vector<std::string> compare_notes(const CompareSummary& s) {
  std::vector<std::string> notes;
  if (!s.stale_years.empty())
    notes.push_back(fmt::format("left out the anomaly files of {}, outside the synoptic's years ({}): they are not "
                                "this synoptic's",
                                fmt::join(s.stale_years, ", "), s.synoptic_years));
  if (std::isnan(s.median_rmse))
    notes.push_back("no pixel has a synoptic miss: it needs values of one period in two years or more (a synoptic "
                    "of one year is that year)");
  if (!s.partial_periods.empty())
    notes.push_back(fmt::format("left out {} year-period(s) resting on fewer days than in other years (first: {}): "
                                "their anomalies would compare those days with a synoptic of more",
                                s.partial_periods.size(), s.partial_periods.front()));
  if (!s.years_not_ranked.empty())
    notes.push_back(fmt::format("not ranked for the year most beyond 1 sd: {}, with values in fewer than half the "
                                "periods of the fullest year",
                                fmt::join(s.years_not_ranked, ", ")));
  return notes;
}

CompareSummary run_compare(const CompareRequest& request) {
  detail::start_gdal();
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  if (!fs::is_directory(request.seasons_dir))
    throw InputError(request.seasons_dir, "is not a folder of `kalends seasons` outputs");
  // A top of two thousand million had taken 10 s on 20 x 20 px to list what no one reads.
  if (request.top < 0 || request.top > 10000) throw UsageError("--top", "must be 0..10000");
  // A seasons run stopped while publishing leaves a mix of two runs' layers.
  require_not_half_published(request.seasons_dir);
  detail::require_own_text_file((fs::path(request.out_dir) / "compare.json").string(), "\"synoptic_rmse\"");
  detail::require_own_text_file((fs::path(request.out_dir) / "compare.md").string(), "# Where the synoptic layers");
  detail::require_plain_name(request.name);
  CompareSummary summary;
  std::string name = request.name;
  std::vector<std::string> names;  // the layer sets the folder holds
  for (const auto& entry : fs::directory_iterator(request.seasons_dir)) {
    const std::string f = entry.path().filename().string();
    const std::string suffix = "_synoptic_miss.tif";
    if (f.size() > suffix.size() && f.compare(f.size() - suffix.size(), suffix.size(), suffix) == 0)
      names.push_back(f.substr(0, f.size() - suffix.size()));
  }
  if (names.empty()) throw InputError(request.seasons_dir, "holds no *_synoptic_miss.tif (run `kalends seasons` first)");
  std::sort(names.begin(), names.end());
  if (name.empty()) {
    if (names.size() > 1)
      throw UsageError("--name", fmt::format("the folder holds several layer sets ({}); choose one with --name",
                                             fmt::join(names, ", ")));
    name = names.front();
  } else if (std::find(names.begin(), names.end(), name) == names.end()) {
    // It had named a missing file of that set.
    throw UsageError("--name '" + name + "'", fmt::format("the folder holds no such layer set; it holds {}",
                                                          fmt::join(names, ", ")));
  }
  const std::string miss_path = (fs::path(request.seasons_dir) / (name + "_synoptic_miss.tif")).string();
  GDALDatasetUniquePtr miss = detail::open_raster(miss_path);
  const int width = miss->GetRasterXSize(), height = miss->GetRasterYSize();
  const std::vector<float> rmse = read_band(*miss, 1, miss_path);
  const std::vector<float> explained = read_band(*miss, 2, miss_path);
  const std::vector<float> year_share = read_band(*miss, 3, miss_path);
  // The years the synoptic was made from: year files outside them were left by an earlier
  // `kalends seasons` run into the same folder and are anomalies from another synoptic.
  std::optional<std::pair<int, int>> synoptic_years;
  if (const char* years = miss->GetMetadataItem("KALENDS_YEARS")) {
    try {
      synoptic_years = parse_years(years);
      summary.synoptic_years = years;
    } catch (const UsageError&) {
      throw InputError(miss_path, fmt::format("KALENDS_YEARS '{}' is not YYYY-YYYY", years));
    }
  }
  const Grid grid = detail::raster_grid(*miss);  // the class raster's, and what zones must match

  // Histogram of RMSE over 20 equal bins up to the 99th percentile (the rest in the last bin).
  std::vector<float> finite_rmse;
  for (float v : rmse)
    if (std::isfinite(v)) finite_rmse.push_back(v);
  std::sort(finite_rmse.begin(), finite_rmse.end());
  const double top_edge = finite_rmse.empty() ? 1.0 : std::max(1e-12, quantile(finite_rmse, 0.99));
  constexpr int bins = 20;
  std::vector<std::size_t> histogram(bins, 0);
  for (float v : finite_rmse) histogram[std::min(bins - 1, int(v / top_edge * bins))]++;

  // Zones.
  std::map<long, std::pair<std::vector<float>, std::vector<float>>> zones;
  if (!request.zones.empty()) {
    GDALDatasetUniquePtr z = detail::open_raster(request.zones);
    // The same size is not enough: zones of another place or CRS would be summarised silently.
    const Grid zone_grid = detail::raster_grid(*z);
    if (grid.has_geotransform != zone_grid.has_geotransform)
      throw InputError(request.zones, std::string("zone raster ") + (zone_grid.has_geotransform ? "is" : "is not") +
                                          " georeferenced, " + miss_path + (grid.has_geotransform ? " is" : " is not"));
    try {
      require_same_grid(grid, zone_grid, request.zones, miss_path);
    } catch (const InputError& e) {
      throw InputError(request.zones, "zone raster is not on the grid of the layers: " + e.reason());
    }
    const std::vector<float> zone = read_band(*z, 1, request.zones);
    int has_nodata = 0;
    const double nodata = z->GetRasterBand(1)->GetNoDataValue(&has_nodata);
    for (std::size_t i = 0; i < zone.size(); ++i) {
      if (!std::isfinite(zone[i]) || (has_nodata && zone[i] == float(nodata))) continue;
      if (zone[i] != std::round(zone[i]))
        throw InputError(request.zones, fmt::format("zones are whole numbers; found {:g} at column {}, row {}", zone[i],
                                                    i % std::size_t(width), i / std::size_t(width)));
      auto& [r, e] = zones[std::lround(zone[i])];
      r.push_back(rmse[i]);
      e.push_back(explained[i]);
    }
  }

  // Largest standardised anomalies and a per-year summary.
  std::vector<Anomaly> top;
  struct YearStats {
    double sum = 0;
    std::size_t count = 0, defined = 0, below = 0, above = 0;  // defined: a standardised anomaly
    int periods = 0;  // periods with a standardised anomaly at some pixel
  };
  std::map<int, YearStats> per_year;
  const std::regex year_file(std::regex_replace(name, std::regex(R"([.^$|()\[\]{}*+?\\])"), R"(\$&)") +
                             R"(_anomaly_standardised_(\d{4})\.tif)");
  std::vector<std::pair<int, std::string>> anomaly_files;
  for (const auto& entry : fs::directory_iterator(request.seasons_dir)) {
    std::smatch m;
    const std::string f = entry.path().filename().string();
    if (!std::regex_match(f, m, year_file)) continue;
    const int year = std::stoi(m[1]);
    if (synoptic_years && (year < synoptic_years->first || year > synoptic_years->second))
      summary.stale_years.push_back(year);
    else
      anomaly_files.emplace_back(year, entry.path().string());
  }
  std::sort(anomaly_files.begin(), anomaly_files.end());
  std::sort(summary.stale_years.begin(), summary.stale_years.end());
  // Every year the synoptic covers: a year whose layer is gone had been left out of the Years
  // table and the largest anomalies without a word.
  if (synoptic_years)
    for (int year = synoptic_years->first; year <= synoptic_years->second; ++year)
      if (std::none_of(anomaly_files.begin(), anomaly_files.end(), [&](const auto& f) { return f.first == year; }))
        throw InputError((fs::path(request.seasons_dir) / fmt::format("{}_anomaly_standardised_{}.tif", name, year)).string(),
                         fmt::format("missing: the synoptic layers cover {}-{}; run kalends seasons into this folder "
                                     "again",
                                     synoptic_years->first, synoptic_years->second));
  // Every anomaly layer on the synoptic's periods and grid: a folder holding the layers of two
  // seasons runs with different --period (or areas) would be read band against wrong band.
  const std::string mean_path = (fs::path(request.seasons_dir) / (name + "_synoptic_mean.tif")).string();
  GDALDatasetUniquePtr synoptic_mean = detail::open_raster(mean_path);
  const char* synoptic_period = synoptic_mean->GetMetadataItem("KALENDS_PERIOD");
  const std::string period = synoptic_period ? synoptic_period : "";
  auto require_like_the_synoptic = [&](GDALDataset& layer, const std::string& path) {
    const char* p = layer.GetMetadataItem("KALENDS_PERIOD");
    if (layer.GetRasterCount() != synoptic_mean->GetRasterCount() || (p ? p : "") != period ||
        layer.GetRasterXSize() != width || layer.GetRasterYSize() != height)
      throw InputError(path, fmt::format("holds {} periods ({}) of {} x {} px; the synoptic layers here hold {} ({}) of "
                                         "{} x {}: layers of two `kalends seasons` runs in one folder; run seasons "
                                         "into a folder of its own",
                                         layer.GetRasterCount(), p ? p : "no period", layer.GetRasterXSize(),
                                         layer.GetRasterYSize(), synoptic_mean->GetRasterCount(), period, width, height));
  };
  {
    const char* p = miss->GetMetadataItem("KALENDS_PERIOD");
    const char* y = miss->GetMetadataItem("KALENDS_YEARS");
    const char* my = synoptic_mean->GetMetadataItem("KALENDS_YEARS");
    if ((p ? p : "") != period || std::string(y ? y : "") != std::string(my ? my : ""))
      throw InputError(miss_path, fmt::format("is of period {} and years {}; the synoptic layers here are of {} and {}: "
                                              "layers of two `kalends seasons` runs in one folder",
                                              p ? p : "none", y ? y : "none", period, my ? my : "none"));
  }
  // Year-periods resting on fewer days than the same period does in other years (a stack that
  // starts or ends within it, a composite missing): their anomaly compares those days with a
  // synoptic of whole periods. A period every year covers alike (a summers-only stack's May) is
  // compared like with like; a day's difference is the leap year's.
  std::map<int, std::map<int, std::pair<double, std::string>>> coverage;  // year -> band -> days
  std::map<int, double> most_covered;                                     // band -> days
  for (const auto& [year, path] : anomaly_files) {
    coverage[year] = covered_days((fs::path(request.seasons_dir) / fmt::format("{}_year_{}.tif", name, year)).string());
    for (const auto& [band, days] : coverage[year]) most_covered[band] = std::max(most_covered[band], days.first);
  }
  for (const auto& [year, path] : anomaly_files) {
    GDALDatasetUniquePtr ds = detail::open_raster(path);
    const std::string raw_path = (fs::path(request.seasons_dir) / fmt::format("{}_anomaly_{}.tif", name, year)).string();
    GDALDatasetUniquePtr raw = detail::open_raster(raw_path);
    require_like_the_synoptic(*ds, path);
    require_like_the_synoptic(*raw, raw_path);
    YearStats& ys = per_year[year];
    // A period resting on part of its days compares those days with the whole period's
    // synoptic: in a cycle identical every year its anomaly is the seasonal change within the
    // period (a helper measured standardised anomalies of +1.9 there). Left out of the years'
    // shares and the largest anomalies, and said.
    std::set<int> partial;
    for (const auto& [band, days] : coverage[year]) {
      const double most = most_covered[band];
      if (days.first > 0 && days.first < most - std::max(1.0, 0.1 * most)) {
        partial.insert(band);
        summary.partial_periods.push_back(
            fmt::format("{} {} ({:g} days, against {:g} in other years)", year, days.second, days.first, most));
      }
    }
    const std::string observed_path = (fs::path(request.seasons_dir) / fmt::format("{}_observed_{}.tif", name, year)).string();
    std::error_code ec;
    GDALDatasetUniquePtr observed = fs::exists(observed_path, ec) ? detail::open_raster(observed_path) : nullptr;
    if (observed && observed->GetRasterCount() != ds->GetRasterCount()) observed.reset();
    for (int b = 1; b <= ds->GetRasterCount(); ++b) {
      if (partial.count(b)) continue;
      const std::vector<float> z = read_band(*ds, b, path);
      const std::vector<float> a = read_band(*raw, b, raw_path);
      const std::vector<float> o = observed ? read_band(*observed, b, observed_path) : std::vector<float>();
      const std::string period = ds->GetRasterBand(b)->GetDescription();
      ys.periods += std::any_of(z.begin(), z.end(), [](float v) { return std::isfinite(v); });
      for (std::size_t i = 0; i < z.size(); ++i) {
        if (std::isfinite(a[i])) ys.sum += a[i], ys.count++;
        if (!std::isfinite(z[i])) continue;
        ++ys.defined;
        ys.below += z[i] < -1.0f;
        ys.above += z[i] > 1.0f;
        if (request.top > 0 && (top.size() < std::size_t(request.top) || std::abs(a[i]) > std::abs(top.back().raw))) {
          top.push_back({z[i], a[i], int(i % width), int(i / width), year, period, o.empty() ? NAN : double(o[i])});
          std::sort(top.begin(), top.end(), [](const Anomaly& l, const Anomaly& r) {
            return std::abs(l.raw) > std::abs(r.raw);
          });
          if (top.size() > std::size_t(request.top)) top.pop_back();
        }
      }
    }
  }

  // Class raster: how much of each pixel's variance is year-specific.
  const detail::OutputFolder output_folder(request.out_dir);  // removed again if the run fails before writing
  summary.class_path = (fs::path(request.out_dir) / (name + "_year_specific_class.tif")).string();
  {
    detail::OutputSpec spec;
    spec.path = summary.class_path;
    spec.metadata = {{"KALENDS_VERSION", KALENDS_VERSION}, {"KALENDS_INPUT", miss_path}};
    if (!request.command_line.empty()) spec.metadata["KALENDS_COMMAND"] = request.command_line;
    spec.bands = {{"year_specific_class", "",
                   {{"CLASS_MEANINGS", "0: under 25 % of the variance is year-specific, 1: 25-50 %, "
                                       "2: 50-75 %, 3: 75 % or more"}}}};
    std::vector<detail::OutputSpec> specs{spec};
    detail::OutputSet out(std::move(specs), grid, Compression::deflate, 256);
    out.set_keep_unchanged(true);  // the same classes keep their file and its time
    std::vector<float> plane, scratch;
    for (int y = 0; y < height; y += 256) {
      const Window core{0, y, width, std::min(256, height - y)};
      plane.resize(core.pixels());
      for (std::int64_t i = 0; i < core.pixels(); ++i) {
        const float s = year_share[std::size_t(y) * width + i];
        plane[i] = !std::isfinite(s) ? NAN : s < 0.25f ? 0.0f : s < 0.5f ? 1.0f : s < 0.75f ? 2.0f : 3.0f;
      }
      const float* planes[] = {plane.data()};
      out.write(0, core, planes, scratch);
    }
    out.commit();
    summary.files_written += out.written();
    summary.files_unchanged += out.unchanged();
  }

  const Distribution r = describe(rmse), e = describe(explained);
  summary.median_rmse = r.quantiles[2];
  summary.median_explained = e.quantiles[2];
  std::string json = "{\n";
  json += fmt::format("  \"kalends_version\": \"{}\",\n", KALENDS_VERSION);
  json += fmt::format("  \"layers\": \"{}\",\n  \"width\": {},\n  \"height\": {},\n", name, width, height);
  json += fmt::format("  \"synoptic_years\": {},\n  \"stale_years_left_out\": [{}],\n",
                      summary.synoptic_years.empty() ? "null" : "\"" + summary.synoptic_years + "\"",
                      fmt::join(summary.stale_years, ", "));
  json += "  \"synoptic_rmse\": " + distribution_json(r) + ",\n";
  json += "  \"explained_share\": " + distribution_json(e) + ",\n";
  json += fmt::format("  \"rmse_histogram\": {{\"bin_width\": {}, \"counts\": [",
                      detail::json_number(finite_rmse.empty() ? NAN : top_edge / bins));
  for (int b = 0; b < bins; ++b) json += (b ? ", " : "") + std::to_string(histogram[b]);
  json += "]},\n  \"zones\": [";
  bool first = true;
  for (auto& [zone, values] : zones) {
    json += fmt::format("{}\n    {{\"zone\": {}, \"synoptic_rmse\": {}, \"explained_share\": {}}}", first ? "" : ",",
                        zone, distribution_json(describe(values.first)), distribution_json(describe(values.second)));
    first = false;
  }
  json += "],\n  \"years\": [";
  first = true;
  double most_below = -1, most_above = -1;
  // One year: its anomalies are 0 by construction (the synoptic is that year), not a finding.
  const bool one_year = per_year.size() < 2;
  summary.years = int(per_year.size());
  // A year with values in fewer than half the periods the fullest year has (a stack that ends
  // in January) is not ranked: its shares rest on those periods alone, whose anomalies are the
  // season's, not the year's (a helper's one January had "most above +1 sd").
  int most_periods = 0;
  for (const auto& [year, s] : per_year) most_periods = std::max(most_periods, s.periods);
  const auto ranked_year = [&](const YearStats& s) { return 2 * s.periods >= most_periods; };
  for (const auto& [year, s] : per_year) {
    const double mean = s.count && !one_year ? s.sum / double(s.count) : NAN;
    const bool ranked = ranked_year(s);
    json += fmt::format("{}\n    {{\"year\": {}, \"periods\": {}, \"pixel_periods\": {}, \"ranked\": {}, "
                        "\"mean_anomaly\": {}, \"share_below_minus_1_sd\": {}, \"share_above_1_sd\": {}}}",
                        first ? "" : ",", year, s.periods, s.defined, ranked ? "true" : "false", detail::json_number(mean),
                        detail::json_number(s.defined ? double(s.below) / s.defined : NAN),
                        detail::json_number(s.defined ? double(s.above) / s.defined : NAN));
    first = false;
    if (!ranked) {
      summary.years_not_ranked.push_back(fmt::format("{} ({} of {} periods)", year, s.periods, most_periods));
      continue;
    }
    const double below = s.defined ? double(s.below) / s.defined : 0, above = s.defined ? double(s.above) / s.defined : 0;
    // A year is named only where some pixel-period lies beyond 1 sd (none can with two years).
    if (below > std::max(most_below, 0.0)) most_below = below, summary.year_most_below = std::to_string(year);
    if (above > std::max(most_above, 0.0)) most_above = above, summary.year_most_above = std::to_string(year);
  }
  json += "],\n  \"largest_anomalies\": [";
  for (std::size_t i = 0; i < top.size(); ++i)
    json += fmt::format("{}\n    {{\"x\": {}, \"y\": {}, \"year\": {}, \"period\": \"{}\", \"standardised\": {}, \"anomaly\": {}, "
                        "\"observed_share\": {}}}",
                        i ? "," : "", top[i].x, top[i].y, top[i].year, top[i].period,
                        detail::json_number(top[i].standardised), detail::json_number(top[i].raw),
                        detail::json_number(top[i].observed));
  json += "],\n  \"partial_periods_left_out\": [";
  for (std::size_t i = 0; i < summary.partial_periods.size(); ++i)
    json += (i ? ", \"" : "\"") + detail::json_escape(summary.partial_periods[i]) + "\"";
  json += fmt::format("],\n  \"year_most_below\": {},\n  \"year_most_above\": {},\n",
                      summary.year_most_below.empty() ? "null" : summary.year_most_below,
                      summary.year_most_above.empty() ? "null" : summary.year_most_above);
  // The file name alone, so the folder can be moved.
  json += fmt::format("  \"class_raster\": \"{}\"\n}}\n", fs::path(summary.class_path).filename().string());
  summary.json_path = (fs::path(request.out_dir) / "compare.json").string();
  ++(detail::write_text_atomically(summary.json_path, json) ? summary.files_written : summary.files_unchanged);

  std::string md = fmt::format("# Where the synoptic layers of `{}` mislead\n\n", name);
  md += "Synoptic miss per pixel: RMSE between the year-specific and the synoptic values, and the share of the "
        "year-specific variance the synoptic cycle explains.\n\n";
  md += "| statistic | mean | 5 % | 25 % | median | 75 % | 95 % |\n|---|---|---|---|---|---|---|\n";
  for (const auto& [label, d] : {std::pair{"synoptic RMSE", r}, std::pair{"explained share", e}})
    md += fmt::format("| {} | {:.4g} | {:.4g} | {:.4g} | {:.4g} | {:.4g} | {:.4g} |\n", label, d.mean, d.quantiles[0],
                      d.quantiles[1], d.quantiles[2], d.quantiles[3], d.quantiles[4]);
  md += fmt::format("\nHistogram of the synoptic RMSE (bins of {:.4g}; the last also holds everything above the 99th "
                    "percentile):\n\n| from | to | pixels |\n|---|---|---|\n",
                    top_edge / bins);
  for (int b = 0; b < bins; ++b)
    md += fmt::format("| {:.4g} | {} | {} |\n", top_edge * b / bins,
                      b + 1 < bins ? fmt::format("{:.4g}", top_edge * (b + 1) / bins) : std::string("and above"),
                      histogram[std::size_t(b)]);
  if (!summary.stale_years.empty())
    md += fmt::format("\nLeft out: the anomaly files of {}, outside the synoptic's years ({}): found in the folder "
                      "(an earlier `kalends seasons` run's, or copied in), they are not this synoptic's.\n",
                      fmt::join(summary.stale_years, ", "), summary.synoptic_years);
  if (!summary.partial_periods.empty())
    md += fmt::format("\nLeft out of the years' shares and the largest anomalies: {} year-period{} resting on fewer "
                      "days than in other years{} ({}{}): {} anomal{} compare those days with a synoptic of more.\n",
                      summary.partial_periods.size(), summary.partial_periods.size() == 1 ? "" : "s", "",
                      fmt::join(summary.partial_periods.begin(),
                                summary.partial_periods.begin() + std::ptrdiff_t(std::min<std::size_t>(5, summary.partial_periods.size())), ", "),
                      summary.partial_periods.size() > 5 ? ", ..." : "",
                      summary.partial_periods.size() == 1 ? "its" : "their",
                      summary.partial_periods.size() == 1 ? "y would" : "ies would");
  md += "\n## Years\n\n| year | periods | pixel-periods | mean anomaly | share below -1 sd | share above +1 sd |\n"
        "|---|---|---|---|---|---|\n";
  auto number_or_dash = [](double v, const char* format) {
    return std::isfinite(v) ? fmt::format(fmt::runtime(format), v) : std::string("-");
  };
  for (const auto& [year, s] : per_year)
    md += fmt::format("| {}{} | {} | {} | {} | {} | {} |\n", year, ranked_year(s) ? "" : " (not ranked)",
                      s.periods, s.defined,
                      number_or_dash(s.count && !one_year ? s.sum / double(s.count) : NAN, "{:+.4f}"),
                      number_or_dash(s.defined ? 100.0 * double(s.below) / s.defined : NAN, "{:.1f} %"),
                      number_or_dash(s.defined ? 100.0 * double(s.above) / s.defined : NAN, "{:.1f} %"));
  if (!summary.years_not_ranked.empty())
    md += fmt::format("\nNot ranked for the year with most pixel-periods beyond 1 sd: {}, with values in fewer than "
                      "half the periods of the fullest year: their shares rest on those periods alone.\n",
                      fmt::join(summary.years_not_ranked, ", "));
  if (per_year.size() >= 2 && per_year.size() <= 3) {
    const double n = double(per_year.size());
    md += fmt::format("\nWith {} years a standardised anomaly cannot exceed (n - 1) / sqrt(n) = {:.2f} in size{}: read "
                      "the mean anomaly and the synoptic RMSE.\n",
                      per_year.size(), (n - 1) / std::sqrt(n), per_year.size() == 2 ? ", so none passes 1 sd" : "");
  }
  if (!zones.empty()) {
    md += "\n## Zones\n\n| zone | pixels with a value | median synoptic RMSE | median explained share |\n|---|---|---|---|\n";
    for (auto& [zone, values] : zones) {
      const Distribution zr = describe(values.first), ze = describe(values.second);
      md += fmt::format("| {} | {} | {:.4g} | {:.4g} |\n", zone, zr.count, zr.quantiles[2], ze.quantiles[2]);
    }
  }
  md += "\n## Largest anomalies\n\n| x | y | year | period | standardised | anomaly | observed share |\n"
        "|---|---|---|---|---|---|---|\n";
  for (const Anomaly& a : top)
    md += fmt::format("| {} | {} | {} | {} | {:+.2f} | {:+.4f} | {} |\n", a.x, a.y, a.year, a.period, a.standardised, a.raw,
                      number_or_dash(a.observed, "{:.2f}"));
  if (std::any_of(top.begin(), top.end(), [](const Anomaly& a) { return std::isfinite(a.observed); }))
    md += "\nObserved share: of the days behind the period's value, those with an observation (fill flag 0); a "
          "large anomaly on a small share rests on a few composites (or on filled values).\n";
  md += fmt::format("\nClass raster: `{}` (0: under 25 % of the variance is year-specific, 1: 25-50 %, 2: 50-75 %, 3: 75 % or more). "
                    "It is a share of each pixel's own variance: a season that comes weeks earlier or later from year to "
                    "year can still be class 0, where the seasonal swing dwarfs the shift, and a flat pixel of noise is "
                    "class 3, where there is nothing but year-to-year change; read it with the synoptic RMSE above, in "
                    "the input's unit.\n",
                    fs::path(summary.class_path).filename().string());
  summary.markdown_path = (fs::path(request.out_dir) / "compare.md").string();
  ++(detail::write_text_atomically(summary.markdown_path, md) ? summary.files_written : summary.files_unchanged);
  return summary;
}

}  // namespace kalends
