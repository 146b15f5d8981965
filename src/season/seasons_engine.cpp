// run_seasons: stack -> blocks -> period means -> synoptic, year-specific, anomalies, cycle
// descriptors, synoptic miss -> GeoTIFFs.
#include <tbb/enumerable_thread_specific.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <atomic>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <fmt/ranges.h>
#include <limits>
#include <set>

#include "engine/block_runner.hpp"
#include "engine/memory_budget.hpp"
#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/seasons.hpp"

namespace kalends {

namespace fs = std::filesystem;

const std::vector<std::string>& cycle_band_names() {
  static const std::vector<std::string> names{
      "mean",           "min",           "max",           "amplitude",
      "annual_amplitude", "annual_peak_doy", "semiannual_amplitude", "semiannual_peak_doy",
      "seasons",        "main_peak_doy", "season1_start_doy", "season1_end_doy",
      "season1_length_days", "season1_integral", "season2_start_doy", "season2_end_doy",
      "season2_length_days", "season2_integral"};
  return names;
}

std::string stack_input(const std::string& input) {
  if (!fs::is_directory(input)) return input;
  // A folder that holds the outputs of two fills (ndvi_... and evi_...): named as such, where the
  // stack read from it had said "duplicate date" or "grid ... differs".
  std::set<std::string> names;
  std::error_code ec;
  for (const auto& entry : fs::directory_iterator(input, ec)) {
    const std::string file = entry.path().filename().string();
    if (!entry.is_regular_file(ec) || entry.path().extension() != ".tif" || file.front() == '.') continue;
    names.insert(detail::name_from_file(file));
  }
  if (names.size() > 1)
    throw UsageError(input, fmt::format("holds the files of {} stacks ({}); give one as a pattern, such as '{}'",
                                        names.size(), fmt::join(names, ", "),
                                        (fs::path(input) / (*names.begin() + "_*.tif")).string()));
  // The folder as a literal: 'run[1]' had read the files of 'run1'.
  return (fs::path(detail::glob_escape(input)) / "*.tif").string();
}

namespace {

constexpr int tile_size = 256;

std::vector<std::string> period_labels(int year, const CalendarPeriod& calendar) {
  std::vector<std::string> labels;
  for (const Period& p : periods_of_year(year, calendar)) {
    const CivilDate d = civil_from_days(p.first_day);
    labels.push_back(calendar.kind == CalendarPeriod::Kind::month
                         ? fmt::format("month {:02d}", d.month)
                         : fmt::format("doy {:03d}", day_of_year(d)));
  }
  return labels;
}

struct Worker {
  std::unique_ptr<StackReader> reader, flag_reader;
  std::vector<float> flags;   // [layer][pixel], a fill's flag band
  std::vector<float> plane;
  std::vector<float> layers;  // [layer][pixel]
  std::vector<std::vector<float>> bands;  // one plane per output band
  std::vector<double> padded;
  std::vector<float> tile;
  std::vector<char> year_cycle_empty;  // per year, for the pixel at hand
};

}  // namespace

void check_seasons_options(const SeasonsRequest& request) {
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  if (!(request.cycle.prominence_share > 0 && request.cycle.prominence_share < 1))
    throw UsageError("--prominence", "must lie strictly between 0 and 1");
  if (!(request.cycle.threshold_share > 0 && request.cycle.threshold_share < 1))
    throw UsageError("--threshold", "must lie strictly between 0 and 1");
  if (!(request.cycle.min_amplitude >= 0) || !std::isfinite(request.cycle.min_amplitude))
    throw UsageError("--min-amplitude", "must be 0 or more, in the input's unit");
  // The cycle's harmonics need 4 periods a year or more: ceil(365 / N) >= 4.
  if (request.period.per_year() < 4)
    throw UsageError("--period '" + request.period.label() + "'",
                     "at most 121 days: the cycle descriptors need at least 4 periods a year");
}

std::vector<std::string> seasons_notes(const SeasonsRequest& request, const SeasonsSummary& summary) {
  std::vector<std::string> notes;
  if (!summary.stale_years_removed.empty())
    notes.push_back(fmt::format("removed the layers of {} from an earlier run: outside this run's years",
                                fmt::join(summary.stale_years_removed, ", ")));
  if (summary.years == 1 && summary.pixels_with_values > 0)
    notes.push_back(fmt::format("one year ({}): the synoptic layers are that year's own values, so synoptic_sd, the "
                                "standardised anomalies and synoptic_miss are empty; a synoptic needs two years or more",
                                summary.first_year));
  if (!summary.years_without_composite.empty())
    notes.push_back(years_without_composite_note(summary.years_without_composite));
  for (const auto& [year, pixels] : summary.years_with_cycle_gaps)
    notes.push_back(fmt::format("the {} cycle layer is empty at {} of the {} pixels whose synoptic cycle has one: {} "
                                "lacks a value in some period there ({})",
                                year, pixels, summary.pixels_with_cycle, year,
                                summary.from_fill ? "the stack starts or ends within the year, or the fill left "
                                                    "values out: flag 3"
                                                  : "a stack that starts or ends within the year, or dates without "
                                                    "data; fill the gaps first with kalends fill"));
  const auto pixels_text = [](std::int64_t n) { return fmt::format("{} pixel{}", n, n == 1 ? "" : "s"); };
  for (const auto& [year, starts, ends] : summary.years_with_unknown_edges)
    notes.push_back(fmt::format("the {} cycle layer leaves {} empty (with the season's length and integral): the "
                                "record has no value where {} (before its first composite, after its last, or in "
                                "a year without data), and the year's own values do not tell",
                                year,
                                starts && ends ? fmt::format("the season start of {} and the season end of {}",
                                                             pixels_text(starts), pixels_text(ends))
                                : starts       ? fmt::format("the season start of {}", pixels_text(starts))
                                               : fmt::format("the season end of {}", pixels_text(ends)),
                                starts && ends ? "they lie" : "it lies"));
  if (!summary.partly_covered.empty()) {
    const auto& [label, covered, days] = summary.partly_covered.front();
    const std::size_t count = summary.partly_covered.size();
    notes.push_back(fmt::format("{} year-specific period{} rest{} on only part of {} days (first: {}, {:g} of {} days: "
                                "no composite stands for the others, each standing for the step, the median spacing "
                                "of the dates, from its date mark); each band's KALENDS_DAYS_COVERED says how many",
                                count, count == 1 ? "" : "s", count == 1 ? "s" : "", count == 1 ? "its" : "their", label,
                                covered, days));
  }
  if (summary.pixels_with_values == 0 || summary.pixels_with_cycle == summary.pixels_with_values) return notes;
  if (summary.pixels_with_cycle == 0 && !summary.periods_without_value.empty()) {
    static const char* const months[] = {"Jan", "Feb", "Mar", "Apr", "May", "Jun",
                                         "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"};
    std::vector<std::string> names;
    for (int q : summary.periods_without_value)
      names.push_back(request.period.kind == CalendarPeriod::Kind::month ? std::string(months[q % 12])
                                                                         : fmt::format("day {}", 1 + q * request.period.days));
    notes.push_back(fmt::format("the cycle layers are empty: their descriptors need a value in every period, and {} of "
                                "the {} periods have none anywhere ({}); the year and synoptic layers hold the "
                                "periods with data",
                                summary.periods_without_value.size(), summary.periods, fmt::join(names, ", ")));
  } else {
    notes.push_back(fmt::format("{} of the {} pixels with data lack a value in some period of the synoptic cycle: "
                                "their cycle descriptors are empty",
                                summary.pixels_with_values - summary.pixels_with_cycle, summary.pixels_with_values));
  }
  return notes;
}

SeasonsSummary run_seasons(const SeasonsRequest& request) {
  const auto started = std::chrono::steady_clock::now();
  check_seasons_options(request);
  detail::require_plain_name(request.name);
  const Stack stack = Stack::open(stack_input(request.input), request.rules);
  detail::require_out_apart_from(stack, request.out_dir, "input");
  // Means of flag codes would be numbers that mean nothing.
  if (detail::is_flag_band(stack.layers().front().path, stack.layers().front().band))
    throw UsageError("--band " + std::to_string(request.rules.band), "is the flag band of the fill outputs in '" + request.input +
                                     "' (codes 0-3, not values): band 1 holds the values, band 2 their sd");
  // A fill's outputs carry a flag band: what each period's value rests on is then known, and
  // written beside it (a year of gap-filled values had counted as a year like any other). The
  // flags are those of its sd band (--band 2) too, which had been taken for unfilled input.
  std::optional<Stack> flags;
  if (detail::is_fill_output(stack.layers().front().path)) {
    ValueRules flag_rules;
    flag_rules.band = 3;
    flag_rules.exclude = request.rules.exclude;
    flags = Stack::open(stack_input(request.input), flag_rules);
  }
  const std::vector<TimePoint> times = stack.times();
  // The days a composite stands for come from the spacing of the dates; one date has none.
  if (times.size() < 2)
    throw InputError(request.input, "holds a single date (" + times.front().label() +
                                        "): the days each composite stands for come from the spacing of the dates; "
                                        "give two or more");
  int first_year = times.front().date().year, last_year = times.back().date().year;
  if (request.first_year) first_year = std::max(first_year, *request.first_year);
  if (request.last_year) last_year = std::min(last_year, *request.last_year);
  if (first_year > last_year)
    throw UsageError("--years", "no year of the stack (" + std::to_string(times.front().date().year) +
                                    "-" + std::to_string(times.back().date().year) + ") is in the range");
  const int years = last_year - first_year + 1;
  const int P = int(periods_of_year(2001, request.period).size());  // same count every year
  std::vector<Period> periods;
  for (int y = first_year; y <= last_year; ++y)
    for (const Period& p : periods_of_year(y, request.period)) periods.push_back(p);
  const std::vector<PeriodSources> sources =
      period_sources(times, periods, resolve_date_marks(request.marks, times));
  // Before anything is written: a --years of missing years only is refused.
  const std::vector<int> years_without_composite = kalends::years_without_composite(sources, first_year, P);
  // The year before the first and the year after the last, read for the peak search alone
  // (cycle_YYYY looks at its neighbours): with --years they may lie in the stack, and a year's
  // cycle layer had depended on which years the run took (2016's season count changed on 46 px
  // of a helper's stack between a run over all years and one with --years 2016-2019).
  std::vector<Period> edge_periods;
  for (int y : {first_year - 1, last_year + 1})
    for (const Period& p : periods_of_year(y, request.period)) edge_periods.push_back(p);
  const std::vector<PeriodSources> edge_sources =
      period_sources(times, edge_periods, resolve_date_marks(request.marks, times));
  std::vector<char> used(times.size(), 0);
  for (const auto* list : {&sources, &edge_sources})
    for (const PeriodSources& s : *list)
      for (int c : s.composite) used[c] = 1;

  const Grid& grid = stack.grid();
  const Window area = area_of(grid.width, grid.height, request.region, request.input);
  // Another band than the first (a fill's sd or flag) is named after the band, so that its
  // layers do not replace the values' under the same names.
  const std::string name = !request.name.empty()    ? request.name
                           : request.rules.band == 1 ? stack.name()
                                                     : stack.name() + "_" + detail::band_label(stack.layers().front().path, request.rules.band);
  const detail::OutputFolder output_folder(request.out_dir);  // removed again if the run fails before writing

  // Output layout: index of each file, its bands.
  const std::string unit = stack.layers().front().unit;
  std::vector<detail::OutputSpec> specs;
  auto add = [&](const std::string& suffix, const std::vector<std::string>& band_names,
                 const std::map<std::string, std::string>& extra) {
    detail::OutputSpec spec;
    spec.path = (fs::path(request.out_dir) / (name + "_" + suffix + ".tif")).string();
    spec.metadata = {{"KALENDS_VERSION", KALENDS_VERSION},
                     {"KALENDS_INPUT", request.input},
                     {"KALENDS_PERIOD", request.period.label()},
                     {"KALENDS_PROMINENCE_SHARE", fmt::format("{:g}", request.cycle.prominence_share)},
                     {"KALENDS_THRESHOLD_SHARE", fmt::format("{:g}", request.cycle.threshold_share)},
                     {"KALENDS_MIN_AMPLITUDE", fmt::format("{:g}", request.cycle.min_amplitude)}};
    if (!request.command_line.empty()) spec.metadata["KALENDS_COMMAND"] = request.command_line;
    for (const auto& [k, v] : extra) spec.metadata[k] = v;
    // The span of years only where a layer depends on every year (anomalies do: they are
    // measured from the synoptic), so that a year's own layers stay valid when another year is
    // added.
    if (!spec.metadata.count("KALENDS_YEAR") || suffix.starts_with("anomaly_"))
      spec.metadata["KALENDS_YEARS"] = fmt::format("{}-{}", first_year, last_year);
    if (request.rules.band != 1) spec.metadata["KALENDS_BAND"] = std::to_string(request.rules.band);
    for (const std::string& b : band_names) spec.bands.push_back({b, "", {}});
    specs.push_back(std::move(spec));
    return specs.size() - 1;
  };
  constexpr std::size_t not_written = std::size_t(-1);
  auto redo = [&](int y) {
    return !request.only_years ||
           std::find(request.only_years->begin(), request.only_years->end(), y) != request.only_years->end();
  };
  const auto labels = period_labels(2001, request.period);
  const std::size_t synoptic_mean = add("synoptic_mean", labels, {{"KALENDS_LAYER", "long-term mean per period"}});
  const std::size_t synoptic_sd = add("synoptic_sd", labels, {{"KALENDS_LAYER", "standard deviation over years (ddof 1)"}});
  const std::size_t synoptic_years = add("synoptic_years", labels, {{"KALENDS_LAYER", "number of years with a value"}});
  const std::size_t synoptic_observed =
      flags ? add("synoptic_observed_years", labels,
                  {{"KALENDS_LAYER", "number of years with an observation (fill flag 0) in the period"}})
            : not_written;
  std::vector<std::size_t> year_file, anomaly_file, standardised_file, cycle_file, observed_file;
  for (int y = first_year; y <= last_year; ++y) {
    const std::string ys = std::to_string(y);
    // What each year value rests on. A fill's: its observed composites (flag 0). Unfilled input's:
    // its days with a value (February from the one composite of 17 January that reaches into it
    // had looked like a whole month).
    observed_file.push_back(
        redo(y) ? add("observed_" + ys, labels,
                      {{"KALENDS_LAYER", flags ? "share of the period's days with a value resting on an "
                                                 "observation (fill flag 0)"
                                               : "share of the period's days, of those the composites stand for, "
                                                 "with a value (unfilled input)"},
                       {"KALENDS_YEAR", ys}})
                : not_written);
    year_file.push_back(redo(y) ? add("year_" + ys, labels, {{"KALENDS_LAYER", "year-specific period mean"}, {"KALENDS_YEAR", ys}})
                                : not_written);
    anomaly_file.push_back(add("anomaly_" + ys, labels, {{"KALENDS_LAYER", "year-specific minus synoptic"}, {"KALENDS_YEAR", ys}}));
    standardised_file.push_back(add("anomaly_standardised_" + ys, labels,
                                    {{"KALENDS_LAYER", "anomaly / synoptic sd"}, {"KALENDS_YEAR", ys}}));
  }
  for (int y = first_year; y <= last_year; ++y)
    cycle_file.push_back(redo(y - 1) || redo(y) || redo(y + 1)
                             ? add("cycle_" + std::to_string(y), cycle_band_names(),
                                   {{"KALENDS_LAYER", "cycle descriptors of the year"}, {"KALENDS_YEAR", std::to_string(y)}})
                             : not_written);
  const std::size_t cycle_synoptic = add("cycle_synoptic", cycle_band_names(), {{"KALENDS_LAYER", "cycle descriptors of the synoptic cycle"}});
  const std::size_t miss = add("synoptic_miss", {"rmse", "explained_share", "year_specific_share"},
                               {{"KALENDS_LAYER", "where the synoptic cycle misleads"}});
  std::vector<std::size_t> first_band(specs.size());
  std::size_t total_bands = 0;
  for (std::size_t f = 0; f < specs.size(); ++f) first_band[f] = total_bands, total_bands += specs[f].bands.size();
  for (std::size_t f : year_file)
    if (f != not_written)
      for (auto& b : specs[f].bands) b.unit = unit;
  // The days each year's period rests on: a month the composites cover in part (the first of
  // a stack that starts on 25 May) is the mean of those days alone.
  std::vector<std::tuple<std::string, double, int>> partly_covered;
  for (int y = 0; y < years; ++y)
    for (int q = 0; q < P; ++q) {
      const std::size_t k = std::size_t(y) * P + q;
      double covered = 0;
      for (double d : sources[k].days) covered += d;
      for (std::size_t f : {year_file[y], observed_file[y]}) {
        if (f == not_written) continue;
        specs[f].bands[q].metadata["KALENDS_DAYS_COVERED"] = fmt::format("{:g}", covered);
        specs[f].bands[q].metadata["KALENDS_PERIOD_DAYS"] = std::to_string(periods[k].days);
      }
      if (covered > 0 && covered < periods[k].days)
        partly_covered.emplace_back(fmt::format("{} {}", first_year + y, labels[q]), covered, periods[k].days);
    }
  for (std::size_t f : {synoptic_mean, synoptic_sd}) for (auto& b : specs[f].bands) b.unit = unit;
  for (std::size_t f : anomaly_file) for (auto& b : specs[f].bands) b.unit = unit;
  specs[miss].bands[0].unit = unit;  // the RMSE; the shares have none
  // Cycle bands: values in the input's unit, days of year, lengths in days, integrals in
  // unit x days ("value-days" without a unit, or CF's dimensionless "1"); the season count has none.
  std::vector<std::size_t> cycles{cycle_synoptic};
  for (std::size_t f : cycle_file)
    if (f != not_written) cycles.push_back(f);
  for (std::size_t f : cycles)
    for (auto& b : specs[f].bands) {
      const std::string& n = b.description;
      b.unit = n.ends_with("_doy")     ? "day of year"
               : n.ends_with("_days")  ? "days"
               : n.ends_with("integral") ? (unit.empty() || unit == "1" || unit == "dimensionless" ? "value-days" : unit + " days")
               : n == "seasons"        ? ""
                                       : unit;
    }

  const int threads = request.threads > 0 ? request.threads : tbb::this_task_arena::max_concurrency();
  const std::int64_t bytes_per_pixel =
      std::int64_t(times.size()) * (flags ? 8 : 4) + 4 + std::int64_t(total_bands) * 4;
  std::set<std::string> files;
  for (const Layer& l : stack.layers()) files.insert(l.path);
  // As fill: without a --memory given, a budget too small for one block rises to what one block
  // needs, up to the ceiling (a long record's 8-day seasons had been refused after its fill ran).
  const Window smallest = BlockPlan::smallest_read_window(grid.width, grid.height, 0, tile_size);
  detail::BlockShare fitted;
  std::int64_t raised_to = 0;
  try {
    fitted = detail::share_for_blocks(request.memory_bytes, threads, smallest, bytes_per_pixel, int(files.size()),
                                      int(specs.size()));
  } catch (const UsageError&) {
    const std::int64_t one_block =
        detail::budget_for_read_pixels(smallest.pixels(), 1, bytes_per_pixel, int(files.size()), int(specs.size()));
    if (request.memory_ceiling == 0 || one_block > request.memory_ceiling) throw;
    fitted = detail::share_for_blocks(one_block, 1, smallest, bytes_per_pixel, int(files.size()), int(specs.size()));
    raised_to = one_block;
  }
  const auto [share, at_once] = fitted;
  const detail::GdalCacheScope cache(share.gdal_cache);
  const BlockPlan plan = BlockPlan::make(grid.width, grid.height, 0, share.max_read_pixels, tile_size, request.region);
  require_readable(stack, area.x, area.y);
  std::vector<std::string> output_paths;
  for (const auto& s : specs) output_paths.push_back(s.path);
  detail::OutputSet outputs(std::move(specs), window_grid(grid, area), request.compression, tile_size);
  outputs.set_origin(area.x, area.y);
  const HarmonicAnalysis harmonics(P);
  const PeriodDays period_days = PeriodDays::of_calendar(request.period);

  tbb::enumerable_thread_specific<Worker> workers([&] {
    Worker w;
    w.reader = stack.reader();
    if (flags) w.flag_reader = flags->reader();
    return w;
  });
  // Pixels with any synoptic value, pixels with synoptic cycle descriptors, and the periods that
  // have a value anywhere: a stack of one season has no cycle descriptors, and says why.
  std::atomic<std::int64_t> pixels_with_values{0}, pixels_with_cycle{0};
  std::vector<std::atomic<bool>> period_has_value(P);
  // Per year, pixels whose synoptic cycle has descriptors but whose year's has none.
  std::vector<std::atomic<std::int64_t>> year_cycle_missing(years);
  // Per year, pixels with a season start (1) or end (2) left unknown: it lies where the record
  // has no value (before the first composite, after the last, in a year without data).
  std::vector<std::atomic<std::int64_t>> year_starts_unknown(years), year_ends_unknown(years);
  auto process = [&](const Block& block, Worker& w) {
    const Window& core = block.core;
    std::int64_t with_values = 0, with_cycle = 0;
    std::vector<char> has_value(P, 0);
    const std::int64_t n = core.pixels();
    w.layers.assign(times.size() * n, NAN);
    w.plane.resize(n);
    for (std::size_t i = 0; i < times.size(); ++i) {
      if (!used[i]) continue;
      w.reader->read_values(i, core, w.plane.data());
      std::copy(w.plane.begin(), w.plane.end(), w.layers.begin() + i * n);
    }
    if (flags) {
      w.flags.assign(times.size() * n, NAN);
      for (std::size_t i = 0; i < times.size(); ++i) {
        if (!used[i]) continue;
        w.flag_reader->read_values(i, core, w.plane.data());
        std::copy(w.plane.begin(), w.plane.end(), w.flags.begin() + i * n);
      }
    }
    w.bands.resize(total_bands);
    for (auto& b : w.bands) b.assign(n, NAN);
    auto band = [&](std::size_t file, std::size_t b) -> std::vector<float>& { return w.bands[first_band[file] + b]; };
    std::vector<double> value(std::size_t(years) * P), mean(P), observed(std::size_t(years) * P), edge(2 * std::size_t(P));
    w.padded.resize(3 * P);
    auto put_cycle = [&](std::size_t file, std::int64_t p, const CycleDescriptors& d) {
      const double v[] = {d.mean, d.min, d.max, d.amplitude, d.annual.amplitude, d.annual.peak_doy,
                          d.semiannual.amplitude, d.semiannual.peak_doy,
                          std::isfinite(d.mean) ? double(d.seasons) : NAN, d.main_peak_doy,
                          d.season[0].start_doy, d.season[0].end_doy, d.season[0].length_days, d.season[0].integral,
                          d.season[1].start_doy, d.season[1].end_doy, d.season[1].length_days, d.season[1].integral};
      // A value past float's range (an integral of values near 1e38) is none, not infinite.
      for (std::size_t b = 0; b < 18; ++b) band(file, b)[p] = std::abs(v[b]) <= std::numeric_limits<float>::max() ? float(v[b]) : NAN;
    };
    // A period's day-weighted mean at pixel p, and in `share` what it rests on: of its days with
    // a value, those observed (a fill's flag 0); without flags, of its covered days, those with one.
    auto period_mean = [&](const PeriodSources& source, std::int64_t p, double& share) {
      double sum = 0, days = 0, observed_days = 0, covered_days = 0;
      for (std::size_t j = 0; j < source.composite.size(); ++j) {
        const std::size_t at = std::size_t(source.composite[j]) * n + p;
        const float v = w.layers[at];
        covered_days += source.days[j];
        if (!std::isfinite(v)) continue;
        sum += source.days[j] * v, days += source.days[j];
        if (flags && w.flags[at] == 0) observed_days += source.days[j];
      }
      if (flags) share = days > 0 ? observed_days / days : NAN;
      else share = covered_days > 0 ? days / covered_days : NAN;
      return days > 0 ? sum / days : NAN;
    };
    for (std::int64_t p = 0; p < n; ++p) {
      for (std::size_t k = 0; k < periods.size(); ++k) value[k] = period_mean(sources[k], p, observed[k]);
      double unused;
      for (std::size_t k = 0; k < edge_sources.size(); ++k) edge[k] = period_mean(edge_sources[k], p, unused);
      double all_sum = 0;
      int all_count = 0;
      for (int q = 0; q < P; ++q) {
        double s = 0, ss = 0;
        int count = 0;
        for (int y = 0; y < years; ++y) {
          const double v = value[std::size_t(y) * P + q];
          if (std::isfinite(v)) s += v, ++count;
        }
        mean[q] = count > 0 ? s / count : NAN;
        for (int y = 0; y < years; ++y) {
          const double v = value[std::size_t(y) * P + q];
          if (std::isfinite(v)) ss += (v - mean[q]) * (v - mean[q]);
        }
        const double sd = count > 1 ? std::sqrt(ss / (count - 1)) : NAN;
        band(synoptic_mean, q)[p] = float(mean[q]);
        band(synoptic_sd, q)[p] = float(sd);
        band(synoptic_years, q)[p] = float(count);
        int with_observation = 0;
        for (int y = 0; y < years; ++y) {
          const double o = observed[std::size_t(y) * P + q];
          with_observation += o > 0;
          if (observed_file[y] != not_written) band(observed_file[y], q)[p] = float(o);
        }
        if (flags) band(synoptic_observed, q)[p] = float(with_observation);
        for (int y = 0; y < years; ++y) {
          const double v = value[std::size_t(y) * P + q];
          if (year_file[y] != not_written) band(year_file[y], q)[p] = float(v);
          band(anomaly_file[y], q)[p] = float(v - mean[q]);
          band(standardised_file[y], q)[p] = sd > 0 ? float((v - mean[q]) / sd) : NAN;
          if (std::isfinite(v) && count >= 2) all_sum += v, ++all_count;  // as the synoptic miss below
        }
      }
      // Cycle descriptors: each year with its neighbours; the synoptic cycle with itself.
      w.year_cycle_empty.assign(years, 0);
      for (int y = 0; y < years; ++y) {
        if (cycle_file[y] == not_written) continue;
        for (int q = 0; q < 3 * P; ++q) {
          const int yy = y + q / P - 1;
          w.padded[q] = yy < 0        ? edge[std::size_t(q % P)]
                        : yy >= years ? edge[std::size_t(P + q % P)]
                                      : value[std::size_t(yy) * P + q % P];
        }
        const CycleDescriptors d = describe_cycle(w.padded, period_days, request.cycle, harmonics);
        w.year_cycle_empty[y] = !std::isfinite(d.mean);
        if (d.edges_unknown & 1) ++year_starts_unknown[y];
        if (d.edges_unknown & 2) ++year_ends_unknown[y];
        put_cycle(cycle_file[y], p, d);
      }
      for (int q = 0; q < 3 * P; ++q) w.padded[q] = mean[q % P];
      const CycleDescriptors synoptic_cycle = describe_cycle(w.padded, period_days, request.cycle, harmonics);
      put_cycle(cycle_synoptic, p, synoptic_cycle);
      if (std::isfinite(synoptic_cycle.mean))
        for (int y = 0; y < years; ++y)
          if (w.year_cycle_empty[y]) ++year_cycle_missing[y];
      bool any = false;
      for (int q = 0; q < P; ++q)
        if (std::isfinite(mean[q])) any = true, has_value[q] = 1;
      with_values += any;
      with_cycle += std::isfinite(synoptic_cycle.mean);
      // Synoptic miss: RMSE of year-specific against synoptic, and the share of the
      // year-specific variance the synoptic cycle explains (1 - SS_res / SS_tot).
      // Only periods with values in two years or more: a synoptic of one year is that year, and
      // would 'explain' it perfectly.
      double res = 0, tot = 0;
      int count = 0;
      const double overall = all_count > 0 ? all_sum / all_count : NAN;
      for (int y = 0; y < years; ++y)
        for (int q = 0; q < P; ++q) {
          const double v = value[std::size_t(y) * P + q];
          if (!std::isfinite(v) || !(band(synoptic_years, q)[p] >= 2)) continue;
          res += (v - mean[q]) * (v - mean[q]);
          tot += (v - overall) * (v - overall);
          ++count;
        }
      band(miss, 0)[p] = count > 0 ? float(std::sqrt(res / count)) : NAN;
      const double explained = tot > 0 ? 1.0 - res / tot : NAN;
      band(miss, 1)[p] = float(explained);
      band(miss, 2)[p] = float(1.0 - explained);
    }
    outputs.write_all(core, w.bands, w.tile);
    pixels_with_values += with_values;
    pixels_with_cycle += with_cycle;
    for (int q = 0; q < P; ++q)
      if (has_value[q]) period_has_value[q] = true;
  };
  detail::run_blocks(plan, threads, workers, process, at_once);
  outputs.set_keep_unchanged(request.keep_unchanged);
  stack.require_unchanged();  // read whole, not part before and part after another's publishing
  outputs.commit();

  SeasonsSummary summary;
  summary.stale_years_removed = detail::remove_year_layers_outside(
      request.out_dir, name, {"year", "anomaly", "anomaly_standardised", "cycle", "observed"}, first_year, last_year,
      &summary.outputs_removed);
  summary.outputs_written = outputs.written();
  summary.outputs_unchanged = outputs.unchanged();
  summary.years = years;
  summary.periods = P;
  summary.files = int(output_paths.size());
  summary.width = area.width;
  summary.height = area.height;
  summary.first_year = first_year;
  summary.last_year = last_year;
  summary.dates_at_month_ends = dates_at_month_ends(times);
  summary.monthly_marks_note = monthly_marks_note(times, "--date-marks start");
  summary.pixels_with_values = pixels_with_values;
  summary.years_without_composite = years_without_composite;
  for (int y = 0; y < years; ++y)
    if (year_cycle_missing[y] > 0 && !std::count(years_without_composite.begin(), years_without_composite.end(),
                                                 first_year + y))
      summary.years_with_cycle_gaps.emplace_back(first_year + y, year_cycle_missing[y]);
  for (int y = 0; y < years; ++y)
    if (year_starts_unknown[y] > 0 || year_ends_unknown[y] > 0)
      summary.years_with_unknown_edges.push_back({first_year + y, year_starts_unknown[y], year_ends_unknown[y]});
  summary.pixels_with_cycle = pixels_with_cycle;
  summary.from_fill = flags.has_value();
  summary.partly_covered = std::move(partly_covered);
  for (int q = 0; q < P; ++q)
    if (!period_has_value[q]) summary.periods_without_value.push_back(q);
  summary.outputs = output_paths;
  summary.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
  summary.memory_raised_to = raised_to;
  return summary;
}

}  // namespace kalends
