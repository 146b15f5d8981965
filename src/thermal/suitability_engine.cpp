// run_suitability: temperatures -> blocks -> hourly thermal response (Parton-Logan hours from
// daily extremes or overpasses, or the temperatures as given) -> daily means -> period means
// -> synoptic and year-specific layers and their suitable-period counts -> GeoTIFFs.
#include <fmt/format.h>
#include <fmt/ranges.h>
#include <tbb/enumerable_thread_specific.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <set>

#include "engine/block_runner.hpp"
#include "engine/memory_budget.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/suitability.hpp"
#include "thermal/temperature_source.hpp"

namespace kalends {

// The wording, with what a reader of the layers also needs: that the index is relative
// and model-based, what it leaves out, and which way land-surface temperature errs.
const char* const suitability_caution =
    "Caution: temperature suitability describes temperature alone (a relative index from laboratory "
    "thermal-response fits, 1 at the model's optimum) - not malaria risk, incidence or a case forecast; "
    "vectors, rainfall, humidity, interventions and immunity are not in it; land-surface temperature is "
    "not air temperature (by day it can be far hotter, above all in dry, bare areas); decisions belong "
    "with national programme data, entomological surveillance and local expertise.";

namespace {


namespace fs = std::filesystem;
constexpr int tile_size = 256;

std::vector<std::string> period_labels(const CalendarPeriod& calendar) {
  std::vector<std::string> labels;
  for (const Period& p : periods_of_year(2001, calendar)) {
    const CivilDate d = civil_from_days(p.first_day);
    labels.push_back(calendar.kind == CalendarPeriod::Kind::month
                         ? fmt::format("month {:02d}", d.month)
                         : fmt::format("doy {:03d}", day_of_year(d)));
  }
  return labels;
}

// The table entries the run used ("section.key=v,v;..."): those of `sections`, less `unused`
// ("degree-day.vivax" in a falciparum run; outputs.md promises the entries used).
std::string parameter_text(const ThermalParameters& table, const std::vector<std::string>& sections,
                           const std::string& unused = "") {
  std::string out;
  for (const ThermalParameter& e : table.entries()) {
    if (std::find(sections.begin(), sections.end(), e.section) == sections.end()) continue;
    if (e.section + "." + e.key == unused) continue;
    out += fmt::format("{}{}.{}=", out.empty() ? "" : ";", e.section, e.key);
    for (std::size_t i = 0; i < e.values.size(); ++i)
      out += fmt::format("{}{}", i ? "," : "", e.values[i]);  // reads back as the same double
  }
  return out;
}

struct Worker {
  std::unique_ptr<detail::TemperatureBlock> block;
  std::unique_ptr<detail::PixelLocator> locator;
  std::unique_ptr<detail::PixelDays> days;
  std::vector<double> latitude, longitude, daily, value, mean;
  std::vector<std::vector<float>> kept;  // [year][period][pixel] of years read back
  std::vector<std::vector<float>> bands;
  std::vector<float> tile;
  double count_sum = 0;
  std::int64_t count_pixels = 0;
};

// The checks that need no input stack, and what they build: the parameter table (defaults,
// overridden by the parameters file) and the model, whose constructor checks the model, the
// window and the parameters.
struct CheckedOptions {
  ThermalParameters table;
  ThermalModel model;
};

CheckedOptions checked_options(const SuitabilityRequest& request) {
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  if (!(request.threshold >= 0 && request.threshold < 1))
    throw UsageError("--threshold", "must lie in [0, 1): a period is suitable above it");
  detail::TemperatureSource::mode_of(request.inputs);
  ThermalParameters table = ThermalParameters::defaults();
  if (!request.parameters_file.empty()) table.override_from_file(request.parameters_file);
  ThermalModel model(request.model, request.parasite, table, request.window_low, request.window_high);
  return {std::move(table), std::move(model)};
}

}  // namespace

void check_suitability_options(const SuitabilityRequest& request) { checked_options(request); }

void set_window(SuitabilityRequest& request, double low, double high) {
  if (!std::isfinite(low) || !std::isfinite(high))
    throw UsageError("--window", "expected two temperatures LOW,HIGH in deg C");
  request.window_low = low;
  request.window_high = high;
}

SuitabilitySummary run_suitability(const SuitabilityRequest& request) {
  const auto started = std::chrono::steady_clock::now();
  const auto [table, model] = checked_options(request);
  detail::require_plain_name(request.name);
  const DiurnalParameters diurnal = DiurnalParameters::from(table);
  const detail::TemperatureSource source = detail::TemperatureSource::open(request.inputs);
  for (const Stack& input : source.stacks) detail::require_out_apart_from(input, request.out_dir, "input");
  using Mode = detail::TemperatureSource::Mode;

  const std::vector<TimePoint>& times = source.times;
  int first_year = times.front().date().year, last_year = times.back().date().year;
  if (request.first_year) first_year = std::max(first_year, *request.first_year);
  if (request.last_year) last_year = std::min(last_year, *request.last_year);
  if (first_year > last_year)
    throw UsageError("--years", fmt::format("no year of the inputs ({}-{}) is in the range",
                                            times.front().date().year, times.back().date().year));
  const int years = last_year - first_year + 1;
  const int P = int(periods_of_year(2001, request.period).size());
  std::vector<Period> periods;
  for (int y = first_year; y <= last_year; ++y)
    for (const Period& p : periods_of_year(y, request.period)) periods.push_back(p);
  // Which dates feed each period, with their weights: composites and days by their overlap in
  // days, sub-daily records once each in the period holding them (period_sources, as `kalends
  // seasons`).
  const std::vector<PeriodSources> sources =
      period_sources(times, periods, resolve_date_marks(request.inputs.marks, times));
  // Before anything is written: a --years of missing years only is refused; others are noted.
  const std::vector<int> missing_years = years_without_composite(sources, first_year, P);
  std::vector<char> used(times.size(), 0);
  for (const PeriodSources& s : sources)
    for (int c : s.composite) used[c] = 1;

  const Grid& grid = source.grid;
  const Window area = area_of(grid.width, grid.height, request.region, "region");
  const std::string name = request.name.empty() ? model.tag() : request.name;
  const detail::OutputFolder output_folder(request.out_dir);  // removed again if the run fails before writing

  std::string inputs_text, temperature_text;
  for (const Stack& s : source.stacks) inputs_text += (inputs_text.empty() ? "" : " ") + s.input();
  if (source.mode == Mode::extremes)
    temperature_text =
        fmt::format("hours from daily minimum and maximum, Parton-Logan a={} b={} c={}",
                    diurnal.a, diurnal.b, diurnal.c);
  else if (source.mode == Mode::overpasses)
    temperature_text = fmt::format(
        "hours from day and night overpasses at {:g} h and {:g} h local solar time, Parton-Logan "
        "a={} b={} c={}",
        source.day_hour, source.night_hour, diurnal.a, diurnal.b, diurnal.c);
  else
    temperature_text = "temperatures as given (no diurnal cycle)";
  // Temperatures as given have no diurnal cycle: its parameters are not among those used.
  std::vector<std::string> sections = request.model == ThermalModelKind::r0_2013
                                          ? std::vector<std::string>{"diurnal", "r0-2013"}
                                      : request.model == ThermalModelKind::degree_day
                                          ? std::vector<std::string>{"diurnal", "degree-day"}
                                          : std::vector<std::string>{"diurnal", "window"};
  if (source.mode == Mode::constant) sections.erase(sections.begin());
  const std::string model_text = model.description(source.mode != Mode::constant);
  const std::string unused_parasite =
      request.model != ThermalModelKind::degree_day ? ""
      : request.parasite == Parasite::vivax          ? "degree-day.falciparum"
                                                     : "degree-day.vivax";

  std::vector<detail::OutputSpec> specs;
  auto add = [&](const std::string& suffix, const std::vector<std::string>& band_names,
                 const std::string& layer, const std::string& year) {
    detail::OutputSpec spec;
    spec.path = (fs::path(request.out_dir) / (name + "_" + suffix + ".tif")).string();
    spec.metadata = {{"KALENDS_VERSION", KALENDS_VERSION},
                     {"KALENDS_LAYER", layer},
                     {"KALENDS_MODEL", model_text},
                     {"KALENDS_PARAMETERS", parameter_text(table, sections, unused_parasite)},
                     {"KALENDS_TEMPERATURE", temperature_text},
                     {"KALENDS_THRESHOLD", fmt::format("{:g}", request.threshold)},
                     {"KALENDS_PERIOD", request.period.label()},
                     {"KALENDS_INPUT", inputs_text},
                     {"KALENDS_CAUTION", suitability_caution}};
    // The span of years only on layers that depend on every year, so that a year's own
    // layers stay valid when another year is added.
    if (!year.empty()) spec.metadata["KALENDS_YEAR"] = year;
    else spec.metadata["KALENDS_YEARS"] = fmt::format("{}-{}", first_year, last_year);
    if (!request.command_line.empty()) spec.metadata["KALENDS_COMMAND"] = request.command_line;
    for (const std::string& b : band_names) spec.bands.push_back({b, "", {}});
    specs.push_back(std::move(spec));
    return specs.size() - 1;
  };
  const auto labels = period_labels(request.period);
  const std::vector<std::string> summary_bands{
      request.period.kind == CalendarPeriod::Kind::month ? "suitable_months" : "suitable_periods",
      "longest_suitable_run", "mean_suitability"};
  const std::size_t synoptic =
      add("synoptic", labels, "relative suitability 0-1, mean over years", "");
  // The counts' unit, for legends and GIS tools (the report had said "no unit").
  const std::string counted = request.period.kind == CalendarPeriod::Kind::month ? "months" : "periods";
  const auto count_units = [&](std::size_t file) {
    specs[file].bands[0].unit = counted;
    specs[file].bands[1].unit = counted;
    return file;
  };
  const std::size_t synoptic_summary =
      count_units(add("summary_synoptic", summary_bands,
                      "suitable periods of the synoptic cycle (runs wrap over the year)", ""));
  std::vector<std::size_t> year_file, summary_file;
  constexpr std::size_t kept = std::size_t(-1);
  std::vector<std::string> kept_year_path(static_cast<std::size_t>(years));  // years read back, not computed
  for (int y = first_year; y <= last_year; ++y) {
    const std::string ys = std::to_string(y);
    const std::string path = (fs::path(request.out_dir) / (name + "_year_" + ys + ".tif")).string();
    const bool redo = !request.only_years || !fs::exists(path) ||
                      std::find(request.only_years->begin(), request.only_years->end(), y) != request.only_years->end();
    if (!redo) kept_year_path[std::size_t(y - first_year)] = path;
    year_file.push_back(redo ? add("year_" + ys, labels, "relative suitability 0-1 of the year", ys) : kept);
    summary_file.push_back(redo ? count_units(add("summary_" + ys, summary_bands, "suitable periods of the year", ys))
                                : kept);
  }
  // The dates the computed years need (and two more each side: a day's cycle reads its
  // neighbours); the kept years' values come from their files.
  std::size_t first_date = times.size(), last_date = 0;
  for (std::size_t k = 0; k < periods.size(); ++k) {
    if (year_file[k / std::size_t(P)] == kept) continue;
    for (int c : sources[k].composite) {
      first_date = std::min(first_date, std::size_t(c));
      last_date = std::max(last_date, std::size_t(c) + 1);
    }
  }
  if (first_date < last_date) {
    first_date = first_date >= 2 ? first_date - 2 : 0;
    last_date = std::min(times.size(), last_date + 2);
  } else {
    first_date = last_date = 0;
  }
  std::vector<std::size_t> first_band(specs.size());
  std::size_t total_bands = 0;
  for (std::size_t f = 0; f < specs.size(); ++f)
    first_band[f] = total_bands, total_bands += specs[f].bands.size();

  const int threads =
      request.threads > 0 ? request.threads : tbb::this_task_arena::max_concurrency();
  const std::int64_t bytes_per_pixel =
      std::int64_t(times.size()) * (4 * std::int64_t(source.stacks.size()) + 8) +
      std::int64_t(total_bands) * 4 + 16;
  std::set<std::string> files;
  for (const Stack& s : source.stacks)
    for (const Layer& l : s.layers()) files.insert(l.path);
  const auto [share, at_once] = detail::share_for_blocks(
      request.memory_bytes, threads, BlockPlan::smallest_read_window(grid.width, grid.height, 0, tile_size),
      bytes_per_pixel, int(files.size()), int(specs.size()));
  const detail::GdalCacheScope cache(share.gdal_cache);
  const BlockPlan plan = BlockPlan::make(
      grid.width, grid.height, 0, detail::parallel_block_pixels(window_grid(grid, area), share, threads), tile_size,
      request.region);
  std::vector<std::string> output_paths;
  for (const auto& s : specs) output_paths.push_back(s.path);
  // Fail on missing georeferencing before any file is created.
  if (source.mode != Mode::constant)
    detail::PixelLocator check(grid, source.stacks.front().input());
  detail::OutputSet outputs(std::move(specs), window_grid(grid, area), request.compression, tile_size);
  outputs.set_origin(area.x, area.y);

  tbb::enumerable_thread_specific<Worker> workers([&] {
    Worker w;
    w.block = std::make_unique<detail::TemperatureBlock>(source);
    if (source.mode != Mode::constant) {
      w.locator = std::make_unique<detail::PixelLocator>(grid, source.stacks.front().input());
      w.days = std::make_unique<detail::PixelDays>(source, diurnal);
    }
    return w;
  });
  const double threshold = request.threshold;
  auto process = [&](const Block& block, Worker& w) {
    const Window& core = block.core;
    const std::int64_t n = core.pixels();
    if (last_date > first_date) w.block->read(core, first_date, last_date);
    // Kept years: their values as the earlier run wrote them.
    w.kept.assign(std::size_t(years), {});
    for (int y = 0; y < years; ++y) {
      const std::string& path = kept_year_path[std::size_t(y)];
      if (path.empty()) continue;
      GDALDatasetUniquePtr ds = detail::open_raster(path);
      if (ds->GetRasterCount() != P || ds->GetRasterXSize() != area.width || ds->GetRasterYSize() != area.height)
        throw InputError(path, "does not match the layout of this run; remove it to have it recomputed");
      w.kept[std::size_t(y)].resize(std::size_t(P) * std::size_t(n));
      for (int q = 0; q < P; ++q)
        if (ds->GetRasterBand(q + 1)->RasterIO(GF_Read, core.x - area.x, core.y - area.y, core.width, core.height,
                                               w.kept[std::size_t(y)].data() + std::size_t(q) * std::size_t(n),
                                               core.width, core.height, GDT_Float32, 0, 0) != CE_None)
          throw InputError(path, "cannot be read (" + detail::gdal_message("unknown reason") + ")");
    }
    if (w.locator) w.locator->locate(core, w.latitude, w.longitude);
    w.bands.resize(total_bands);
    for (auto& b : w.bands) b.assign(n, NAN);
    auto band = [&](std::size_t file, std::size_t b) -> std::vector<float>& {
      return w.bands[first_band[file] + b];
    };
    w.daily.assign(times.size(), NAN);
    w.value.assign(periods.size(), NAN);
    w.mean.assign(P, NAN);
    for (std::int64_t p = 0; p < n; ++p) {
      if (w.days && last_date > first_date) w.days->build(*w.block, p, w.latitude[p], first_date, last_date);
      for (std::size_t i = first_date; i < last_date; ++i) {
        if (!used[i]) continue;
        w.daily[i] =
            w.days ? w.days->daily_mean(i, model) : model.relative(w.block->values(0, i)[p]);
      }
      for (std::size_t k = 0; k < periods.size(); ++k) {
        if (const auto& kept_values = w.kept[k / std::size_t(P)]; !kept_values.empty()) {
          w.value[k] = kept_values[(k % std::size_t(P)) * std::size_t(n) + std::size_t(p)];
          continue;
        }
        double sum = 0, weight = 0;
        for (std::size_t j = 0; j < sources[k].composite.size(); ++j) {
          const double v = w.daily[sources[k].composite[j]];
          if (std::isfinite(v)) sum += sources[k].days[j] * v, weight += sources[k].days[j];
        }
        // As stored (float): a value too small for a float is written as 0, and the summaries
        // count what is written.
        w.value[k] = weight > 0 ? double(float(sum / weight)) : NAN;
      }
      for (int q = 0; q < P; ++q) {
        double sum = 0;
        int count = 0;
        for (int y = 0; y < years; ++y) {
          const double v = w.value[std::size_t(y) * P + q];
          if (year_file[y] != kept) band(year_file[y], q)[p] = float(v);
          if (std::isfinite(v)) sum += v, ++count;
        }
        w.mean[q] = count > 0 ? double(float(sum / count)) : NAN;
        band(synoptic, q)[p] = float(w.mean[q]);
      }
      auto put = [&](std::size_t file, const SuitableRun& r) {
        band(file, 0)[p] = float(r.count);
        band(file, 1)[p] = float(r.longest);
        band(file, 2)[p] = float(r.mean);
      };
      for (int y = 0; y < years; ++y)
        if (summary_file[y] != kept)
          put(summary_file[y],
            suitable_runs(w.value.data() + std::size_t(y) * P, P, threshold, false));
      const SuitableRun cycle = suitable_runs(w.mean.data(), P, threshold, true);
      put(synoptic_summary, cycle);
      if (std::isfinite(cycle.count)) w.count_sum += cycle.count, ++w.count_pixels;
    }
    outputs.write_all(core, w.bands, w.tile);
  };
  detail::run_blocks(plan, threads, workers, process, at_once);
  std::int64_t count_pixels = 0;
  double count_sum = 0;
  detail::TemperatureCounts counts;
  for (const Worker& w : workers) {
    counts.add(w.block->counts);
    count_sum += w.count_sum;
    count_pixels += w.count_pixels;
  }
  detail::check_temperature_counts(source, counts);
  outputs.set_keep_unchanged(request.keep_unchanged);
  outputs.commit();
  SuitabilitySummary summary;
  const std::vector<int> stale = detail::remove_year_layers_outside(request.out_dir, name, {"year", "summary"}, first_year,
                                                                    last_year, &summary.outputs_removed);
  summary.dates_at_month_ends = dates_at_month_ends(times);
  summary.monthly_marks_note = monthly_marks_note(times, "--date-marks start");
  summary.outputs_written = outputs.written();
  summary.outputs_unchanged = outputs.unchanged();
  summary.years = years;
  summary.periods = P;
  summary.files = int(output_paths.size());
  summary.width = area.width;
  summary.height = area.height;
  summary.first_year = first_year;
  summary.last_year = last_year;
  summary.model = model_text;
  summary.mean_suitable_periods = count_pixels > 0 ? count_sum / double(count_pixels) : NAN;
  summary.pixels_counted = count_pixels;
  summary.implausible = counts.total_implausible();
  summary.inverted = counts.inverted;
  summary.notes = detail::temperature_notes(source, counts);
  if (!missing_years.empty()) summary.notes.push_back(years_without_composite_note(missing_years));
  if (!stale.empty())
    summary.notes.push_back(fmt::format("removed the layers of {} from an earlier run: outside this run's years",
                                        fmt::join(stale, ", ")));
  summary.outputs = output_paths;
  summary.seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
  return summary;
}

}  // namespace kalends
