// The fill engine: stack -> blocks -> method -> writer. Blocks run in parallel; each worker owns
// its readers and buffers, outputs are shared behind one lock per file.
#include <sys/stat.h>
#include <tbb/enumerable_thread_specific.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <cpl_json.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <stdexcept>
#include <fmt/format.h>
#include <mutex>
#include <fstream>
#include <map>
#include <set>
#include <tuple>

#include "engine/block_runner.hpp"
#include "engine/calendar.hpp"
#include "engine/memory_budget.hpp"
#include "engine/parallel.hpp"
#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/json_text.hpp"
#include "io/output_set.hpp"
#include "io/qa_pairing.hpp"
#include "kalends/error.hpp"
#include "kalends/season.hpp"
#include "kalends/fill.hpp"
#include "kalends/qa_rule.hpp"

namespace kalends {

Compression parse_compression(const std::string& text) {
  if (text == "deflate") return Compression::deflate;
  if (text == "zstd") return Compression::zstd;
  if (text == "lzw") return Compression::lzw;
  if (text == "none") return Compression::none;
  throw UsageError("--compress", "expected deflate, zstd, lzw or none, not '" + text + "'");
}

namespace {

namespace fs = std::filesystem;
constexpr int tile_size = 256;

struct Counters {
  std::int64_t pixel_dates = 0, observed = 0, masked_by_qa = 0, rejected = 0, filled = 0,
               unfilled = 0, never_observed = 0, never_filled = 0;
  double kernel_seconds = 0;
  std::map<std::string, std::int64_t> not_fitted;  // series, by the method's reason
};

// Counts of one year's dates, kept in fill-years.tsv so a run that recomputes some years
// (FillRequest::only_years) can report the whole stack.
struct YearCounts {
  std::int64_t pixel_dates = 0, observed = 0, rejected = 0, filled = 0, unfilled = 0;
  std::map<std::string, std::int64_t> not_fitted;  // pixel-years, by the method's reason
};

// fill-years.tsv: "# grid START STEP [season DAYS]", then per year "YEAR PIXEL_DATES OBSERVED REJECTED FILLED
// UNFILLED", then per year and reason "not-fitted<TAB>YEAR<TAB>COUNT<TAB>REASON".
constexpr const char* not_fitted_tag = "not-fitted\t";

// With a reach, each year is filled on its own slice of the grid.
struct Segment {
  int year = 0;
  int first_slot = 0;          // the slice: full-grid slots first_slot .. first_slot + grid.size - 1
  TimeGrid grid;
  int own_first = 0, own_last = -1;  // full-grid slots inside the year
  std::vector<std::size_t> periods;  // calendar periods starting in the year
};

// Parameters a method chose for one block (one year's segment with a reach).
struct BlockChoice {
  int block = 0, year = 0;
  Window core;
  std::map<std::string, double> values;
};

struct Worker {
  std::unique_ptr<StackReader> data, qa;
  std::vector<float> plane;
  std::vector<std::uint32_t> qa_plane;
  std::vector<float> values, weights;
  std::vector<int> observations, valued;
  std::vector<std::int64_t> unobserved;  // core pixels with no observation on any date
  BlockOutput out, segment_out;
  std::vector<float> segment_values, segment_weights;
  std::vector<float> value_plane, sd_plane, flag_plane, tile;
  Counters counters;
  std::map<int, YearCounts> years;
  std::vector<BlockChoice> chosen;
};

}  // namespace

// The method's side of the contract (fill_method.hpp), checked after each block: arrays of
// another size had been read past their end (garbage values, exit 0), and a negative sd written
// as it was. A method's defect, not the user's: std::logic_error, one line at the CLI.
void check_block_output(const FillMethod& method, const BlockOutput& out, std::size_t cells) {
  if (out.fitted.size() != cells || out.sd.size() != cells || out.rejected.size() != cells)
    throw std::logic_error(fmt::format("fill method '{}' returned {} values, {} sd and {} rejection marks for a block of "
                                       "{} cells (its fill() must keep the sizes BlockOutput was given)",
                                       method.name(), out.fitted.size(), out.sd.size(), out.rejected.size(), cells));
  for (std::size_t i = 0; i < cells; ++i)
    if (out.sd[i] < 0 || std::isinf(out.sd[i]))
      throw std::logic_error(fmt::format("fill method '{}' returned an sd of {} (an sd is finite and 0 or more, or "
                                         "NaN where unknown)", method.name(), out.sd[i]));
}

std::string calendar_gap_note(const FillSummary& summary) {
  const int n = summary.calendar_without_composite;
  if (n == 0) return "";
  const CivilDate& first = summary.first_without_composite;
  return fmt::format("{} calendar layer{} (from {}-{:02d}-{:02d}) lie{} in the season but where the stack has no "
                     "composite that year: {} the curve across that gap (flag 2), not a period with data, unless "
                     "--max-gap leaves the gap empty",
                     n, n == 1 ? "" : "s", first.year, first.month, first.day, n == 1 ? "s" : "",
                     n == 1 ? "its value is" : "their values are");
}

std::vector<std::string> fill_notes(const FillRequest& request, const FillSummary& summary) {
  std::vector<std::string> notes;
  for (const auto& [reason, n] : summary.series_not_fitted)
    notes.push_back(fmt::format("{} {} not fitted: {}", n, request.method.reach_days > 0 ? "pixel-years" : "pixels",
                                reason));
  if (!summary.unapplied_scaling.empty())
    notes.push_back("the input states " + summary.unapplied_scaling +
                    ", which GDAL leaves unapplied: the values were filled as stored (set 'scale' and "
                    "'offset' if they are not in physical units)");
  if (!summary.time_grid_note.empty()) notes.push_back(summary.time_grid_note);
  if (const std::string note = calendar_gap_note(summary); !note.empty()) notes.push_back(note);
  if (!summary.monthly_marks_note.empty() && request.every && request.marks == DateMarks::automatic)
    notes.push_back(summary.monthly_marks_note);
  if (!summary.mixed_value_rules.empty())
    notes.push_back("the inputs' value rules differ: " + summary.mixed_value_rules +
                    " (set 'scale', 'offset' or 'nodata' for all if one file's metadata is wrong)");
  if (!summary.date_conflict.empty()) notes.push_back(summary.date_conflict);
  if (!summary.mixed_names.empty()) notes.push_back(summary.mixed_names);
  return notes;
}

namespace {

// Whether `file` is a raster an earlier fill wrote (its metadata names the method): only such
// files are ever removed as outputs the fill no longer makes, never a user's own.
// Inputs as typed: 'A/*.tif' and './A/*.tif' (or its absolute path, from cron) are one, and so
// is 'L/*.tif' where L is a link to A: the folder is compared with its links resolved.
fs::path resolved_pattern(const std::string& pattern) {
  const fs::path path = fs::absolute(pattern).lexically_normal();
  std::error_code ec;
  const fs::path folder = fs::weakly_canonical(path.parent_path(), ec);
  return ec ? path : folder / path.filename();
}

bool same_input(const std::string& a, const std::string& b) {
  return a == b || resolved_pattern(a) == resolved_pattern(b);
}

// A fill's output that this fill may replace: any fill's in a folder of its own, else one of
// the same input (or one that records none).
bool replaceable_fill_output(const fs::path& file, const FillRequest& request) {
  const auto metadata = detail::raster_metadata(file.string());
  if (!metadata.count("KALENDS_METHOD")) return false;
  const auto input = metadata.find("KALENDS_INPUT");
  return request.out_dir_is_its_own || input == metadata.end() || same_input(input->second, request.input);
}

}  // namespace

FillSummary run_fill(const FillRequest& given, const ProgressCallback& progress) {
  FillRequest request = given;  // its date marks resolved once the dates are known
  const auto started = std::chrono::steady_clock::now();
  detail::start_gdal();

  // Options first, then every input, before anything is created.
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  detail::require_plain_name(request.name);
  check_band(request.rules.band, "--band");
  std::optional<QaRule> keep_rule = qa_rule_of(request.qa_input, request.qa_keep, request.qa_band);
  MethodOptions method_options = request.method;
  method_options.clamp_min = request.rules.valid_min;
  method_options.clamp_max = request.rules.valid_max;
  const std::unique_ptr<FillMethod> method = make_fill_method(method_options);

  const Stack stack = Stack::open(request.input, request.rules);
  if (stack.layers().size() < 2)
    throw InputError(request.input, "holds a single date; filling in time needs several");
  request.marks = resolve_date_marks(given.marks, stack.times());
  std::optional<QaPairing> qa;
  if (keep_rule) qa = pair_qa(stack, *keep_rule, request.qa_input, request.qa_band);
  const QaRule* keep = qa ? &qa->rule : nullptr;
  detail::require_out_apart_from(stack, request.out_dir, "input");
  if (qa) detail::require_out_apart_from(qa->stack, request.out_dir, "QA");
  const TimeGrid grid = TimeGrid::build(stack.times());
  const int n_slots = grid.size;
  const Grid& raster = stack.grid();
  const Window area = area_of(raster.width, raster.height, request.region, request.input);
  const std::string name = request.name.empty() ? stack.name() : request.name;

  // Its text outputs, as its rasters, replace only their like (a user's notes under the name).
  detail::require_own_text_file((fs::path(request.out_dir) / "fill-summary.json").string(), "\"pixel_dates\"");
  detail::require_own_text_file((fs::path(request.out_dir) / "fill-years.tsv").string(), "# grid ");
  // Output names: one per input date, plus the regular calendar.
  // Removed again if the run fails before writing; a check alone makes nothing.
  std::optional<detail::OutputFolder> output_folder;
  if (!request.check_only) output_folder.emplace(request.out_dir);
  std::vector<detail::PeriodMean> periods;
  std::string calendar_dir;
  std::optional<detail::OutputFolder> calendar_folder;  // inside output_folder, so removed before it
  if (request.every) {
    periods = detail::period_means(grid, *request.every, request.marks);
    calendar_dir = (fs::path(request.out_dir) / ("calendar-" + request.every->label())).string();
    if (!request.check_only) calendar_folder.emplace(calendar_dir);
  }
  // Years: with a reach, each is filled from its own slice of the grid, and a run may redo
  // only some of them.
  const double reach = request.method.reach_days;
  if (reach > 0 && reach < 2 * grid.step_days)
    throw UsageError("--reach", fmt::format("must be at least two time steps ({:g} days)", 2 * grid.step_days));
  if (request.only_years && !(reach > 0)) throw UsageError("--reach", "recomputing some years needs a reach");
  const std::string years_file = (fs::path(request.out_dir) / "fill-years.tsv").string();
  // With a calendar, every year's periods depend on the season of the whole stack (the days of
  // the year some composite stands for): a composite that moves the season's end changes the
  // calendar of every year, so earlier years are reusable only under the same season.
  const std::string grid_label =
      fmt::format("{} {:g}", grid.start.iso(), grid.step_days) + (grid.placed_by_intervals ? " by intervals" : "") +
      (request.every ? " season " + detail::season_label(grid, request.marks) : std::string());
  std::map<int, YearCounts> earlier_years;
  std::optional<std::set<int>> only;
  if (request.only_years) {
    // Earlier counts are usable only if they were made on the same grid.
    std::ifstream in(years_file);
    std::string header;
    if (std::getline(in, header) && header == "# grid " + grid_label) {
      std::string line;
      while (std::getline(in, line)) {
        YearCounts c;
        int year = 0;
        long long count = 0;
        int reason_at = 0;
        if (line.starts_with(not_fitted_tag)) {
          if (std::sscanf(line.c_str() + 11, "%d\t%lld\t%n", &year, &count, &reason_at) == 2 && reason_at > 0)
            earlier_years[year].not_fitted[line.substr(11 + reason_at)] += count;
        } else if (std::sscanf(line.c_str(), "%d %lld %lld %lld %lld %lld", &year, (long long*)&c.pixel_dates,
                               (long long*)&c.observed, (long long*)&c.rejected, (long long*)&c.filled,
                               (long long*)&c.unfilled) == 6) {
          c.not_fitted = std::move(earlier_years[year].not_fitted);
          earlier_years[year] = std::move(c);
        }
      }
      only = std::set<int>(request.only_years->begin(), request.only_years->end());
    }
  }
  auto written_year = [&](int year) { return !only || only->count(year) > 0; };
  std::vector<Segment> segments;
  if (reach > 0) {
    const double start_day = grid.start.seconds / 86400.0;
    auto day_of_slot = [&](int s) { return start_day + grid.slot_days[s]; };
    for (int year = grid.start.date().year; year <= grid.slot_time(grid.size - 1).date().year; ++year) {
      if (!written_year(year)) continue;
      const double jan1 = double(days_from_civil(year, 1, 1)), next = double(days_from_civil(year + 1, 1, 1));
      Segment seg;
      seg.year = year;
      int first = -1, last = -1;
      for (int s = 0; s < grid.size; ++s) {
        const double d = day_of_slot(s);
        if (in_year_slice(year, d, reach)) {
          if (first < 0) first = s;
          last = s;
        }
        if (d >= jan1 && d < next) {
          if (seg.own_last < 0) seg.own_first = s;
          seg.own_last = s;
        }
      }
      if (seg.own_last < 0) continue;
      seg.first_slot = first;
      seg.grid.start = grid.slot_time(first);
      seg.grid.step_days = grid.step_days;
      seg.grid.size = last - first + 1;
      for (int s = first; s <= last; ++s) seg.grid.slot_days.push_back(grid.slot_days[s] - grid.slot_days[first]);
      for (int slot : grid.slot_of_date)
        if (slot >= first && slot <= last) seg.grid.slot_of_date.push_back(slot - first);
      for (std::size_t k = 0; k < periods.size(); ++k)
        if (periods[k].start.date().year == year) seg.periods.push_back(k);
      segments.push_back(std::move(seg));
    }
    // A period of a year the grid has no slot in (December 2020 before composites from 1 January
    // 2021 that stand for days before their dates) comes from the nearest year's curve: its
    // slots are that year's first (or last). It had been written empty, flag band NaN.
    const int first_year = grid.start.date().year, last_year = grid.slot_time(grid.size - 1).date().year;
    for (std::size_t k = 0; k < periods.size(); ++k) {
      const int year = periods[k].start.date().year;
      if ((year >= first_year && year <= last_year) || !written_year(year)) continue;
      for (Segment& seg : segments)
        if (seg.year == (year < first_year ? first_year : last_year)) seg.periods.push_back(k);
    }
  }
  const std::string parameters = join_parameters(method->parameters());
  const std::string unit = stack.layers().front().unit;
  std::vector<detail::OutputSpec> specs;
  std::vector<int> layer_output(stack.layers().size(), -1), period_output(periods.size(), -1);
  std::set<std::string> taken;
  auto common_metadata = [&]() {
    std::map<std::string, std::string> m{
        {"KALENDS_VERSION", KALENDS_VERSION},
        {"KALENDS_METHOD", method->name()},
        {"KALENDS_PARAMETERS", parameters},
        {"KALENDS_INPUT", request.input},
        {"KALENDS_TIME_STEP_DAYS", fmt::format("{:g}", grid.step_days)},
        {"KALENDS_REACH_DAYS", reach > 0 ? fmt::format("{:g}", reach) : "whole series"},
        {"KALENDS_VALUES", request.smooth ? "fitted curve everywhere"
                                          : "observed values kept, gaps and outliers filled"}};
    if (keep)
      m["KALENDS_QA"] = request.qa_input + (request.qa_band != 1 ? " band " + std::to_string(request.qa_band) : "") +
                        " keep: " + keep->text();
    if (!request.command_line.empty()) m["KALENDS_COMMAND"] = request.command_line;
    return m;
  };
  for (std::size_t i = 0; i < stack.layers().size(); ++i) {
    const Layer& layer = stack.layers()[i];
    if (!written_year(layer.time.date().year)) continue;
    layer_output[i] = int(specs.size());
    detail::OutputSpec spec;
    spec.path = (fs::path(request.out_dir) / (name + "_" + layer.time.label() + ".tif")).string();
    if (!taken.insert(spec.path).second)
      throw InputError(layer.path, "two dates give the same output name " + spec.path);
    spec.metadata = common_metadata();
    spec.metadata["KALENDS_DATE"] = layer.time.iso();
    const bool one_file = stack.layers().size() > 1 && stack.layers()[0].path == stack.layers()[1].path;
    spec.metadata["KALENDS_SOURCE"] =
        layer.path + (layer.band != 1 || one_file ? " band " + std::to_string(layer.band) : "");
    spec.bands = detail::fill_bands(unit);
    specs.push_back(std::move(spec));
  }
  for (std::size_t k = 0; k < periods.size(); ++k) {
    const detail::PeriodMean& period = periods[k];
    if (!written_year(period.start.date().year)) continue;
    period_output[k] = int(specs.size());
    detail::OutputSpec spec;
    spec.path = (fs::path(calendar_dir) / (name + "_" + period.start.label() + ".tif")).string();
    spec.metadata = common_metadata();
    spec.metadata["KALENDS_DATE"] = period.start.iso();
    spec.metadata["KALENDS_PERIOD"] = request.every->label();
    // Outside the season no composite stands for any day: 0 days, which `extract` reads as
    // the reason for the empty values.
    spec.metadata["KALENDS_PERIOD_DAYS_COVERED"] = std::to_string(period.in_season ? period.days : 0);
    spec.metadata["KALENDS_VALUES"] = "period mean of the fitted curve";
    spec.metadata["KALENDS_DATE_MARKS"] = request.marks == DateMarks::start ? "start"
                                          : request.marks == DateMarks::end ? "end"
                                                                              : "middle";
    spec.bands = detail::fill_bands(unit, true);
    specs.push_back(std::move(spec));
  }

  // Memory: a worker's buffers per read pixel, then blocks as large as the share allows. The
  // three output planes twice: the worker's, and a date writer's while dates go out in parallel.
  const int threads = request.threads > 0 ? request.threads : tbb::this_task_arena::max_concurrency();
  const std::int64_t layers = std::int64_t(stack.layers().size());
  // With a reach, a year's slice is copied in and out, and the method works on the longest one.
  const TimeGrid* widest = &grid;
  for (const Segment& seg : segments)
    if (widest == &grid || seg.grid.size > widest->size) widest = &seg.grid;
  const std::int64_t bytes_per_pixel =
      (n_slots + (segments.empty() ? 0 : widest->size)) * (4 + 4 + 4 + 4 + 1) + 4 + (keep ? 4 : 0) +
      2 * 3 * 4 + 4 + std::int64_t(method->scratch_bytes_per_pixel(*widest));
  std::set<std::string> read_files;
  for (const Layer& l : stack.layers()) read_files.insert(l.path);
  if (qa)
    for (const Layer& l : qa->stack.layers()) read_files.insert(l.path);
  // A block per thread at once when the budget gives each at least one tile and its halo; else
  // fewer, down to one, whose parallel loops the other threads then share (a method with a
  // large halo and many dates, such as spacetime, on a machine with many cores).
  const Window smallest_read =
      BlockPlan::smallest_read_window(raster.width, raster.height, method->halo(), tile_size, area);
  const std::int64_t smallest_block = smallest_read.pixels();
  // Too little for one block, or not even for the fixed overheads: say what would do, or take
  // it where the caller allows (a budget the user did not choose).
  const std::int64_t one_block = detail::budget_for_read_pixels(smallest_block, 1, bytes_per_pixel,
                                                                int(read_files.size()), int(specs.size()));
  auto refuse = [&] {
    throw UsageError("--memory", fmt::format(
        "budget of {} MiB is too small for one block (it reads {} x {} px{}); {} MiB would do",
        request.memory_bytes >> 20, smallest_read.width, smallest_read.height,
        method->halo() > 0 ? " with its halo" : "", one_block >> 20));
  };
  std::int64_t budget = request.memory_bytes;
  int at_once = 1;
  detail::MemoryShare share;
  try {
    const detail::BlockShare fitted = detail::share_for_blocks(budget, threads, smallest_read, bytes_per_pixel,
                                                               int(read_files.size()), int(specs.size()));
    share = fitted.share;
    at_once = fitted.at_once;
  } catch (const UsageError&) {
    if (one_block > request.memory_ceiling) refuse();
    budget = one_block;
    share = detail::share_memory(budget, 1, bytes_per_pixel, int(read_files.size()), int(specs.size()));
  }
  if (request.check_only) {
    FillSummary checked;
    checked.memory_for_one_block = one_block;
    return checked;
  }
  const detail::GdalCacheScope cache(share.gdal_cache);
  // A method with a halo works block by block on single tiles (or full-width strips of one tile
  // row where the raster is narrower than a tile and its halo), however large the budget: its
  // values then depend on neither --memory nor the threads nor the rows a cluster shard takes.
  // Larger blocks were no faster (512 x 512 px, 2 threads: 19.1 s in one block, 17.4 s in four).
  const bool by_tile = method->halo() > 0;
  const BlockPlan plan = BlockPlan::make(raster.width, raster.height, method->halo(),
                                         by_tile ? smallest_block : share.max_read_pixels, tile_size,
                                         request.region, by_tile ? 1 : 0);

  require_readable(stack, area.x, area.y);
  if (qa) require_readable(qa->stack, area.x, area.y);
  std::vector<std::string> output_paths;
  for (const auto& spec : specs) output_paths.push_back(spec.path);
  detail::OutputSet outputs(std::move(specs), window_grid(raster, area), request.compression, tile_size);
  outputs.set_origin(area.x, area.y);

  tbb::enumerable_thread_specific<Worker> workers([&] {
    Worker w;
    w.data = stack.reader();
    if (qa) w.qa = qa->stack.reader();
    return w;
  });
  // Per date: values kept and values the valid range removed, to catch a wrong scale factor.
  std::vector<std::atomic<std::int64_t>> in_range(layers), out_of_range(layers);
  std::atomic<int> blocks_done{0};
  std::mutex progress_mutex;

  auto process = [&](const Block& block, Worker& w) {
    const Window& read = block.read;
    const Window& core = block.core;
    const std::int64_t read_pixels = read.pixels(), core_pixels = core.pixels();
    w.plane.resize(read_pixels);
    if (keep) w.qa_plane.resize(read_pixels);
    w.values.assign(read_pixels * n_slots, NAN);
    w.weights.assign(read_pixels * n_slots, 0.0f);
    for (std::size_t i = 0; i < std::size_t(layers); ++i) {
      out_of_range[i] += w.data->read_values(i, read, w.plane.data());
      if (keep) w.qa->read_integers(qa->layer_of[i], read, w.qa_plane.data());
      const int slot = grid.slot_of_date[i];
      std::int64_t valid = 0;
      for (std::int64_t p = 0; p < read_pixels; ++p) valid += !std::isnan(w.plane[p]);
      in_range[i] += valid;
      for (std::int64_t p = 0; p < read_pixels; ++p) {
        const float v = w.plane[p];
        if (std::isnan(v)) continue;
        if (keep && !keep->keep(w.qa_plane[p])) continue;
        w.values[p * n_slots + slot] = v;
        w.weights[p * n_slots + slot] = 1.0f;
      }
    }
    auto read_index = [&](std::int64_t cp) {
      const std::int64_t cy = cp / core.width, cx = cp % core.width;
      return (cy + core.y - read.y) * read.width + (cx + core.x - read.x);
    };
    w.value_plane.resize(core_pixels);
    w.sd_plane.resize(core_pixels);
    w.flag_plane.resize(core_pixels);
    // A calendar period from a curve on slots offset .. offset + stride - 1 of the full grid.
    auto write_period = [&](std::size_t k, const BlockOutput& out, int offset, int stride) {
      const detail::PeriodMean& period = periods[k];
      for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
        const std::int64_t rp = read_index(cp);
        double value = 0, sd = 0;
        for (std::size_t j = 0; j < period.slots.size(); ++j) {
          const std::size_t at = std::size_t(cp) * stride + (period.slots[j] - offset);
          value += period.weights[j] * out.fitted[at];
          sd += period.weights[j] * out.sd[at];
        }
        if (!period.in_season) value = NAN;  // no composite of any year stands for these days
        bool observed_inside = false;
        for (int slot : period.slots_inside)
          if (w.weights[rp * n_slots + slot] > 0 && !out.rejected[std::size_t(cp) * stride + (slot - offset)])
            observed_inside = true;
        const bool ok = std::isfinite(value);
        w.value_plane[cp] = ok ? float(value) : NAN;
        w.sd_plane[cp] = ok ? float(sd) : NAN;
        w.flag_plane[cp] = float(!ok ? Flag::unfilled : observed_inside ? Flag::observed : Flag::filled);
      }
      outputs.write(std::size_t(period_output[k]), core, w.value_plane.data(), w.sd_plane.data(),
                    w.flag_plane.data(), w.tile);
    };
    w.out.resize(std::size_t(core_pixels) * n_slots);
    // Pixels the whole stack never observes, to be left empty: the method still sees them
    // (they hold nothing it could use), and its values for them are dropped.
    w.unobserved.clear();
    if (!request.method.fill_never_observed)
      for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
        const float* weight = &w.weights[read_index(cp) * n_slots];
        if (std::all_of(weight, weight + n_slots, [](float x) { return x == 0; })) w.unobserved.push_back(cp);
      }
    auto leave_unobserved = [&](BlockOutput& out, int stride) {
      for (std::int64_t cp : w.unobserved) {
        std::fill_n(out.fitted.begin() + cp * stride, stride, NAN);
        std::fill_n(out.sd.begin() + cp * stride, stride, NAN);
      }
    };
    const auto kernel_start = std::chrono::steady_clock::now();
    if (!(reach > 0)) {
      method->fill(BlockInput{&grid, read, core, w.values, w.weights}, w.out);
      check_block_output(*method, w.out, std::size_t(core_pixels) * n_slots);
      leave_unobserved(w.out, n_slots);
      if (!w.out.chosen.empty()) w.chosen.push_back({block.index, 0, core, w.out.chosen});
      for (const auto& [reason, n] : w.out.not_fitted) w.counters.not_fitted[reason] += n;
    } else {
      std::fill(w.out.fitted.begin(), w.out.fitted.end(), NAN);
      std::fill(w.out.sd.begin(), w.out.sd.end(), NAN);
      for (const Segment& seg : segments) {
        const int n = seg.grid.size;
        w.segment_values.resize(std::size_t(read_pixels) * n);
        w.segment_weights.resize(std::size_t(read_pixels) * n);
        for (std::int64_t p = 0; p < read_pixels; ++p) {
          std::copy_n(w.values.begin() + p * n_slots + seg.first_slot, n, w.segment_values.begin() + p * n);
          std::copy_n(w.weights.begin() + p * n_slots + seg.first_slot, n, w.segment_weights.begin() + p * n);
        }
        w.segment_out.resize(std::size_t(core_pixels) * n);
        method->fill(BlockInput{&seg.grid, read, core, w.segment_values, w.segment_weights}, w.segment_out);
        check_block_output(*method, w.segment_out, std::size_t(core_pixels) * n);
        leave_unobserved(w.segment_out, n);
        if (!w.segment_out.chosen.empty())
          w.chosen.push_back({block.index, seg.year, core, w.segment_out.chosen});
        for (const auto& [reason, n] : w.segment_out.not_fitted) w.years[seg.year].not_fitted[reason] += n;
        for (std::int64_t cp = 0; cp < core_pixels; ++cp)
          for (int slot = seg.own_first; slot <= seg.own_last; ++slot) {
            const std::size_t from = std::size_t(cp) * n + (slot - seg.first_slot);
            const std::size_t to = std::size_t(cp) * n_slots + slot;
            w.out.fitted[to] = w.segment_out.fitted[from];
            w.out.sd[to] = w.segment_out.sd[from];
            w.out.rejected[to] = w.segment_out.rejected[from];
          }
        // The year's calendar periods come from the year's own curve, margins included.
        for (std::size_t k : seg.periods) write_period(k, w.segment_out, seg.first_slot, n);
      }
    }
    w.counters.kernel_seconds +=
        std::chrono::duration<double>(std::chrono::steady_clock::now() - kernel_start).count();
    // Each cell's output value and flag; returns whether it was observed.
    auto cell = [&](std::int64_t cp, int slot, float& value, Flag& flag) {
      const std::int64_t rp = read_index(cp);
      const float y = w.values[rp * n_slots + slot];
      const bool observed = w.weights[rp * n_slots + slot] > 0;
      const std::size_t at = std::size_t(cp) * n_slots + slot;
      const float fit = w.out.fitted[at];
      if (observed && w.out.rejected[at]) {
        // A rejected observation beyond the method's reach has nothing to replace it.
        if (std::isfinite(fit))
          value = fit, flag = Flag::rejected;
        else
          value = NAN, flag = Flag::unfilled;
      } else if (observed) {
        value = request.smooth && std::isfinite(fit) ? fit : y, flag = Flag::observed;
      } else if (std::isfinite(fit)) {
        value = fit, flag = Flag::filled;
      } else {
        value = NAN, flag = Flag::unfilled;
      }
      return observed;
    };
    w.observations.assign(core_pixels, 0);
    w.valued.assign(core_pixels, 0);
    for (std::size_t i = 0; i < std::size_t(layers); ++i) {
      const int slot = grid.slot_of_date[i];
      const bool written = layer_output[i] >= 0;
      YearCounts& year = w.years[stack.layers()[i].time.date().year];
      if (written) year.pixel_dates += core_pixels;
      for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
        float value;
        Flag flag;
        const bool observed = cell(cp, slot, value, flag);
        w.observations[cp] += observed;
        w.valued[cp] += flag != Flag::unfilled;
        w.counters.observed += observed;
        if (written) {
          year.observed += observed;
          // An observation rejected where nothing replaces it (flag 3) still counts as rejected,
          // so that observed = kept + rejected and missing = filled + unfilled.
          year.rejected += flag == Flag::rejected || (observed && flag == Flag::unfilled);
          year.filled += flag == Flag::filled;
          year.unfilled += flag == Flag::unfilled && !observed;
        }
      }
    }
    // Dates in parallel: each is its own file with its own lock, and a stack of fewer blocks
    // than threads (one block: a small stack) would otherwise compress and write on one thread.
    // The order of files is staggered so that blocks seldom wait on the same file's lock.
    detail::parallel_ranges(std::size_t(layers), 1, [&](std::size_t k_begin, std::size_t k_end) {
      std::vector<float> value_plane(core_pixels), sd_plane(core_pixels), flag_plane(core_pixels), tile;
      for (std::size_t k = k_begin; k < k_end; ++k) {
        const std::size_t i = (k + std::size_t(block.index) * 7) % std::size_t(layers);
        if (layer_output[i] < 0) continue;
        const int slot = grid.slot_of_date[i];
        for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
          Flag flag;
          cell(cp, slot, value_plane[cp], flag);
          // No value, no sd (outputs.md): a method's sd beside a value it did not give is not written.
          sd_plane[cp] = flag == Flag::unfilled ? NAN : w.out.sd[std::size_t(cp) * n_slots + slot];
          flag_plane[cp] = float(flag);
        }
        outputs.write(std::size_t(layer_output[i]), core, value_plane.data(), sd_plane.data(),
                      flag_plane.data(), tile);
      }
    });
    w.counters.pixel_dates += core_pixels * layers;
    for (int count : w.observations) w.counters.never_observed += count == 0;
    for (int count : w.valued) w.counters.never_filled += count == 0;
    if (keep) {
      // Counted apart so the summary can say how much the QA rule removed.
      for (std::size_t i = 0; i < std::size_t(layers); ++i) {
        w.data->read_values(i, read, w.plane.data());
        w.qa->read_integers(qa->layer_of[i], read, w.qa_plane.data());
        for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
          const std::int64_t rp = read_index(cp);
          w.counters.masked_by_qa += !std::isnan(w.plane[rp]) && !keep->keep(w.qa_plane[rp]);
        }
      }
    }
    if (!(reach > 0))
      for (std::size_t k = 0; k < periods.size(); ++k) write_period(k, w.out, 0, n_slots);
    const int done = ++blocks_done;
    if (progress) {
      std::lock_guard lock(progress_mutex);
      progress(done, int(plan.blocks.size()));
    }
  };

  detail::run_blocks(plan, threads, workers, process, at_once);
  for (std::size_t i = 0; i < std::size_t(layers); ++i)
    if (in_range[i] == 0 && out_of_range[i] > 0)
      throw InputError(stack.layers()[i].path,
                       request.rules.valid_min || request.rules.valid_max
                           ? fmt::format("every value is outside the valid range {:g} to {:g} (wrong scale factor or range?)",
                                         request.rules.valid_min.value_or(-INFINITY),
                                         request.rules.valid_max.value_or(INFINITY))
                           : std::string("every value is beyond the 32-bit values the outputs hold after scale and "
                                         "offset (wrong scale factor?)"));
  // Outputs of another input under this fill's names (two stacks of one name sharing a date in
  // one folder) are replaced like any earlier output, and counted so that it is said.
  int replaced_of_other_input = 0;
  std::string other_input;
  if (!request.out_dir_is_its_own)
    for (const std::string& path : output_paths) {
      std::error_code ec;
      if (!fs::exists(path, ec)) continue;
      const auto metadata = detail::raster_metadata(path);
      const auto input = metadata.find("KALENDS_INPUT");
      if (input != metadata.end() && !same_input(input->second, request.input)) {
        if (replaced_of_other_input++ == 0) other_input = input->second;
      }
    }
  outputs.set_keep_unchanged(request.keep_unchanged);
  stack.require_unchanged();  // read whole, not part before and part after another's publishing
  outputs.commit();
  // Outputs of dates no longer in the stack (a composite removed or replaced) would otherwise
  // linger beside the new ones; only this run's years are cleaned.
  int removed = 0;
  {
    std::error_code ec;  // a file that cannot be removed stays; the new outputs are complete
    std::set<std::string> current;
    for (const std::string& path : output_paths) current.insert(fs::path(path).lexically_normal().string());
    for (const std::string& folder : {request.out_dir, calendar_dir}) {
      if (folder.empty() || !fs::exists(folder)) continue;
      for (const auto& entry : fs::directory_iterator(folder)) {
        const std::string file = entry.path().filename().string();
        if (file.rfind(name + "_", 0) != 0 || entry.path().extension() != ".tif") continue;
        const auto date = find_date_in_name(file.substr(name.size() + 1));
        if (!date || date->position != 0 || !written_year(date->time.date().year)) continue;
        if (!current.count(entry.path().lexically_normal().string()) && replaceable_fill_output(entry.path(), request) &&
            fs::remove(entry.path(), ec))
          ++removed;
      }
    }
    // A whole run also drops what this fill no longer makes: the calendar of another period
    // (an earlier --every) and the per-year counts of a run by years. Later steps would read
    // them as current.
    if (!only) {
      if (!(reach > 0) && fs::remove(years_file, ec)) ++removed;
      for (const auto& entry : fs::directory_iterator(request.out_dir, ec)) {
        const std::string folder = entry.path().filename().string();
        if (!entry.is_directory() || !folder.starts_with("calendar-") ||
            (request.every && folder == "calendar-" + request.every->label()))
          continue;
        // A calendar of a period this fill can make (calendar-16d), not a user's copy of one
        // (calendar-1M.bak, which had been emptied).
        try {
          if (CalendarPeriod::parse(folder.substr(9)).label() != folder.substr(9)) continue;
        } catch (const UsageError&) {
          continue;
        }
        for (const auto& file : fs::directory_iterator(entry.path(), ec)) {
          const std::string f = file.path().filename().string();
          if (f.starts_with(name + "_") && file.path().extension() == ".tif" && replaceable_fill_output(file.path(), request) &&
              fs::remove(file.path(), ec))
            ++removed;
        }
        if (fs::is_empty(entry.path(), ec)) fs::remove(entry.path(), ec);
      }
    }
  }

  FillSummary summary;
  summary.outputs_of_another_input = replaced_of_other_input;
  summary.another_input = other_input;
  summary.unapplied_scaling = unapplied_scaling(stack);
  summary.mixed_value_rules = mixed_value_rules(stack);
  summary.date_conflict = date_conflict_note(stack);
  summary.mixed_names = mixed_names_note(stack);
  if (grid.from_smallest_spacing)
    summary.time_grid_note = fmt::format(
        "dates of mixed spacing (median {:g} days, smallest {:g}): the time grid steps {:g} days so that every date "
        "keeps its own day; a fixed lambda or time smoothing counts these steps",
        grid.median_spacing_days, grid.step_days, grid.step_days);
  else if (grid.largest_shift_days >= grid.step_days && !grid.fixed_days_of_month)
    summary.time_grid_note = fmt::format(
        "dates of mixed spacing: the {:g}-day time grid (the median spacing) misstates the time between two dates by "
        "up to {:g} days; the smallest spacing would need too many slots",
        grid.step_days, std::round(grid.largest_shift_days * 10) / 10);
  if (budget != request.memory_bytes) summary.memory_raised_to = budget;
  summary.outputs_written = outputs.written();
  summary.outputs_unchanged = outputs.unchanged();
  summary.outputs = outputs.paths();
  // A run that redoes some years leaves the others' outputs as they were: counted unchanged, so
  // that a run's counts add up to the files the step has (they had been in neither count).
  if (only) {
    std::error_code ec;
    for (const Layer& layer : stack.layers())
      if (!written_year(layer.time.date().year) &&
          fs::exists(fs::path(request.out_dir) / (name + "_" + layer.time.label() + ".tif"), ec))
        ++summary.outputs_unchanged;
    for (const detail::PeriodMean& period : periods)
      if (!written_year(period.start.date().year) &&
          fs::exists(fs::path(calendar_dir) / (name + "_" + period.start.label() + ".tif"), ec))
        ++summary.outputs_unchanged;
  }
  summary.outputs_removed = removed;
  summary.dates = int(layers);
  summary.dates_at_month_ends = dates_at_month_ends(stack.times());
  summary.monthly_marks_note = monthly_marks_note(stack.times(), "--date-marks start");
  summary.width = area.width;
  summary.height = area.height;
  summary.blocks = int(plan.blocks.size());
  summary.block_width = plan.block_width;
  summary.block_height = plan.block_height;
  summary.blocks_at_once = std::min(at_once, int(plan.blocks.size()));
  summary.calendar_outputs = int(periods.size());
  {
    // The days each composite stands for (seasons' rule), against each in-season period.
    std::vector<std::int64_t> days;
    for (const TimePoint& t : stack.times()) days.push_back(std::int64_t(std::floor(t.days())));
    const auto spans = composite_spans(days, std::max<std::int64_t>(1, std::llround(grid.step_days)), request.marks, 1);
    for (const detail::PeriodMean& period : periods) {
      if (!period.in_season) {
        if (summary.calendar_outside_season++ == 0) summary.first_outside_season = period.start.date();
        continue;
      }
      const std::int64_t begin = std::int64_t(std::floor(period.start.days()));
      const std::int64_t end = std::int64_t(std::floor(period.end.days()));
      const bool stood_for = std::any_of(spans.begin(), spans.end(),
                                         [&](const auto& span) { return span.first < end && begin < span.second; });
      if (!stood_for && summary.calendar_without_composite++ == 0)
        summary.first_without_composite = period.start.date();
    }
  }
  std::int64_t masked_by_qa = 0;
  std::map<int, YearCounts> years;
  std::vector<BlockChoice> chosen;
  // A run that redoes some years keeps what the earlier run chose for the others (its
  // fill-summary.json, made on the same grid as fill-years.tsv says).
  if (only) {
    CPLJSONDocument earlier;
    if (earlier.Load((fs::path(request.out_dir) / "fill-summary.json").string()))
      for (const CPLJSONObject& entry : earlier.GetRoot().GetArray("chosen")) {
        const int year = entry.GetInteger("year", 0);
        const CPLJSONArray window = entry.GetArray("window");
        if (year == 0 || written_year(year) || window.Size() != 4) continue;
        BlockChoice c{entry.GetInteger("block", 0), year,
                      Window{window[0].ToInteger(), window[1].ToInteger(), window[2].ToInteger(), window[3].ToInteger()},
                      {}};
        for (const CPLJSONObject& item : entry.GetChildren())
          if (const std::string key = item.GetName(); key != "block" && key != "year" && key != "window")
            c.values[key] = item.ToDouble();
        chosen.push_back(std::move(c));
      }
  }
  for (const Worker& w : workers) {
    chosen.insert(chosen.end(), w.chosen.begin(), w.chosen.end());
    summary.pixels_never_observed += w.counters.never_observed;
    summary.pixels_without_value += w.counters.never_filled;
    summary.kernel_seconds += w.counters.kernel_seconds;
    masked_by_qa += w.counters.masked_by_qa;
    for (const auto& [reason, n] : w.counters.not_fitted) summary.series_not_fitted[reason] += n;
    for (const auto& [year, c] : w.years) {
      YearCounts& t = years[year];
      t.pixel_dates += c.pixel_dates, t.observed += c.observed, t.rejected += c.rejected;
      t.filled += c.filled, t.unfilled += c.unfilled;
      for (const auto& [reason, n] : c.not_fitted) t.not_fitted[reason] += n;
    }
  }
  // Years this run left alone keep the counts of the run that made their outputs.
  for (auto& [year, c] : years)
    if (!written_year(year)) c = earlier_years[year];
  std::string table = "# grid " + grid_label + "\n";
  for (const auto& [year, c] : years) {
    summary.pixel_dates += c.pixel_dates;
    summary.observed += c.observed;
    summary.rejected += c.rejected;
    summary.filled += c.filled;
    summary.unfilled += c.unfilled;
    table += fmt::format("{} {} {} {} {} {}\n", year, c.pixel_dates, c.observed, c.rejected, c.filled, c.unfilled);
    for (const auto& [reason, n] : c.not_fitted) summary.series_not_fitted[reason] += n;
  }
  for (const auto& [year, c] : years)
    for (const auto& [reason, n] : c.not_fitted) table += fmt::format("{}{}\t{}\t{}\n", not_fitted_tag, year, n, reason);
  // Whether a pixel has a value on some date spans all years: not known after a partial run
  // (null in every run with a reach, so that a partial run writes what a whole one would).
  if (reach > 0) summary.pixels_without_value = -1;
  // Written or left as it was: counted either way, so that a run's file counts add up to
  // what `kalends status` lists.
  int texts_written = 0, texts_unchanged = 0;
  if (reach > 0) ++(detail::write_text_atomically(years_file, table) ? texts_written : texts_unchanged);
  summary.missing = summary.pixel_dates - summary.observed;
  summary.out_dir = request.out_dir;
  summary.seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();

  std::string json = "{\n";
  // The version that made it (its rasters also record the command line).
  json += fmt::format("  \"kalends_version\": \"{}\",\n", KALENDS_VERSION);
  json += fmt::format("  \"method\": \"{}\",\n  \"parameters\": {},\n", method->name(),
                      detail::json_parameters(method->parameters()));
  json += fmt::format("  \"input\": \"{}\",\n", detail::json_escape(request.input));
  json += fmt::format(
      "  \"dates\": {},\n  \"width\": {},\n  \"height\": {},\n  \"pixel_dates\": {},\n"
      "  \"observed\": {},\n  \"missing\": {},\n  \"masked_by_qa\": {},\n  \"rejected\": {},\n"
      "  \"filled\": {},\n  \"unfilled\": {},\n  \"pixels_never_observed\": {},\n"
      "  \"pixels_without_value\": {},\n"
      "  \"time_step_days\": {:g},\n  \"calendar_outputs\": {},\n  \"calendar_outside_season\": {},\n"
      "  \"blocks\": {},\n"
      "  \"block_size\": [{}, {}]",
      summary.dates, summary.width, summary.height, summary.pixel_dates, summary.observed,
      summary.missing, masked_by_qa, summary.rejected, summary.filled, summary.unfilled,
      summary.pixels_never_observed,
      summary.pixels_without_value < 0 ? std::string("null") : std::to_string(summary.pixels_without_value),
      grid.step_days, summary.calendar_outputs, summary.calendar_outside_season, summary.blocks,
      summary.block_width, summary.block_height);
  // Series (pixels; pixel-years with a reach) with observations that the method could not fit.
  json += ",\n  \"series_not_fitted\": " + detail::json_counts(summary.series_not_fitted, "  ");
  // What the method chose per block, in block order: window [x, y, width, height] of the core.
  if (!chosen.empty()) {
    std::sort(chosen.begin(), chosen.end(), [](const BlockChoice& a, const BlockChoice& b) {
      return std::tie(a.block, a.year) < std::tie(b.block, b.year);
    });
    json += ",\n  \"chosen\": [";
    for (std::size_t k = 0; k < chosen.size(); ++k) {
      const BlockChoice& c = chosen[k];
      json += fmt::format("{}\n    {{\"block\": {}, ", k ? "," : "", c.block);
      if (c.year) json += fmt::format("\"year\": {}, ", c.year);
      json += fmt::format("\"window\": [{}, {}, {}, {}]", c.core.x, c.core.y, c.core.width,
                          c.core.height);
      for (const auto& [name, value] : c.values)
        json += fmt::format(", \"{}\": {}", detail::json_escape(name), detail::json_number(value));
      json += "}";
    }
    json += "\n  ]";
  }
  json += "\n}\n";
  const std::string summary_file = (fs::path(request.out_dir) / "fill-summary.json").string();
  {
    // One summary per folder: a fill of another stack there had lost its summary silently.
    CPLJSONDocument earlier;
    if (fs::exists(summary_file) && earlier.Load(summary_file)) {
      const std::string input = earlier.GetRoot().GetString("input", "");
      if (!input.empty() && !same_input(input, request.input)) summary.replaced_summary_of = input;
    }
  }
  ++(detail::write_text_atomically(summary_file, json) ? texts_written : texts_unchanged);
  summary.outputs_written += texts_written;
  summary.outputs_unchanged += texts_unchanged;
  return summary;
}

}  // namespace kalends
