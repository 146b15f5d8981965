// kalends fill PATTERN --out DIR [options]
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <fmt/format.h>
#include <optional>

#include "cli/commands.hpp"
#include "engine/memory_budget.hpp"
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/tiles.hpp"

namespace kalends::cli {

std::int64_t parse_memory(const std::string& text) { return parse_memory_size(text); }

std::optional<double> optional_number(const std::string& text, const std::string& option) {
  if (text.empty()) return std::nullopt;
  try {
    std::size_t used = 0;
    const double v = std::stod(text, &used);
    if (used == text.size()) return v;
  } catch (const std::exception&) {
  }
  throw UsageError(option + " '" + text + "'", "expected a number");
}

double parse_number(const std::string& text, const std::string& option) {
  if (text.empty()) throw UsageError(option, "expected a number");
  return *optional_number(text, option);
}

std::optional<double> number_or_auto(const std::string& text, const std::string& option) {
  if (text == "auto") return std::nullopt;
  return parse_number(text, option);
}

namespace {

// How an auto-or-number option shows its default in --help.
std::string auto_or_number_text(const std::optional<double>& v) {
  return v ? fmt::format("{:g}", *v) : std::string("auto");
}

std::pair<double, double> parse_range(const std::string& text, const std::string& option) {
  const auto comma = text.find(',');
  try {
    if (comma != std::string::npos) {
      std::size_t a = 0, b = 0;
      const double low = std::stod(text.substr(0, comma), &a);
      const double high = std::stod(text.substr(comma + 1), &b);
      if (a == comma && b == text.size() - comma - 1) return {low, high};
    }
  } catch (const std::exception&) {
  }
  throw UsageError(option + " '" + text + "'", "expected MIN,MAX");
}


std::string percent(std::int64_t part, std::int64_t whole) {
  return whole > 0 ? fmt::format("{:.1f} %", 100.0 * double(part) / double(whole)) : "n/a";
}

}  // namespace

Action add_fill_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("fill", "Fill gaps in time and write value, sd and flag layers");
  struct Options {
    FillRequest request;
    std::string tiles;
    bool mosaic = false;
    std::string lambda = auto_or_number_text(MethodOptions{}.lambda),
                space_smoothing = auto_or_number_text(MethodOptions{}.spacetime_space_smoothing),
                time_smoothing = auto_or_number_text(MethodOptions{}.spacetime_time_smoothing),
                lambda_range, envelope = "none", memory = "1G", every, compression = "deflate",
                scale, offset, nodata, valid_range;
  };
  auto o = std::make_shared<Options>();
  FillRequest& r = o->request;
  sub->add_option("input", r.input,
                  "Quoted glob of single-date rasters ('ndvi/*.tif'), or one multi-band raster")
      ->required();
  sub->add_option("--out", r.out_dir, "Output folder")->required();
  sub->add_option("--method", r.method.method, "whittaker, harmonic or spacetime")->capture_default_str();
  sub->add_option("--lambda", o->lambda, "Whittaker smoothing: a number, or auto (GCV per pixel)")
      ->capture_default_str();
  sub->add_option("--lambda-range", o->lambda_range, "MIN,MAX searched by --lambda auto (default 0.01,1e6)");
  sub->add_option("--order", r.method.order, "Whittaker difference order 1..3")->capture_default_str();
  sub->add_option("--envelope", o->envelope, "upper: reweight toward the upper envelope")
      ->check(CLI::IsMember({"none", "upper"}))
      ->capture_default_str();
  sub->add_flag("--robust", r.method.robust, "Down-weight outliers on both sides");
  sub->add_option("--iterations", r.method.iterations, "Reweighting rounds for --envelope/--robust")
      ->capture_default_str();
  sub->add_option("--harmonics", r.method.harmonics, "Harmonic method: number of harmonics")
      ->capture_default_str();
  sub->add_flag("--trend", r.method.trend, "Harmonic method: add a linear trend");
  sub->add_option("--reject-below", r.method.reject_below,
                  "Harmonic method: reject values this many residual sd below the curve")
      ->capture_default_str();
  sub->add_option("--space-smoothing", o->space_smoothing,
                  "Spacetime method: smoothing of the anomaly across pixels: a number, or auto (GCV per block)")
      ->capture_default_str();
  sub->add_option("--time-smoothing", o->time_smoothing,
                  "Spacetime method: smoothing of the anomaly along time: a number, or auto (GCV per block)")
      ->capture_default_str();
  sub->add_option("--climate-smoothing", r.method.spacetime_climate_smoothing,
                  "Spacetime method: smoothing of the seasonal climatology across pixels")
      ->capture_default_str();
  sub->add_option("--season-smoothing", r.method.spacetime_season_smoothing,
                  "Spacetime method: smoothing of the climatology across the year")
      ->capture_default_str();
  sub->add_option("--halo", r.method.spacetime_halo,
                  "Spacetime method: pixels of context around each block; farther pixels are not used")
      ->capture_default_str();
  sub->add_option("--neighbour-radius", r.method.spacetime_neighbour_radius,
                  "Spacetime method: pixels searched for neighbours whose steady difference predicts "
                  "a gap; 0 = the smooth model alone")
      ->capture_default_str();
  sub->add_option("--tolerance", r.method.spacetime_tolerance,
                  "Spacetime method: relative residual at which the solver stops")
      ->capture_default_str();
  sub->add_option("--fft-wisdom", r.method.spacetime_fft_wisdom,
                  "Spacetime method: auto = time the transforms once per block shape and keep the "
                  "result in the user cache, FILE = keep it there, none = plan without timing")
      ->capture_default_str();
  sub->add_option("--max-gap", r.method.max_gap_days,
                  "Leave gaps between observations longer than this many days unfilled; 0 = no limit")
      ->capture_default_str();
  sub->add_option("--max-extrapolation", r.method.max_extrapolation_days,
                  "Fill at most this many days before the first or after the last observation; -1 = no limit")
      ->capture_default_str();
  sub->add_option("--reach", r.method.reach_days,
                  "Fill each calendar year from the dates within this many days of it (a new date then "
                  "changes only the years it reaches); 0 = the whole series at once")
      ->capture_default_str();
  sub->add_flag("--smooth", r.smooth, "Write the fitted curve everywhere, not only in gaps");
  sub->add_option("--every", o->every, "Also write a regular calendar: 8d, 16d or 1M");
  sub->add_option("--name", r.name, "Output name prefix (default: from the input)");
  sub->add_option("--qa", r.qa_input, "Quoted glob or raster of QA layers, paired by date");
  sub->add_option("--keep", r.qa_keep, "QA keep rule, e.g. 'bits0-1 in 0,1'");
  sub->add_option("--scale", o->scale, "Override the files' scale factor");
  sub->add_option("--offset", o->offset, "Override the files' offset");
  sub->add_option("--nodata", o->nodata, "Override the files' nodata value");
  sub->add_option("--valid-range", o->valid_range, "MIN,MAX in physical units; outside = missing");
  sub->add_option("--band", r.rules.band, "Band to read from each single-date file")->capture_default_str();
  sub->add_option("--tiles", o->tiles,
                  "The input is a tile set: where the tile's name sits in each path, e.g. 'tiles/{tile}/'; "
                  "outputs go to OUT/<tile>/");
  sub->add_flag("--mosaic", o->mosaic, "With --tiles: also write OUT/mosaic/, one VRT per date over all tiles");
  sub->add_option("--memory", o->memory, "Working-set budget, e.g. 512M or 4G")->capture_default_str();
  sub->add_option("--threads", r.threads, "Worker threads (default: all cores)");
  sub->add_option("--compress", o->compression, "deflate, zstd, lzw or none")->capture_default_str();

  return [o, &global] {
    FillRequest& r = o->request;
    r.method.lambda = number_or_auto(o->lambda, "--lambda");
    r.method.spacetime_space_smoothing = number_or_auto(o->space_smoothing, "--space-smoothing");
    r.method.spacetime_time_smoothing = number_or_auto(o->time_smoothing, "--time-smoothing");
    if (!o->lambda_range.empty())
      std::tie(r.method.lambda_min, r.method.lambda_max) = parse_range(o->lambda_range, "--lambda-range");
    r.method.envelope_upper = o->envelope == "upper";
    if (!o->every.empty()) r.every = CalendarPeriod::parse(o->every);
    if (!o->scale.empty()) r.rules.scale = parse_number(o->scale, "--scale");
    if (!o->offset.empty()) r.rules.offset = parse_number(o->offset, "--offset");
    if (!o->nodata.empty()) r.rules.nodata = parse_number(o->nodata, "--nodata");
    if (!o->valid_range.empty()) {
      const auto [low, high] = parse_range(o->valid_range, "--valid-range");
      r.rules.valid_min = low;
      r.rules.valid_max = high;
    }
    r.memory_bytes = parse_memory(o->memory);
    r.compression = parse_compression(o->compression);
    r.command_line = global.command_line;
    const bool terminal = isatty(STDERR_FILENO) && !global.quiet;
    ProgressCallback progress;
    if (terminal)
      progress = [](int done, int total) {
        std::fprintf(stderr, "\rfill: %d/%d blocks", done, total);
        if (done == total) std::fprintf(stderr, "\n");
      };
    if (o->mosaic && o->tiles.empty()) throw UsageError("--mosaic", "needs --tiles");
    if (!o->tiles.empty()) {
      const TiledFillSummary tiled = run_tiled_fill(r, o->tiles, o->mosaic, progress);
      if (!global.quiet) {
        for (const FillSummary& s : tiled.tiles)
          fmt::print("kalends fill: {} dates of {} x {} px in {:.1f} s -> {}\n", s.dates, s.width, s.height,
                     s.seconds, s.out_dir);
        if (!tiled.mosaic_dir.empty()) fmt::print("  mosaic of every date in {}\n", tiled.mosaic_dir);
      }
      return;
    }
    const FillSummary s = run_fill(r, progress);
    if (!global.quiet) {
      const std::int64_t pd = s.pixel_dates;
      fmt::print("kalends fill: {} dates of {} x {} px in {:.1f} s -> {}\n", s.dates, s.width,
                 s.height, s.seconds, s.out_dir);
      fmt::print("  missing {} of pixel-dates; filled {}, could not fill {}, rejected as outliers {}\n",
                 percent(s.missing, pd), percent(s.filled, pd), percent(s.unfilled, pd),
                 percent(s.rejected, pd));
      if (s.pixels_never_observed > 0 &&
          (s.pixels_without_value < 0 || s.pixels_never_observed == s.pixels_without_value))
        fmt::print("  {} pixels have no observation on any date (flag 3 throughout)\n",
                   s.pixels_never_observed);
      else if (s.pixels_never_observed > 0)
        fmt::print("  {} pixels have no observation on any date; {} pixels could not be filled on "
                   "any date, not even from neighbours (flag 3 throughout)\n",
                   s.pixels_never_observed, s.pixels_without_value);
      if (s.calendar_outputs > 0)
        fmt::print("  {} regular-calendar layers in {}/calendar-{}\n", s.calendar_outputs, s.out_dir,
                   r.every->label());
    }
    if (global.verbose) {
      std::fprintf(stderr, "blocks: %d of %lld x %lld px\n", s.blocks, (long long)s.block_width,
                   (long long)s.block_height);
      if (s.kernel_seconds > 0)
        std::fprintf(stderr, "kernel: %.0f pixel-dates/s\n", double(s.pixel_dates) / s.kernel_seconds);
      std::fprintf(stderr, "peak memory: %.0f MiB\n", detail::peak_resident_bytes() / 1048576.0);
    }
  };
}

}  // namespace kalends::cli
