// run_diurnal: daily extremes or overpasses -> Parton-Logan hours (UTC) -> one GeoTIFF per day.
// run_calibration: hourly records -> least-squares a, b, c -> a TOML parameter file.
#include <fmt/format.h>
#include <tbb/enumerable_thread_specific.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <Eigen/Dense>
#include <algorithm>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <limits>
#include <map>
#include <set>

#include "engine/block_runner.hpp"
#include "engine/memory_budget.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "io/text_file.hpp"
#include "kalends/error.hpp"
#include "kalends/seasons.hpp"
#include "kalends/suitability.hpp"
#include "thermal/temperature_source.hpp"

namespace kalends {

namespace {

namespace fs = std::filesystem;
constexpr int tile_size = 256;
constexpr std::size_t dates_per_pass = 8;  // output days computed together per block

struct DiurnalWorker {
  std::unique_ptr<detail::TemperatureBlock> block;
  std::unique_ptr<detail::PixelLocator> locator;
  std::unique_ptr<detail::PixelDays> days;
  std::vector<double> latitude, longitude;
  std::vector<std::vector<float>> hours;  // [date in pass * 24 + hour][pixel]
  std::vector<float> tile;
};

}  // namespace

DiurnalSummary run_diurnal(const DiurnalRequest& request) {
  const auto started = std::chrono::steady_clock::now();
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  detail::require_plain_name(request.name);
  ThermalParameters table = ThermalParameters::defaults();
  if (!request.parameters_file.empty()) table.override_from_file(request.parameters_file);
  const DiurnalParameters parameters = DiurnalParameters::from(table);
  if (!request.inputs.temperature.empty())
    throw UsageError("--temperature",
                     "kalends diurnal rebuilds hours from --tmin/--tmax or --day/--night");
  const detail::TemperatureSource source = detail::TemperatureSource::open(request.inputs);
  for (const Stack& input : source.stacks) detail::require_out_apart_from(input, request.out_dir, "input");
  if (source.sub_daily)
    throw UsageError("inputs",
                     "kalends diurnal needs one layer per day or composite, not sub-daily layers");
  const Grid& grid = source.grid;
  {
    detail::PixelLocator check(grid, source.stacks.front().input());
  }  // fails before any file is made

  const std::string name = request.name.empty() ? "diurnal" : request.name;
  const detail::OutputFolder output_folder(request.out_dir);  // removed again if the run fails before writing
  const std::string how = source.mode == detail::TemperatureSource::Mode::extremes
                              ? "from the daily minimum and maximum"
                              : fmt::format(
                                    "from day and night samples at {:g} h and {:g} h local solar "
                                    "time (extremes inferred, "
                                    "neighbouring days taken as the same)",
                                    source.day_hour, source.night_hour);
  std::vector<detail::OutputSpec> specs;
  for (std::size_t i = 0; i < source.dates(); ++i) {
    detail::OutputSpec spec;
    const CivilDate date = source.times[i].date();
    spec.path = (fs::path(request.out_dir) /
                 fmt::format("{}_{:04d}-{:02d}-{:02d}.tif", name, date.year, date.month, date.day))
                    .string();
    spec.metadata = {{"KALENDS_VERSION", KALENDS_VERSION},
                     {"KALENDS_METHOD", "Parton & Logan (1981) diurnal cycle " + how},
                     {"KALENDS_PARAMETERS", fmt::format("a={};b={};c={}", parameters.a,
                                                        parameters.b, parameters.c)},
                     {"KALENDS_DATE", source.times[i].iso()},
                     {"KALENDS_HOURS", "UTC; local mean solar time = UTC + longitude / 15 h"},
                     {"KALENDS_SUN_DAY_OF_YEAR", std::to_string(source.day_of_year[i])}};
    std::string inputs;
    for (const Stack& s : source.stacks) inputs += (inputs.empty() ? "" : " ") + s.input();
    spec.metadata["KALENDS_INPUT"] = inputs;
    if (!request.command_line.empty()) spec.metadata["KALENDS_COMMAND"] = request.command_line;
    for (int h = 0; h < 24; ++h) spec.bands.push_back({fmt::format("hour {:02d}", h), "C", {}});
    specs.push_back(std::move(spec));
  }
  const int threads =
      request.threads > 0 ? request.threads : tbb::this_task_arena::max_concurrency();
  const std::int64_t bytes_per_pixel =
      std::int64_t(source.dates()) * 4 * std::int64_t(source.stacks.size()) +
      24 * 4 * dates_per_pass + 16;
  std::set<std::string> files;
  for (const Stack& s : source.stacks)
    for (const Layer& l : s.layers()) files.insert(l.path);
  const auto [share, at_once] = detail::share_for_blocks(
      request.memory_bytes, threads, BlockPlan::smallest_read_window(grid.width, grid.height, 0, tile_size),
      bytes_per_pixel, int(files.size()), int(specs.size()));
  const detail::GdalCacheScope cache(share.gdal_cache);
  const BlockPlan plan = BlockPlan::make(
      grid.width, grid.height, 0, detail::parallel_block_pixels(grid, share, threads), tile_size);
  std::vector<std::string> output_paths;
  for (const auto& s : specs) output_paths.push_back(s.path);
  detail::OutputSet outputs(std::move(specs), grid, request.compression, tile_size);

  tbb::enumerable_thread_specific<DiurnalWorker> workers([&] {
    DiurnalWorker w;
    w.block = std::make_unique<detail::TemperatureBlock>(source);
    w.locator = std::make_unique<detail::PixelLocator>(grid, source.stacks.front().input());
    w.days = std::make_unique<detail::PixelDays>(source, parameters);
    return w;
  });
  const std::size_t dates = source.dates();
  auto process = [&](const Block& block, DiurnalWorker& w) {
    const Window& core = block.core;
    const std::int64_t n = core.pixels();
    w.block->read(core, 0, dates);
    w.locator->locate(core, w.latitude, w.longitude);
    w.hours.resize(24 * dates_per_pass);
    for (std::size_t first = 0; first < dates; first += dates_per_pass) {
      const std::size_t last = std::min(dates, first + dates_per_pass);
      for (auto& plane : w.hours) plane.assign(n, NAN);
      for (std::int64_t p = 0; p < n; ++p) {
        // Two days either side: an hour of date i may fall on day i +- 1 in local time, whose
        // night reaches to day i +- 2.
        w.days->build(*w.block, p, w.latitude[p], first >= 2 ? first - 2 : 0, last + 2);
        const double offset = w.longitude[p] / 15.0;
        for (std::size_t i = first; i < last; ++i)
          for (int h = 0; h < 24; ++h)
            w.hours[(i - first) * 24 + h][p] = float(w.days->at(i, h + offset));
      }
      std::vector<const float*> planes(24);
      for (std::size_t i = first; i < last; ++i) {
        for (int h = 0; h < 24; ++h) planes[h] = w.hours[(i - first) * 24 + h].data();
        outputs.write(i, core, planes, w.tile);
      }
    }
  };
  detail::run_blocks(plan, threads, workers, process, at_once);
  detail::TemperatureCounts counts;
  for (const DiurnalWorker& w : workers) counts.add(w.block->counts);
  detail::check_temperature_counts(source, counts);
  outputs.commit();
  DiurnalSummary summary;
  // Files of dates an earlier run made and this one does not (an input date removed): left,
  // a later step would read them as current. Only this command's own (24-hour) files go.
  {
    std::error_code ec;  // a file that cannot be removed stays; the new outputs are complete
    std::set<std::string> current;
    for (const std::string& path : output_paths) current.insert(fs::path(path).lexically_normal().string());
    for (const auto& entry : fs::directory_iterator(request.out_dir, ec)) {
      const std::string file = entry.path().filename().string();
      if (!file.starts_with(name + "_") || entry.path().extension() != ".tif") continue;
      const auto date = find_date_in_name(file.substr(name.size() + 1));
      if (!date || date->position != 0 || current.count(entry.path().lexically_normal().string())) continue;
      if (detail::raster_metadata(entry.path().string()).count("KALENDS_HOURS") && fs::remove(entry.path(), ec))
        ++summary.outputs_removed;
    }
  }
  summary.days = int(dates);
  summary.width = grid.width;
  summary.height = grid.height;
  summary.implausible = counts.total_implausible();
  summary.inverted = counts.inverted;
  summary.notes = detail::temperature_notes(source, counts);
  // As seasons and suitability say it: month-end dates read as month ends by the default.
  if (request.inputs.marks == DateMarks::automatic)
    if (const std::string note = monthly_marks_note(source.times, "--date-marks start"); !note.empty())
      summary.notes.push_back(note);
  summary.parameters = parameters;
  summary.outputs = output_paths;
  summary.seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
  return summary;
}

// ------------------------------------------------------------------------------ calibration

namespace {

// One complete local solar day of one pixel: its neighbours' extremes and its samples.
struct FitDay {
  DiurnalDay yesterday, today, tomorrow;
  std::size_t first = 0, count = 0;  // samples [first, first + count) of FitData
};

struct FitData {
  std::vector<FitDay> days;
  std::vector<double> hour, value;  // local solar hour within the day, observed deg C
};

// Residuals model - observation for every sample.
void residuals(const FitData& data, const DiurnalParameters& p, std::vector<double>& out) {
  out.resize(data.value.size());
  tbb::parallel_for(
      tbb::blocked_range<std::size_t>(0, data.days.size(), 256), [&](const auto& range) {
        for (std::size_t d = range.begin(); d < range.end(); ++d) {
          const FitDay& day = data.days[d];
          for (std::size_t s = day.first; s < day.first + day.count; ++s)
            out[s] = diurnal_temperature(p, day.yesterday, day.today, day.tomorrow, data.hour[s]) -
                     data.value[s];
        }
      });
}

double sum_of_squares(const std::vector<double>& r) {
  double s = 0;
  for (double v : r) s += v * v;
  return s;
}

// The search stays within the ranges a parameter file may set (thermal.hpp).
Eigen::Vector3d clamp_parameters(const Eigen::Vector3d& x) {
  return {std::clamp(x[0], diurnal_a_range.low, diurnal_a_range.high),
          std::clamp(x[1], diurnal_b_range.low, diurnal_b_range.high),
          std::clamp(x[2], diurnal_c_range.low, diurnal_c_range.high)};
}

DiurnalParameters as_parameters(const Eigen::Vector3d& x) { return {x[0], x[1], x[2]}; }

}  // namespace

CalibrationSummary run_calibration(const CalibrationRequest& request) {
  if (request.out_file.empty())
    throw UsageError("--save-parameters", "a file to write the fitted parameters to is required");
  // It replaces only parameters kalends wrote before: a user's notes under that name had been
  // overwritten without a word.
  detail::require_own_text_file(request.out_file, "# kalends diurnal parameters");
  ThermalParameters table = ThermalParameters::defaults();
  if (!request.parameters_file.empty()) table.override_from_file(request.parameters_file);
  const Stack stack = Stack::open(stack_input(request.reference), request.rules);
  const double offset =
      detail::unit_of(stack, request.unit, "--calibrate") == TemperatureUnit::kelvin ? -273.15
                                                                                     : 0.0;
  const std::vector<TimePoint> times = stack.times();
  if (times.size() < 48)
    throw InputError(request.reference,
                     "needs hourly records of at least two days to fit the diurnal cycle");
  std::vector<std::int64_t> steps;
  for (std::size_t i = 1; i < times.size(); ++i)
    steps.push_back(times[i].seconds - times[i - 1].seconds);
  std::nth_element(steps.begin(), steps.begin() + steps.size() / 2, steps.end());
  const std::int64_t step = steps[steps.size() / 2];
  if (step <= 0 || step > 3 * 3600 || 86400 % step != 0)
    throw InputError(request.reference,
                     fmt::format("records every {} s; calibration needs hourly (or finer, "
                                 "dividing the day) records",
                                 step));
  const std::size_t per_day = std::size_t(86400 / step);
  const Grid& grid = stack.grid();
  const Window all{0, 0, grid.width, grid.height};
  if (all.pixels() * std::int64_t(times.size()) > (std::int64_t(1) << 29))
    throw UsageError("--calibrate",
                     "the reference is too large to fit in memory at once; cut it to the stations "
                     "or cells to fit on");
  std::vector<double> latitude, longitude;
  detail::PixelLocator(grid, request.reference).locate(all, latitude, longitude);
  std::vector<float> values(std::size_t(all.pixels()) * times.size());
  const auto reader = stack.reader();
  for (std::size_t i = 0; i < times.size(); ++i)
    reader->read_values(i, all, values.data() + i * all.pixels());

  const std::int64_t first_day = request.first_day
                                     ? std::int64_t(std::floor(request.first_day->days()))
                                     : std::numeric_limits<std::int64_t>::min();
  const std::int64_t last_day = request.last_day
                                    ? std::int64_t(std::floor(request.last_day->days()))
                                    : std::numeric_limits<std::int64_t>::max();
  FitData data;
  double naive_squares = 0;
  for (std::int64_t p = 0; p < all.pixels(); ++p) {
    // Group the samples into local solar days.
    struct Day {
      std::vector<double> hour, value;
      double tmin = INFINITY, tmax = -INFINITY;
    };
    std::map<std::int64_t, Day> days;
    for (std::size_t i = 0; i < times.size(); ++i) {
      const float v = values[i * all.pixels() + p];
      const double local = double(times[i].seconds) / 3600.0 + longitude[p] / 15.0;
      const std::int64_t day = std::int64_t(std::floor(local / 24));
      Day& d = days[day];
      d.hour.push_back(local - 24.0 * double(day));
      d.value.push_back(std::isfinite(v) ? double(v) + offset : NAN);
    }
    std::map<std::int64_t, DiurnalDay> complete;
    for (auto& [day, d] : days) {
      if (d.value.size() != per_day) continue;
      bool ok = true;
      for (double v : d.value)
        ok = ok && std::isfinite(v), d.tmin = std::min(d.tmin, v), d.tmax = std::max(d.tmax, v);
      if (ok)
        complete[day] = {d.tmin, d.tmax, sun_times(latitude[p], day_of_year(civil_from_days(day)))};
    }
    for (const auto& [day, today] : complete) {
      if (day < first_day || day > last_day) continue;
      const auto before = complete.find(day - 1), after = complete.find(day + 1);
      FitDay fit{before != complete.end() ? before->second : today, today,
                 after != complete.end() ? after->second : today, data.value.size(), per_day};
      const Day& d = days[day];
      const double mid_range = (today.tmin + today.tmax) / 2;  // all a min/max user has
      for (std::size_t s = 0; s < per_day; ++s) {
        data.hour.push_back(d.hour[s]);
        data.value.push_back(d.value[s]);
        naive_squares += (d.value[s] - mid_range) * (d.value[s] - mid_range);
      }
      data.days.push_back(fit);
    }
  }
  if (data.days.empty())
    throw InputError(request.reference,
                     "has no complete local solar day (every hour present) in the dates to fit on");

  // Levenberg-Marquardt with a forward-difference Jacobian.
  CalibrationSummary summary;
  summary.initial = DiurnalParameters::from(table);
  Eigen::Vector3d x(summary.initial.a, summary.initial.b, summary.initial.c);
  std::vector<double> r, shifted;
  residuals(data, as_parameters(x), r);
  double cost = sum_of_squares(r);
  summary.rmse_initial = std::sqrt(cost / double(r.size()));
  double lambda = 1e-3;
  int iteration = 0;
  bool converged = false;
  for (; iteration < 100 && !converged; ++iteration) {
    Eigen::Matrix3d jtj = Eigen::Matrix3d::Zero();
    Eigen::Vector3d jtr = Eigen::Vector3d::Zero();
    std::vector<std::vector<double>> columns(3);
    for (int k = 0; k < 3; ++k) {
      Eigen::Vector3d h = x;
      const double delta = 1e-6 * std::max(1.0, std::abs(x[k]));
      h[k] += delta;
      residuals(data, as_parameters(h), shifted);
      columns[k].resize(r.size());
      for (std::size_t s = 0; s < r.size(); ++s) columns[k][s] = (shifted[s] - r[s]) / delta;
    }
    for (std::size_t s = 0; s < r.size(); ++s)
      for (int i = 0; i < 3; ++i) {
        jtr[i] += columns[i][s] * r[s];
        for (int j = 0; j < 3; ++j) jtj(i, j) += columns[i][s] * columns[j][s];
      }
    bool improved = false;
    for (int attempt = 0; attempt < 20 && !improved; ++attempt) {
      Eigen::Matrix3d a = jtj;
      for (int i = 0; i < 3; ++i) a(i, i) *= 1 + lambda;
      const Eigen::Vector3d candidate = clamp_parameters(x - a.ldlt().solve(jtr));
      residuals(data, as_parameters(candidate), shifted);
      const double candidate_cost = sum_of_squares(shifted);
      if (candidate_cost < cost) {
        const double gain = (cost - candidate_cost) / cost;
        x = candidate, cost = candidate_cost, r.swap(shifted), lambda = std::max(lambda / 3, 1e-9);
        improved = true;
        converged = gain < 1e-10;
      } else {
        lambda *= 4;
      }
    }
    if (!improved) break;
  }
  summary.iterations = iteration;
  summary.fitted = as_parameters(x);
  const ParameterRange ranges[] = {diurnal_a_range, diurnal_b_range, diurnal_c_range};
  for (int k = 0; k < 3; ++k)
    if (x[k] <= ranges[k].low || x[k] >= ranges[k].high)
      summary.at_bounds.push_back(fmt::format("{} = {:g} (the {} the fit allows)", "abc"[k], x[k],
                                              x[k] <= ranges[k].low ? "lowest" : "highest"));
  summary.rmse_fitted = std::sqrt(cost / double(r.size()));
  summary.rmse_mid_range = std::sqrt(naive_squares / double(r.size()));
  summary.hours = std::int64_t(r.size());
  summary.pixel_days = int(data.days.size());

  const std::string fitted_by =
      fmt::format("least squares on {} ({} pixel-days)", request.reference, data.days.size());
  table.set("diurnal", "a", {x[0]}, fitted_by);
  table.set("diurnal", "b", {x[1]}, fitted_by);
  table.set("diurnal", "c", {x[2]}, fitted_by);
  std::string text = fmt::format(
      "# kalends diurnal parameters fitted to hourly records; read them with --parameters\n"
      "# reference: {}\n# hours: {}; RMSE {:.4f} K fitted, {:.4f} K with the starting values, "
      "{:.4f} K for the constant (min + max) / 2\n",
      request.reference, summary.hours, summary.rmse_fitted, summary.rmse_initial,
      summary.rmse_mid_range);
  for (const std::string& bound : summary.at_bounds)
    text += "# on a bound of the search: " + bound + "; the data would have it further out\n";
  if (!request.command_line.empty()) text += "# command: " + request.command_line + "\n";
  text += table.to_toml("diurnal");
  detail::write_text_atomically(request.out_file, text);
  return summary;
}

}  // namespace kalends
