#include "validate/validate.hpp"

#include <gdal_alg.h>
#include <gdal_priv.h>

#include <algorithm>
#include <exception>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <fmt/format.h>
#include <limits>
#include <map>
#include <numeric>
#include <random>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/json_text.hpp"
#include "io/output_set.hpp"
#include "io/qa_pairing.hpp"
#include "kalends/error.hpp"
#include "kalends/percent.hpp"
#include "kalends/fill.hpp"
#include "kalends/time_grid.hpp"

namespace kalends {

namespace {

namespace fs = std::filesystem;

// A date x row x col cube of floats, NaN = missing.
struct Cube {
  int dates = 0, height = 0, width = 0;
  std::vector<float> v;
  std::size_t plane() const { return std::size_t(height) * width; }
  float* at(int t) { return v.data() + std::size_t(t) * plane(); }
  const float* at(int t) const { return v.data() + std::size_t(t) * plane(); }
};

// GDALFillNodata (inverse-distance interpolation from the edges of each hole, then no
// smoothing) of one plane, search distance the whole raster (its diagonal: max(width, height)
// had left cells unfilled where a date's only data sat in a corner): GDAL's spatial-only fill.
std::vector<float> gdal_fill_nodata(const float* plane, int width, int height) {
  GDALDriver* mem = GetGDALDriverManager()->GetDriverByName("MEM");
  GDALDatasetUniquePtr ds(mem->Create("", width, height, 1, GDT_Float32, nullptr));
  GDALRasterBand* band = ds->GetRasterBand(1);
  band->SetNoDataValue(NAN);
  std::vector<float> out(plane, plane + std::size_t(width) * height);
  if (band->RasterIO(GF_Write, 0, 0, width, height, out.data(), width, height, GDT_Float32, 0, 0,
                     nullptr) != CE_None)
    throw Error("validate", "GDAL could not write a memory raster");
  if (std::none_of(out.begin(), out.end(), [](float x) { return std::isfinite(x); })) return out;
  // Its work rasters in memory: by default GDAL writes them as GeoTIFFs in the current folder
  // (CPL_TMPDIR), where a killed run left them, and where it cannot write the baseline had come
  // out empty (coverage 0, exit 0).
  char** options = CSLSetNameValue(nullptr, "TEMP_FILE_DRIVER", "MEM");
  CPLErrorReset();
  const CPLErr filled = GDALFillNodata(band, nullptr, std::ceil(std::hypot(double(width), double(height))) + 1, 0, 0,
                                       options, nullptr, nullptr);
  CSLDestroy(options);
  if (filled != CE_None) throw Error("validate", detail::gdal_message("GDAL's FillNodata baseline failed"));
  if (band->RasterIO(GF_Read, 0, 0, width, height, out.data(), width, height, GDT_Float32, 0, 0,
                     nullptr) != CE_None)
    throw Error("validate", "GDAL could not read a memory raster");
  return out;
}

void write_plane(const std::string& path, const float* plane, const Grid& grid, const std::string& date) {
  GDALDriver* gtiff = GetGDALDriverManager()->GetDriverByName("GTiff");
  char** options = nullptr;
  options = CSLSetNameValue(options, "COMPRESS", "DEFLATE");
  CPLErrorReset();
  GDALDatasetUniquePtr ds(gtiff->Create(path.c_str(), grid.width, grid.height, 1, GDT_Float32, options));
  CSLDestroy(options);
  if (!ds) throw detail::write_failure(path, detail::gdal_message("cannot create"));
  if (grid.pixel_is_point) ds->SetMetadataItem(GDALMD_AREA_OR_POINT, GDALMD_AOP_POINT);  // as the input
  if (grid.has_geotransform) {
    double gt[6];
    std::copy(grid.geotransform.begin(), grid.geotransform.end(), gt);
    ds->SetGeoTransform(gt);
  }
  if (!grid.crs_wkt.empty()) ds->SetProjection(grid.crs_wkt.c_str());
  ds->SetMetadataItem("KALENDS_DATE", date.c_str());
  GDALRasterBand* band = ds->GetRasterBand(1);
  band->SetNoDataValue(NAN);
  if (band->RasterIO(GF_Write, 0, 0, grid.width, grid.height, const_cast<float*>(plane), grid.width,
                     grid.height, GDT_Float32, 0, 0, nullptr) != CE_None)
    throw detail::write_failure(path, detail::gdal_message("cannot write"));
  // The data and header go out at the close: a file-size limit or a full disk shows there
  // (the fill had then read the cut file and called it damaged input, exit 2), and a header
  // that did not fit goes to a side file (under a memory limit).
  ds.reset();
  if (CPLGetLastErrorType() == CE_Failure)
    throw detail::write_failure(path, "cannot write (" + detail::gdal_message("unknown reason") + ")");
  detail::require_header_in_file(path, path);
}

Cube read_band(const std::vector<std::string>& paths, int band, int width, int height) {
  Cube c{int(paths.size()), height, width, {}};
  c.v.resize(std::size_t(c.dates) * c.plane());
  for (int t = 0; t < c.dates; ++t) {
    GDALDatasetUniquePtr ds = detail::open_raster(paths[t]);
    if (ds->GetRasterBand(band)->RasterIO(GF_Read, 0, 0, width, height, c.at(t), width, height,
                                          GDT_Float32, 0, 0, nullptr) != CE_None)
      throw InputError(paths[t], detail::gdal_message("cannot read"));
  }
  return c;
}

struct Accumulator {
  std::int64_t cells = 0, covered = 0, within = 0, within_95 = 0, with_sd = 0;
  double se = 0, ae = 0, e = 0, t = 0, t2 = 0, z2 = 0;
  void add(double estimate, double truth, double sd) {
    ++cells;
    if (!std::isfinite(estimate)) return;
    ++covered;
    const double err = estimate - truth;
    se += err * err;
    ae += std::abs(err);
    e += err;
    t += truth;
    t2 += truth * truth;
    // The three calibration figures share one denominator: the cells given a value and an sd
    // (whittaker gives none where a pixel has fewer than 5 observations).
    if (std::isfinite(sd) && sd > 0) {
      ++with_sd;
      within += std::abs(err) <= sd;
      within_95 += std::abs(err) <= 1.96 * sd;  // the normal's 97.5 % quantile, as documented (1.959964)
      z2 += (err / sd) * (err / sd);
    }
  }
  Score score(const std::string& name) const {
    Score s;
    s.name = name;
    s.cells = cells;
    s.covered = covered;
    s.coverage = cells ? double(covered) / double(cells) : 0;
    if (covered > 0) {
      const double n = double(covered);
      s.rmse = std::sqrt(se / n);
      s.mae = ae / n;
      s.bias = e / n;
      const double sst = t2 - t * t / n;
      s.r2 = sst > 0 ? 1.0 - se / sst : NAN;
      s.within_one_sd = with_sd > 0 ? double(within) / double(with_sd) : -1;
      s.within_95_interval = with_sd > 0 ? double(within_95) / double(with_sd) : -1;
      s.rms_error_over_sd = with_sd > 0 ? std::sqrt(z2 / double(with_sd)) : -1;
    } else {
      s.rmse = s.mae = s.bias = s.r2 = NAN;
    }
    return s;
  }
};

const char* gap_classes[] = {"gap <= 48 days", "gap 49-96 days", "gap 97-365 days",
                             "gap > 365 days or open-ended", "pixel never observed"};
const char* neighbourhood_classes[] = {"neighbourhood < 25 % missing", "25-50 % missing",
                                       "50-75 % missing", "75-99 % missing", "100 % missing"};



std::string score_json(const Score& s, const std::string& indent) {
  std::string j = fmt::format(
      "{{\"name\": \"{}\", \"baseline\": {}, \"cells\": {}, \"covered\": {}, \"coverage\": {}, "
      "\"rmse\": {}, \"mae\": {}, \"bias\": {}, \"r2\": {}",
      detail::json_escape(s.name), s.baseline ? "true" : "false", s.cells, s.covered, detail::json_number(s.coverage),
      detail::json_number(s.rmse), detail::json_number(s.mae), detail::json_number(s.bias), detail::json_number(s.r2));
  // A method's sd scores are always there (null where no withheld cell got an sd); baselines have none.
  const auto sd_score = [](double v) { return v >= 0 ? detail::json_number(v) : std::string("null"); };
  if (!s.baseline)
    j += fmt::format(", \"within_one_sd\": {}, \"within_95_interval\": {}, \"rms_error_over_sd\": {}",
                     sd_score(s.within_one_sd), sd_score(s.within_95_interval), sd_score(s.rms_error_over_sd));
  if (!s.parameters.empty()) j += ", \"parameters\": " + detail::json_parameters(s.parameters);
  if (!s.baseline) j += ", \"series_not_fitted\": " + detail::json_counts(s.not_fitted);
  for (const auto* part : {&s.by_gap, &s.by_neighbourhood}) {
    if (part->empty()) continue;
    j += fmt::format(",\n{}  \"{}\": [", indent, part == &s.by_gap ? "by_gap_length" : "by_neighbourhood_missing");
    for (std::size_t i = 0; i < part->size(); ++i)
      j += fmt::format("{}\n{}    {}", i ? "," : "", indent,
                       score_json((*part)[i].second, indent + "    "));
    j += "]";
  }
  return j + "}";
}

// A CSV cell: the shortest text that reads back as the same float; empty where none.
std::string csv_number(float v) { return std::isfinite(v) ? fmt::format("{}", v) : std::string(); }

// The pixels shown in OUT/series.csv: most withheld values first (ties in raster order), each at
// least a quarter of the shorter side from those taken, so that they show different places;
// closer ones only when too few are that far apart. Every one keeps an observation, so a curve
// has something to fit.
std::vector<std::size_t> series_pixels(const std::vector<std::uint8_t>& withheld, const Cube& held, int wanted) {
  const std::size_t plane = held.plane();
  std::vector<std::pair<int, std::size_t>> ranked;  // (-withheld count, pixel)
  for (std::size_t p = 0; p < plane; ++p) {
    int count = 0;
    bool kept = false;
    for (int t = 0; t < held.dates; ++t) {
      count += withheld[std::size_t(t) * plane + p];
      kept |= std::isfinite(held.at(t)[p]) != 0;
    }
    if (count > 0 && kept) ranked.emplace_back(-count, p);
  }
  std::sort(ranked.begin(), ranked.end());
  std::vector<std::size_t> chosen;
  const int apart = (std::min(held.width, held.height) + 3) / 4;  // at least a quarter
  for (int spacing : {apart, 0})
    for (const auto& [count, p] : ranked) {
      if (int(chosen.size()) >= wanted) return chosen;
      const int x = int(p % held.width), y = int(p / held.width);
      const bool far = std::all_of(chosen.begin(), chosen.end(), [&](std::size_t q) {
        return q != p && std::max(std::abs(int(q % held.width) - x), std::abs(int(q / held.width) - y)) >= spacing;
      });
      if (far && std::find(chosen.begin(), chosen.end(), p) == chosen.end()) chosen.push_back(p);
    }
  return chosen;
}

}  // namespace

std::string withhold_shortfall(const ValidateReport& report, double asked) {
  // Within 1 % of the goal is the goal: the last mask is cut where the goal is met.
  if (report.withheld >= report.withhold_goal * 99 / 100) return "";
  return fmt::format("{:.1f} % of the observed values were withheld, not the {:g} % asked for: the transplant "
                     "stops after 50 rounds of a mask laid over each date, and the other dates' masks covered no "
                     "more in them (scores rest on fewer cells, and on shorter gaps, than asked)",
                     100.0 * double(report.withheld) / double(std::max<std::int64_t>(1, report.observed)), 100 * asked);
}

std::string gaps_unlike_the_stacks(const ValidateReport& report) {
  // Of the cells in pixels observed at least once: a pixel never observed (sea, outside a
  // boundary) has nothing to withhold, and its cells had hidden the note on a coast.
  const auto share_long = [](const std::array<std::int64_t, 5>& cells) {
    const std::int64_t all = cells[0] + cells[1] + cells[2] + cells[3];
    return all > 0 ? double(cells[1] + cells[2]) / double(all) : 0.0;
  };
  const double own = share_long(report.own_gap_cells), withheld = share_long(report.withheld_gap_cells);
  // Common practice, no source: a difference of two to one in a share of a fifth or more.
  if (own < 0.2 || own < 2 * withheld) return "";
  return fmt::format("the stack's own gaps are longer than those withheld: {:.0f} % of its missing cells (in pixels "
                     "observed at least once) lie in gaps "
                     "of 49-365 days, against {:.0f} % of the withheld cells (a transplanted mask can withhold only "
                     "what was observed, and a season cloudy every year has little); the scores describe shorter "
                     "gaps than most of the stack's, so read the rows by gap length",
                     100 * own, 100 * withheld);
}

ValidateReport run_validate(const ValidateRequest& request) {
  detail::start_gdal();
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  if (!(request.withhold > 0 && request.withhold < 1))
    throw UsageError("--withhold", "must lie strictly between 0 and 1");
  if (request.methods.empty()) throw UsageError("--methods", "name at least one method");
  if (request.series_pixels < 0) throw UsageError("--series", "must be 0 or more");
  if (request.neighbourhood_radius < 1 || request.neighbourhood_radius > 1000)
    throw UsageError("--radius", fmt::format("{}: must be 1 to 1000 pixels", request.neighbourhood_radius));
  std::map<std::string, MethodParameters> parameters;
  for (const std::string& m : request.methods) {
    if (parameters.count(m)) throw UsageError("--methods", "'" + m + "' is named twice");
    MethodOptions o = request.method;
    o.method = m;
    // Unknown names and bad options fail here, before any work. The method is named by
    // --methods here, not fill's --method.
    try {
      parameters[m] = make_fill_method(o)->parameters();
      // The engine's year-by-year filling changes what a method scores, so the report names it.
      if (o.reach_days > 0) parameters[m]["reach"] = fmt::format("{:g}", o.reach_days);
    } catch (const UsageError& e) {
      if (e.where() != "--method") throw;
      throw UsageError("--methods", e.reason());
    }
  }
  // Its outputs replace only their like: a user's file under one of these names is kept.
  detail::require_own_text_file((fs::path(request.out_dir) / "report.json").string(), "\"withheld\"");
  detail::require_own_text_file((fs::path(request.out_dir) / "report.md").string(), "# kalends validate");
  detail::require_own_text_file((fs::path(request.out_dir) / "series.csv").string(), "column,row,date,truth,withheld");
  const std::optional<QaRule> keep_rule = qa_rule_of(request.qa_input, request.qa_keep, request.qa_band);
  const Stack stack = Stack::open(request.input, request.rules);
  std::optional<QaPairing> qa;
  if (keep_rule) qa = pair_qa(stack, *keep_rule, request.qa_input, request.qa_band);
  detail::require_out_apart_from(stack, request.out_dir, "input");
  if (qa) detail::require_out_apart_from(qa->stack, request.out_dir, "QA");
  const int dates = int(stack.layers().size());
  if (dates < 3) throw InputError(request.input, "validation needs at least 3 dates");
  const Window area = area_of(stack.grid().width, stack.grid().height, request.subset, "--subset");
  const Grid grid = window_grid(stack.grid(), area);
  Cube truth{dates, grid.height, grid.width, {}};
  if (double(dates) * truth.plane() > 4e8)
    throw InputError(request.input, fmt::format("too large to validate in memory ({} dates of {} x {} px, over 4e8 "
                                                "pixel-dates); validate a part of the area with --subset",
                                                dates, grid.width, grid.height));
  // The truth, the withheld stack and the five baselines are held whole, beside each fill's
  // blocks: about 36 bytes a pixel-date (33 measured on 1200 x 1000 px x 46 dates). A budget the
  // user chose that cannot hold them is refused now, not exceeded without a word.
  if (const std::int64_t whole = std::int64_t(dates) * std::int64_t(truth.plane()) * 36;
      request.memory_ceiling == 0 && whole > request.memory_bytes)
    throw UsageError("--memory", fmt::format("budget of {} MiB is too small: validate holds the whole stack in memory "
                                             "(about {} MiB for {} dates of {} x {} px) beside each fill's blocks; "
                                             "give well over {} MiB (each fill's blocks come on top), or validate a "
                                             "part of the area with --subset",
                                             request.memory_bytes >> 20, (whole >> 20) + 1, dates, grid.width,
                                             grid.height, (whole >> 20) + 1));
  truth.v.resize(std::size_t(dates) * truth.plane());
  const std::size_t plane = truth.plane();
  // A value the QA rule rejects is missing, as in a fill with the same rule: never scored, and
  // part of its date's cloud pattern.
  std::int64_t masked_by_qa = 0;
  {
    auto reader = stack.reader();
    auto qa_reader = qa ? qa->stack.reader() : nullptr;
    std::vector<std::uint32_t> qa_plane(qa ? plane : 0);
    for (int t = 0; t < dates; ++t) {
      float* values = truth.at(t);
      reader->read_values(std::size_t(t), area, values);
      if (!qa) continue;
      qa_reader->read_integers(qa->layer_of[std::size_t(t)], area, qa_plane.data());
      for (std::size_t i = 0; i < plane; ++i)
        if (std::isfinite(values[i]) && !qa->rule.keep(qa_plane[i])) {
          values[i] = NAN;
          ++masked_by_qa;
        }
    }
  }

  // Transplant: the missing-value mask of a random other date j over date k, until the share
  // of observed cells asked for is withheld.
  std::mt19937_64 rng(request.seed);
  std::vector<std::int64_t> missing_of(dates, 0);
  std::int64_t observed = 0;
  for (int t = 0; t < dates; ++t)
    for (std::size_t i = 0; i < plane; ++i) {
      const bool ok = std::isfinite(truth.at(t)[i]);
      observed += ok;
      missing_of[t] += !ok;
    }
  if (std::all_of(missing_of.begin(), missing_of.end(), [](std::int64_t m) { return m == 0; }))
    throw InputError(request.input, "no date has missing values: there is no cloud pattern to "
                                    "transplant");
  Cube held = truth;
  std::vector<std::uint8_t> withheld(truth.v.size(), 0);
  const std::int64_t goal = std::int64_t(request.withhold * double(observed));
  std::int64_t count = 0;
  int masks = 0;
  std::vector<int> order(dates);
  std::iota(order.begin(), order.end(), 0);
  for (int pass = 0; pass < 50 && count < goal; ++pass) {
    std::shuffle(order.begin(), order.end(), rng);
    for (int k : order) {
      if (count >= goal) break;
      std::uniform_int_distribution<int> pick(0, dates - 2);
      int j = pick(rng);
      if (j >= k) ++j;
      if (missing_of[j] == 0) continue;
      const std::int64_t before = count;
      for (std::size_t i = 0; i < plane && count < goal; ++i)
        if (!std::isfinite(truth.at(j)[i]) && std::isfinite(held.at(k)[i])) {
          held.at(k)[i] = NAN;
          withheld[std::size_t(k) * plane + i] = 1;
          ++count;
        }
      masks += count > before;  // a mask that withheld nothing is not counted as transplanted
    }
  }

  if (count == 0)
    throw InputError(request.input, "every date misses the same cells (a fixed mask such as sea or "
                                    "the area outside a boundary), so no other date's mask withholds an "
                                    "observed value: there is nothing to score");

  const std::vector<std::size_t> shown = series_pixels(withheld, held, request.series_pixels);
  // Each curve of OUT/series.csv: the values and sds of the shown pixels, date by date.
  std::vector<std::pair<std::string, std::vector<float>>> curves;
  auto keep_curve = [&](const std::string& label, const Cube& estimate, const Cube* sd) {
    std::vector<float> v, s;
    for (std::size_t p : shown)
      for (int t = 0; t < dates; ++t) {
        v.push_back(estimate.at(t)[p]);
        s.push_back(sd ? sd->at(t)[p] : NAN);
      }
    curves.emplace_back(label, std::move(v));
    if (sd) curves.emplace_back(label + "_sd", std::move(s));
  };

  // The withheld stack on disk, for the methods (run as `kalends fill` would run them).
  // OUT/work is validate's own (a marker file says so): an earlier run's is replaced, a folder of
  // that name the user keeps there is not touched.
  const fs::path work = fs::path(request.out_dir) / "work";
  const fs::path marker = work / ".made-by-kalends-validate";
  std::error_code ec;
  const bool out_existed = fs::exists(request.out_dir, ec);
  // Held until the reports are written: a second validate (or any command) into the same
  // folder had rebuilt work/ under this one, and both failed.
  const detail::OutputFolder output_folder(request.out_dir);
  // A run stopped while it made work/ leaves folders and its marker's temporary file alone:
  // that is ours too (every later run had been refused).
  const auto only_our_start = [&] {
    for (auto it = fs::recursive_directory_iterator(work, ec); !ec && it != fs::recursive_directory_iterator();
         it.increment(ec))
      if (!it->is_directory() && it->path().filename().string().find("made-by-kalends-validate") == std::string::npos)
        return false;
    return !ec;
  };
  if (fs::exists(work, ec) && !fs::exists(marker, ec) && !fs::is_empty(work, ec) && !only_our_start())
    throw UsageError("--out", "'" + work.string() + "' exists and was not made by kalends validate, which works "
                              "there: move it, or give another --out");
  fs::remove_all(work, ec);
  // A run that fails from here on (a fill's budget too small, a full disk before the marker is
  // written) leaves no withheld stack behind, nor the --out folder it made: an unmarked work/
  // had been refused by every later run.
  struct RemoveWorkOnFailure {
    fs::path work, out;
    bool keep, out_existed;
    int failures_at_start = std::uncaught_exceptions();
    ~RemoveWorkOnFailure() {
      if (keep || std::uncaught_exceptions() <= failures_at_start) return;
      std::error_code ignored;
      fs::remove_all(work, ignored);
      if (!out_existed && fs::is_empty(out, ignored)) fs::remove(out, ignored);
    }
  } remove_work_on_failure{work, request.out_dir, request.keep_work, out_existed};
  fs::create_directories(work, ec);
  if (ec) throw detail::write_failure(work.string(), "cannot create: " + ec.message());
  detail::write_text_atomically(marker.string(), "kalends validate works in this folder and removes it\n");
  fs::create_directories(work / "input", ec);
  if (ec) throw detail::write_failure(work.string(), "cannot create: " + ec.message());
  const std::string name = stack.name().empty() ? "layer" : stack.name();
  for (int t = 0; t < dates; ++t) {
    const std::string label = stack.layers()[t].time.label();
    write_plane((work / "input" / (name + "_" + label + ".tif")).string(), held.at(t), grid,
                stack.layers()[t].time.iso());
  }

  // Breakdown classes of every withheld cell.
  std::vector<double> days(dates);
  for (int t = 0; t < dates; ++t) days[t] = stack.layers()[t].time.days();
  std::vector<std::uint8_t> gap_class(truth.v.size(), 0), hood_class(truth.v.size(), 0);
  std::array<std::int64_t, 5> own_gap_cells{}, withheld_gap_cells{};
  {
    const int r = request.neighbourhood_radius;
    for (int t = 0; t < dates; ++t) {
      // Summed-area table of missing cells on this date of the withheld stack.
      std::vector<std::int64_t> sat(std::size_t(grid.height + 1) * (grid.width + 1), 0);
      const auto S = [&](int a, int b) -> std::int64_t& { return sat[std::size_t(a) * (grid.width + 1) + b]; };
      for (int y = 0; y < grid.height; ++y)
        for (int x = 0; x < grid.width; ++x)
          S(y + 1, x + 1) = !std::isfinite(held.at(t)[std::size_t(y) * grid.width + x]) + S(y, x + 1) +
                            S(y + 1, x) - S(y, x);
      for (int y = 0; y < grid.height; ++y)
        for (int x = 0; x < grid.width; ++x) {
          const std::size_t i = std::size_t(t) * plane + std::size_t(y) * grid.width + x;
          if (!withheld[i]) continue;
          const int y0 = std::max(0, y - r), y1 = std::min(grid.height, y + r + 1);
          const int x0 = std::max(0, x - r), x1 = std::min(grid.width, x + r + 1);
          const double share = double(S(y1, x1) - S(y0, x1) - S(y1, x0) + S(y0, x0)) /
                               double((y1 - y0) * (x1 - x0));
          hood_class[i] = share >= 1.0 ? 4 : share >= 0.75 ? 3 : share >= 0.5 ? 2 : share >= 0.25 ? 1 : 0;
        }
    }
    // The class of each `wanted` cell by the gap it lies in on `stack`: the days between the
    // pixel's observations before and after it.
    const auto classify_gaps = [&](const Cube& stack, const auto& wanted, const auto& assign) {
      for (std::size_t p = 0; p < plane; ++p) {
        int previous = -1;
        std::vector<int> next(dates, -1);
        for (int t = dates - 1, n = -1; t >= 0; --t) {
          next[t] = n;
          if (std::isfinite(stack.at(t)[p])) n = t;
        }
        bool any = false;
        for (int t = 0; t < dates; ++t) any |= std::isfinite(stack.at(t)[p]) != 0;
        for (int t = 0; t < dates; ++t) {
          const std::size_t i = std::size_t(t) * plane + p;
          if (wanted(i)) {
            if (!any) {
              assign(i, 4);
            } else if (previous < 0 || next[t] < 0) {
              assign(i, 3);
            } else {
              const double g = days[next[t]] - days[previous];
              assign(i, g <= 48 ? 0 : g <= 96 ? 1 : g <= 365 ? 2 : 3);
            }
          }
          if (std::isfinite(stack.at(t)[p])) previous = t;
        }
      }
    };
    classify_gaps(held, [&](std::size_t i) { return withheld[i] != 0; },
                  [&](std::size_t i, int c) { gap_class[i] = std::uint8_t(c); });
    // The stack's own gaps, to say where the withheld ones are not like them: a mask can only
    // withhold what was observed, so a season that is cloudy every year is scored little.
    classify_gaps(truth, [&](std::size_t i) { return !std::isfinite(truth.v[i]); },
                  [&](std::size_t, int c) { ++own_gap_cells[std::size_t(c)]; });
    for (std::size_t i = 0; i < truth.v.size(); ++i)
      if (withheld[i]) ++withheld_gap_cells[gap_class[i]];
  }

  auto score_cube = [&](const std::string& label, const Cube& estimate, const Cube* sd, bool baseline) {
    Accumulator all, gap[5], hood[5];
    for (std::size_t i = 0; i < truth.v.size(); ++i) {
      if (!withheld[i]) continue;
      const double s = sd ? double(sd->v[i]) : NAN;
      all.add(estimate.v[i], truth.v[i], s);
      gap[gap_class[i]].add(estimate.v[i], truth.v[i], s);
      hood[hood_class[i]].add(estimate.v[i], truth.v[i], s);
    }
    Score score = all.score(label);
    score.baseline = baseline;
    for (int c = 0; c < 5; ++c) {
      score.by_gap.emplace_back(gap_classes[c], gap[c].score(gap_classes[c]));
      score.by_neighbourhood.emplace_back(neighbourhood_classes[c], hood[c].score(neighbourhood_classes[c]));
    }
    return score;
  };

  ValidateReport report;
  report.observed = observed;
  report.masked_by_qa = masked_by_qa;
  report.withheld = count;
  report.cells = std::int64_t(truth.v.size());
  report.dates = dates;
  report.width = grid.width;
  report.height = grid.height;
  report.transplanted_masks = masks;
  report.withhold_goal = goal;
  report.own_gap_cells = own_gap_cells;
  report.withheld_gap_cells = withheld_gap_cells;

  // Each method's fill as `kalends fill` would run it on the withheld stack. Every one is checked
  // (options, memory for one block) before the first runs: a budget too small for spacetime had
  // been found after the others had run.
  auto fill_request = [&](const std::string& method) {
    FillRequest fill;
    fill.input = (fs::path(detail::glob_escape((work / "input").string())) / "*.tif").string();
    fill.method = request.method;
    fill.method.method = method;
    fill.rules.valid_min = request.rules.valid_min;
    fill.rules.valid_max = request.rules.valid_max;
    fill.out_dir = (work / method).string();
    fill.memory_bytes = request.memory_bytes;
    fill.memory_ceiling = request.memory_ceiling;
    fill.threads = request.threads;
    fill.compression = Compression::none;
    return fill;
  };
  // The budget named is the largest any of them needs: naming the first one refused had led
  // to a second refusal for the next method.
  std::int64_t needed = 0;
  std::string neediest;
  for (const std::string& method : request.methods) {
    FillRequest check = fill_request(method);
    check.check_only = true;
    check.memory_ceiling = std::numeric_limits<std::int64_t>::max();  // report the need, refuse below
    const std::int64_t one_block = run_fill(check).memory_for_one_block;
    if (one_block > needed) needed = one_block, neediest = method;
  }
  if (needed > request.memory_bytes && needed > request.memory_ceiling)
    throw UsageError("--memory", fmt::format("budget of {} MiB is too small for one block of {}; {} MiB would do "
                                             "(the most any of the methods needs)",
                                             request.memory_bytes >> 20, neediest, needed >> 20));
  for (const std::string& method : request.methods) {
    const FillRequest fill = fill_request(method);
    const FillSummary filled = run_fill(fill);
    report.memory_raised_to = std::max(report.memory_raised_to, filled.memory_raised_to);
    std::vector<std::string> paths;
    for (int t = 0; t < dates; ++t)
      paths.push_back((work / method / (name + "_" + stack.layers()[t].time.label() + ".tif")).string());
    const Cube value = read_band(paths, 1, grid.width, grid.height);
    const Cube sd = read_band(paths, 2, grid.width, grid.height);
    report.scores.push_back(score_cube(method, value, &sd, false));
    keep_curve(method, value, &sd);
    report.scores.back().parameters = parameters[method];
    report.scores.back().not_fitted = filled.series_not_fitted;
    if (!request.keep_work) fs::remove_all(work / method, ec);
  }

  // Baselines, from the withheld stack only.
  const TimeGrid tgrid = TimeGrid::build(stack.times());
  Cube linear = held, climate = held, climate_anomaly = held, spatial = held, combined = held;
  for (int t = 0; t < dates; ++t) {
    const CivilDate date_t = stack.layers()[t].time.date();
    const int doy_t = day_of_year(date_t);
    std::vector<int> same;
    for (int j = 0; j < dates; ++j) {
      const CivilDate date_j = stack.layers()[j].time.date();
      int diff = std::abs(day_of_year(date_j) - doy_t);
      diff = std::min(diff, 365 - diff);
      if (date_j.year != date_t.year && diff <= tgrid.step_days / 2) same.push_back(j);
    }
    std::vector<float> anomaly(plane, NAN);
    for (std::size_t p = 0; p < plane; ++p) {
      double s = 0;
      int n = 0;
      for (int j : same)
        if (std::isfinite(held.at(j)[p])) s += held.at(j)[p], ++n;
      climate.at(t)[p] = n ? float(s / n) : NAN;
      if (std::isfinite(held.at(t)[p]) && n) anomaly[p] = held.at(t)[p] - climate.at(t)[p];
    }
    const std::vector<float> anomaly_filled = gdal_fill_nodata(anomaly.data(), grid.width, grid.height);
    const std::vector<float> spatial_filled = gdal_fill_nodata(held.at(t), grid.width, grid.height);
    for (std::size_t p = 0; p < plane; ++p) {
      climate_anomaly.at(t)[p] = climate.at(t)[p] + anomaly_filled[p];
      spatial.at(t)[p] = spatial_filled[p];
      combined.at(t)[p] = std::isfinite(climate_anomaly.at(t)[p]) ? climate_anomaly.at(t)[p] : spatial_filled[p];
    }
  }
  for (std::size_t p = 0; p < plane; ++p) {
    int previous = -1;
    for (int t = 0; t < dates; ++t) {
      if (std::isfinite(held.at(t)[p])) {
        previous = t;
        continue;
      }
      int next = t + 1;
      while (next < dates && !std::isfinite(held.at(next)[p])) ++next;
      // As numpy.interp: the first and last observed values held beyond the ends (the issue's
      // baseline figures were computed so); a pixel never observed gets none.
      float v = NAN;
      if (previous >= 0 && next < dates) {
        const double f = (days[t] - days[previous]) / (days[next] - days[previous]);
        v = float(held.at(previous)[p] + f * (held.at(next)[p] - held.at(previous)[p]));
      } else if (previous >= 0) {
        v = held.at(previous)[p];
      } else if (next < dates) {
        v = held.at(next)[p];
      }
      linear.at(t)[p] = v;
    }
  }
  report.scores.push_back(score_cube("linear interpolation in time", linear, nullptr, true));
  report.scores.push_back(score_cube("same day-of-year mean, other years", climate, nullptr, true));
  report.scores.push_back(score_cube("that mean + spatially interpolated anomaly", climate_anomaly, nullptr, true));
  report.scores.push_back(score_cube("GDAL FillNodata, date by date", spatial, nullptr, true));
  report.scores.push_back(score_cube("combined baseline", combined, nullptr, true));
  keep_curve("combined_baseline", combined, nullptr);
  if (!request.keep_work) fs::remove_all(work, ec);

  // Reports.
  std::string json = "{\n";
  json += fmt::format("  \"kalends_version\": \"{}\",\n", KALENDS_VERSION);
  json += fmt::format("  \"input\": \"{}\",\n  \"seed\": {},\n  \"withhold\": {},\n", detail::json_escape(request.input),
                      request.seed, detail::json_number(request.withhold));
  if (request.subset)
    json += fmt::format("  \"subset\": [{}, {}, {}, {}],\n", area.x, area.y, area.width, area.height);
  if (qa)
    json += fmt::format("  \"qa\": \"{}\",\n  \"qa_band\": {},\n  \"keep\": \"{}\",\n  \"masked_by_qa\": {},\n",
                        detail::json_escape(request.qa_input), request.qa_band, detail::json_escape(qa->rule.text()),
                        masked_by_qa);
  json += fmt::format(
      "  \"dates\": {},\n  \"width\": {},\n  \"height\": {},\n  \"observed\": {},\n"
      "  \"withheld\": {},\n  \"transplanted_masks\": {},\n  \"neighbourhood_radius\": {},\n",
      dates, grid.width, grid.height, observed, count, masks, request.neighbourhood_radius);
  const auto counts = [](const std::array<std::int64_t, 5>& cells) {
    return fmt::format("[{}, {}, {}, {}, {}]", cells[0], cells[1], cells[2], cells[3], cells[4]);
  };
  json += fmt::format("  \"gap_length_cells\": {{\"classes\": [\"{}\", \"{}\", \"{}\", \"{}\", \"{}\"], "
                      "\"missing_in_input\": {}, \"withheld\": {}}},\n",
                      gap_classes[0], gap_classes[1], gap_classes[2], gap_classes[3], gap_classes[4],
                      counts(report.own_gap_cells), counts(report.withheld_gap_cells));
  json += "  \"series_pixels\": [";
  for (std::size_t i = 0; i < shown.size(); ++i) {
    const int column = area.x + int(shown[i] % grid.width), row = area.y + int(shown[i] / grid.width);
    report.series_pixels.emplace_back(column, row);
    json += fmt::format("{}[{}, {}]", i ? ", " : "", column, row);
  }
  json += "],\n";
  json += "  \"scores\": [\n";
  for (std::size_t i = 0; i < report.scores.size(); ++i)
    json += "    " + score_json(report.scores[i], "    ") + (i + 1 < report.scores.size() ? ",\n" : "\n");
  json += "  ]\n}\n";

  std::string md = fmt::format(
      "# kalends validate\n\n`{}`{}: {} dates of {} x {} px, {} observed cells; {} withheld "
      "({:.1f} %) along {} transplanted cloud masks (seed {}).\n\n",
      request.input,
      request.subset ? fmt::format(" (the pixels from column {}, row {})", area.x, area.y) : std::string(),
      dates, grid.width, grid.height, observed, count,
      100.0 * double(count) / double(std::max<std::int64_t>(1, observed)), masks, request.seed);
  if (const std::string short_of = withhold_shortfall(report, request.withhold); !short_of.empty())
    md += "Note: " + short_of + "\n\n";
  if (const std::string unlike = gaps_unlike_the_stacks(report); !unlike.empty()) md += "Note: " + unlike + "\n\n";
  if (qa)
    md += fmt::format("QA: `{}`{}, keep `{}`: {} values rejected before any was withheld (they count as "
                      "missing, as in a fill with the same rule).\n\n",
                      request.qa_input, request.qa_band != 1 ? fmt::format(" band {}", request.qa_band) : "",
                      qa->rule.text(), masked_by_qa);
  md += "| method | RMSE | MAE | bias | R² | coverage | within ±1 sd | within ±1.96 sd | RMS of error / sd |\n"
        "|---|---|---|---|---|---|---|---|---|\n";
  auto row = [&](const Score& s) {
    if (s.covered == 0)  // nothing to score: the method gave no value on any withheld cell
      return fmt::format("| {}{} | - | - | - | - | 0.0 % | - | - | - |\n", s.name, s.baseline ? " (baseline)" : "");
    const auto share = [](double v) { return v >= 0 ? percent_text(v) : std::string("-"); };
    return fmt::format("| {}{} | {:.4f} | {:.4f} | {:+.4f} | {:.3f} | {} | {} | {} | {} |\n", s.name,
                       s.baseline ? " (baseline)" : "", s.rmse, s.mae, s.bias, s.r2, percent_text(s.coverage),
                       share(s.within_one_sd), share(s.within_95_interval),
                       s.rms_error_over_sd >= 0 ? fmt::format("{:.2f}", s.rms_error_over_sd) : "-");
  };
  for (const Score& s : report.scores) md += row(s);
  if (!shown.empty()) {
    md += "\nseries.csv holds every date's truth and each fill at the pixels (column, row)";
    for (std::size_t i = 0; i < report.series_pixels.size(); ++i)
      md += fmt::format("{} {}, {}", i ? ";" : "", report.series_pixels[i].first, report.series_pixels[i].second);
    md += ": those with the most withheld values.\n";
  }
  md += "\nSettings:";
  for (const Score& s : report.scores)
    if (!s.parameters.empty()) md += "\n- " + s.name + ": " + join_parameters(s.parameters);
  md += "\n";
  std::string not_fitted;
  for (const Score& s : report.scores)
    for (const auto& [reason, n] : s.not_fitted) not_fitted += fmt::format("\n- {}: {} ({})", s.name, n, reason);
  if (!not_fitted.empty()) md += "\nPixels with observations that a method could not fit:" + not_fitted + "\n";
  for (int part = 0; part < 2; ++part) {
    md += part == 0 ? "\n## RMSE (coverage) by gap length in time\n\n"
                    : fmt::format("\n## RMSE (coverage) by share of the {0}x{0} neighbourhood missing\n\n",
                                  2 * request.neighbourhood_radius + 1);
    md += "| method |";
    for (int c = 0; c < 5; ++c) md += fmt::format(" {} |", part == 0 ? gap_classes[c] : neighbourhood_classes[c]);
    md += "\n|---|---|---|---|---|---|\n";
    for (const Score& s : report.scores) {
      md += "| " + s.name + " |";
      for (const auto& [label, sub] : part == 0 ? s.by_gap : s.by_neighbourhood)
        md += sub.cells == 0     ? std::string(" - |")
              : sub.covered == 0 ? fmt::format(" - (0 %, n={}) |", sub.cells)
                                 : fmt::format(" {:.4f} ({}, n={}) |", sub.rmse, percent_text(sub.coverage, 0), sub.cells);
      md += "\n";
    }
  }
  // The truth beside each method's fill at the shown pixels: empty `truth` where the input has no
  // (QA-kept) value, `withheld` 1 where validation removed it.
  std::string csv = "column,row,date,truth,withheld";
  for (const auto& [label, values] : curves) {
    csv += ',';
    csv += label;
  }
  csv += "\n";
  for (std::size_t i = 0; i < shown.size(); ++i)
    for (int t = 0; t < dates; ++t) {
      const std::size_t cell = std::size_t(t) * plane + shown[i];
      csv += fmt::format("{},{},{},{},{}", report.series_pixels[i].first, report.series_pixels[i].second,
                         stack.layers()[t].time.label(), csv_number(truth.v[cell]), int(withheld[cell]));
      for (const auto& [label, values] : curves) {
        csv += ',';
        csv += csv_number(values[i * dates + t]);
      }
      csv += "\n";
    }
  const fs::path series_file = fs::path(request.out_dir) / "series.csv";
  if (!shown.empty()) {
    detail::write_text_atomically(series_file.string(), csv);
  } else if (fs::exists(series_file, ec)) {  // an earlier run's, no longer true; not a file of the user's
    std::ifstream earlier(series_file);
    std::string header;
    std::getline(earlier, header);
    if (header.rfind("column,row,date,truth,withheld", 0) == 0) fs::remove(series_file, ec);
  }
  detail::write_text_atomically((fs::path(request.out_dir) / "report.json").string(), json);
  detail::write_text_atomically((fs::path(request.out_dir) / "report.md").string(), md);
  return report;
}

}  // namespace kalends
