// The fill engine: stack -> blocks -> method -> writer. Blocks run in parallel; each worker owns
// its readers and buffers, outputs are shared behind one lock per file.
#include <sys/stat.h>
#include <tbb/enumerable_thread_specific.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <atomic>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <mutex>
#include <set>

#include "engine/block_runner.hpp"
#include "engine/calendar.hpp"
#include "engine/memory_budget.hpp"
#include "io/gdal_session.hpp"
#include "io/json_text.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
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
};

struct Worker {
  std::unique_ptr<StackReader> data, qa;
  std::vector<float> plane;
  std::vector<std::uint32_t> qa_plane;
  std::vector<float> values, weights;
  std::vector<int> observations, valued;
  BlockOutput out;
  std::vector<float> value_plane, sd_plane, flag_plane, tile;
  Counters counters;
};

std::string join_parameters(const MethodParameters& p) {
  std::string text;
  for (const auto& [key, value] : p) text += (text.empty() ? "" : " ") + key + "=" + value;
  return text;
}


}  // namespace

FillSummary run_fill(const FillRequest& request, const ProgressCallback& progress) {
  const auto started = std::chrono::steady_clock::now();
  detail::start_gdal();

  // Options first, then every input, before anything is created.
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  if (!request.qa_input.empty() && request.qa_keep.empty())
    throw UsageError("--keep", "a keep rule is required with --qa");
  if (request.qa_input.empty() && !request.qa_keep.empty())
    throw UsageError("--keep", "given without a QA stack (--qa)");
  if (request.name.find('/') != std::string::npos) throw UsageError("--name", "must not contain '/'");
  MethodOptions method_options = request.method;
  method_options.clamp_min = request.rules.valid_min;
  method_options.clamp_max = request.rules.valid_max;
  const std::unique_ptr<FillMethod> method = make_fill_method(method_options);
  std::optional<QaRule> keep;
  if (!request.qa_keep.empty()) keep = QaRule::parse(request.qa_keep);

  const Stack stack = Stack::open(request.input, request.rules);
  if (stack.layers().size() < 2)
    throw InputError(request.input, "holds a single date; filling in time needs several");
  std::optional<Stack> qa_stack;
  std::vector<std::size_t> qa_of_layer;
  if (keep) {
    ValueRules qa_rules;
    qa_rules.exclude = request.rules.exclude;
    qa_stack = Stack::open(request.qa_input, qa_rules);
    require_same_grid(stack.grid(), qa_stack->grid(), qa_stack->layers().front().path);
    for (const Layer& layer : stack.layers()) {
      const auto& qa_layers = qa_stack->layers();
      const auto it = std::find_if(qa_layers.begin(), qa_layers.end(),
                                   [&](const Layer& q) { return q.time == layer.time; });
      if (it == qa_layers.end())
        throw InputError(layer.path, "no QA layer for " + layer.time.label() + " in '" +
                                         request.qa_input + "'");
      qa_of_layer.push_back(std::size_t(it - qa_layers.begin()));
    }
  }
  const TimeGrid grid = TimeGrid::build(stack.times());
  const int n_slots = grid.size;
  const Grid& raster = stack.grid();
  const std::string name = request.name.empty() ? stack.name() : request.name;

  // Output names: one per input date, plus the regular calendar.
  std::error_code ec;
  fs::create_directories(request.out_dir, ec);
  if (ec) throw OutputError(request.out_dir, "cannot create the output folder: " + ec.message());
  std::vector<detail::PeriodMean> periods;
  std::string calendar_dir;
  if (request.every) {
    periods = detail::period_means(grid, *request.every);
    calendar_dir = (fs::path(request.out_dir) / ("calendar-" + request.every->label())).string();
    fs::create_directories(calendar_dir, ec);
    if (ec) throw OutputError(calendar_dir, "cannot create the output folder: " + ec.message());
  }
  const std::string parameters = join_parameters(method->parameters());
  const std::string unit = stack.layers().front().unit;
  std::vector<detail::OutputSpec> specs;
  std::set<std::string> taken;
  auto common_metadata = [&]() {
    std::map<std::string, std::string> m{
        {"KALENDS_VERSION", KALENDS_VERSION},
        {"KALENDS_METHOD", method->name()},
        {"KALENDS_PARAMETERS", parameters},
        {"KALENDS_INPUT", request.input},
        {"KALENDS_TIME_STEP_DAYS", fmt::format("{:g}", grid.step_days)},
        {"KALENDS_VALUES", request.smooth ? "fitted curve everywhere"
                                          : "observed values kept, gaps and outliers filled"}};
    if (keep) m["KALENDS_QA"] = request.qa_input + " keep: " + keep->text();
    if (!request.command_line.empty()) m["KALENDS_COMMAND"] = request.command_line;
    return m;
  };
  for (const Layer& layer : stack.layers()) {
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
  for (const detail::PeriodMean& period : periods) {
    detail::OutputSpec spec;
    spec.path = (fs::path(calendar_dir) / (name + "_" + period.start.label() + ".tif")).string();
    spec.metadata = common_metadata();
    spec.metadata["KALENDS_DATE"] = period.start.iso();
    spec.metadata["KALENDS_PERIOD"] = request.every->label();
    spec.metadata["KALENDS_PERIOD_DAYS_COVERED"] = std::to_string(period.days);
    spec.metadata["KALENDS_VALUES"] = "period mean of the fitted curve";
    spec.bands = detail::fill_bands(unit);
    specs.push_back(std::move(spec));
  }

  // Memory: a worker's buffers per read pixel, then blocks as large as the share allows.
  const int threads = request.threads > 0 ? request.threads : tbb::this_task_arena::max_concurrency();
  const std::int64_t layers = std::int64_t(stack.layers().size());
  const std::int64_t bytes_per_pixel =
      n_slots * (4 + 4 + 4 + 4 + 1) + 4 + (keep ? 4 : 0) + 3 * 4 + 4 +
      std::int64_t(method->scratch_bytes_per_pixel(grid));
  std::set<std::string> read_files;
  for (const Layer& l : stack.layers()) read_files.insert(l.path);
  if (qa_stack)
    for (const Layer& l : qa_stack->layers()) read_files.insert(l.path);
  const detail::MemoryShare share = detail::share_memory(
      request.memory_bytes, threads, bytes_per_pixel, int(read_files.size()), int(specs.size()));
  detail::set_gdal_cache(share.gdal_cache);
  const BlockPlan plan =
      BlockPlan::make(raster.width, raster.height, method->halo(), share.max_read_pixels, tile_size);

  detail::OutputSet outputs(std::move(specs), raster, request.compression, tile_size);

  tbb::enumerable_thread_specific<Worker> workers([&] {
    Worker w;
    w.data = stack.reader();
    if (qa_stack) w.qa = qa_stack->reader();
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
      if (keep) w.qa->read_integers(qa_of_layer[i], read, w.qa_plane.data());
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
    w.out.resize(std::size_t(core_pixels) * n_slots);
    BlockInput in{&grid, read, core, w.values, w.weights};
    const auto kernel_start = std::chrono::steady_clock::now();
    method->fill(in, w.out);
    w.counters.kernel_seconds +=
        std::chrono::duration<double>(std::chrono::steady_clock::now() - kernel_start).count();

    auto read_index = [&](std::int64_t cp) {
      const std::int64_t cy = cp / core.width, cx = cp % core.width;
      return (cy + core.y - read.y) * read.width + (cx + core.x - read.x);
    };
    w.value_plane.resize(core_pixels);
    w.sd_plane.resize(core_pixels);
    w.flag_plane.resize(core_pixels);
    w.observations.assign(core_pixels, 0);
    w.valued.assign(core_pixels, 0);
    // Stagger the order of files so workers seldom wait on the same file's lock.
    for (std::size_t k = 0; k < std::size_t(layers); ++k) {
      const std::size_t i = (k + std::size_t(block.index) * 7) % std::size_t(layers);
      const int slot = grid.slot_of_date[i];
      for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
        const std::int64_t rp = read_index(cp);
        const float y = w.values[rp * n_slots + slot];
        const bool observed = w.weights[rp * n_slots + slot] > 0;
        const std::size_t at = std::size_t(cp) * n_slots + slot;
        const float fit = w.out.fitted[at];
        float value;
        Flag flag;
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
        w.value_plane[cp] = value;
        w.sd_plane[cp] = w.out.sd[at];
        w.flag_plane[cp] = float(flag);
        w.observations[cp] += observed;
        w.valued[cp] += flag != Flag::unfilled;
        Counters& c = w.counters;
        c.observed += observed;
        c.rejected += flag == Flag::rejected;
        c.filled += flag == Flag::filled;
        c.unfilled += flag == Flag::unfilled;
      }
      outputs.write(i, core, w.value_plane.data(), w.sd_plane.data(), w.flag_plane.data(), w.tile);
    }
    w.counters.pixel_dates += core_pixels * layers;
    for (int count : w.observations) w.counters.never_observed += count == 0;
    for (int count : w.valued) w.counters.never_filled += count == 0;
    if (keep) {
      // Counted apart so the summary can say how much the QA rule removed.
      for (std::size_t i = 0; i < std::size_t(layers); ++i) {
        w.data->read_values(i, read, w.plane.data());
        w.qa->read_integers(qa_of_layer[i], read, w.qa_plane.data());
        for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
          const std::int64_t rp = read_index(cp);
          w.counters.masked_by_qa += !std::isnan(w.plane[rp]) && !keep->keep(w.qa_plane[rp]);
        }
      }
    }
    for (std::size_t k = 0; k < periods.size(); ++k) {
      const detail::PeriodMean& period = periods[k];
      for (std::int64_t cp = 0; cp < core_pixels; ++cp) {
        const std::int64_t rp = read_index(cp);
        double value = 0, sd = 0;
        for (std::size_t j = 0; j < period.slots.size(); ++j) {
          const std::size_t at = std::size_t(cp) * n_slots + period.slots[j];
          value += period.weights[j] * w.out.fitted[at];
          sd += period.weights[j] * w.out.sd[at];
        }
        bool observed_inside = false;
        for (int s : period.slots_inside)
          if (w.weights[rp * n_slots + s] > 0 && !w.out.rejected[std::size_t(cp) * n_slots + s])
            observed_inside = true;
        const bool ok = std::isfinite(value);
        w.value_plane[cp] = ok ? float(value) : NAN;
        w.sd_plane[cp] = ok ? float(sd) : NAN;
        w.flag_plane[cp] = float(!ok ? Flag::unfilled : observed_inside ? Flag::observed : Flag::filled);
      }
      outputs.write(std::size_t(layers) + k, core, w.value_plane.data(), w.sd_plane.data(),
                    w.flag_plane.data(), w.tile);
    }
    const int done = ++blocks_done;
    if (progress) {
      std::lock_guard lock(progress_mutex);
      progress(done, int(plan.blocks.size()));
    }
  };

  detail::run_blocks(plan, threads, workers, process);
  for (std::size_t i = 0; i < std::size_t(layers); ++i)
    if (in_range[i] == 0 && out_of_range[i] > 0)
      throw InputError(stack.layers()[i].path,
                       fmt::format("every value is outside the valid range {:g} to {:g} (wrong scale factor or range?)",
                                   request.rules.valid_min.value_or(-INFINITY), request.rules.valid_max.value_or(INFINITY)));
  outputs.set_keep_unchanged(request.keep_unchanged);
  outputs.commit();

  FillSummary summary;
  summary.outputs_written = outputs.written();
  summary.outputs_unchanged = outputs.unchanged();
  summary.dates = int(layers);
  summary.width = raster.width;
  summary.height = raster.height;
  summary.blocks = int(plan.blocks.size());
  summary.block_width = plan.block_width;
  summary.block_height = plan.block_height;
  summary.calendar_outputs = int(periods.size());
  std::int64_t masked_by_qa = 0;
  for (const Worker& w : workers) {
    summary.pixel_dates += w.counters.pixel_dates;
    summary.observed += w.counters.observed;
    summary.rejected += w.counters.rejected;
    summary.filled += w.counters.filled;
    summary.unfilled += w.counters.unfilled;
    summary.pixels_never_observed += w.counters.never_observed;
    summary.pixels_without_value += w.counters.never_filled;
    summary.kernel_seconds += w.counters.kernel_seconds;
    masked_by_qa += w.counters.masked_by_qa;
  }
  summary.missing = summary.pixel_dates - summary.observed;
  summary.out_dir = request.out_dir;
  summary.seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();

  std::string json = "{\n";
  json += fmt::format("  \"method\": \"{}\",\n  \"parameters\": \"{}\",\n", method->name(),
                      detail::json_escape(parameters));
  json += fmt::format("  \"input\": \"{}\",\n", detail::json_escape(request.input));
  json += fmt::format(
      "  \"dates\": {},\n  \"width\": {},\n  \"height\": {},\n  \"pixel_dates\": {},\n"
      "  \"observed\": {},\n  \"missing\": {},\n  \"masked_by_qa\": {},\n  \"rejected\": {},\n"
      "  \"filled\": {},\n  \"unfilled\": {},\n  \"pixels_never_observed\": {},\n"
      "  \"pixels_without_value\": {},\n"
      "  \"time_step_days\": {:g},\n  \"calendar_outputs\": {},\n  \"blocks\": {},\n"
      "  \"block_size\": [{}, {}]\n}}\n",
      summary.dates, summary.width, summary.height, summary.pixel_dates, summary.observed,
      summary.missing, masked_by_qa, summary.rejected, summary.filled, summary.unfilled,
      summary.pixels_never_observed, summary.pixels_without_value, grid.step_days, summary.calendar_outputs, summary.blocks,
      summary.block_width, summary.block_height);
  detail::write_text_atomically((fs::path(request.out_dir) / "fill-summary.json").string(), json);
  return summary;
}

}  // namespace kalends
