// kalends fill PATTERN --out DIR [options]
#include <unistd.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <fmt/format.h>
#include <optional>
#include <regex>

#include "cli/commands.hpp"
#include "kalends/percent.hpp"
#include "engine/memory_budget.hpp"
#include "pipeline/step_kind.hpp"
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/tiles.hpp"

namespace kalends::cli {

std::int64_t parse_memory(const std::string& text) { return parse_memory_size(text); }

TimePoint parse_date_option(const std::string& text, const std::string& option) {
  if (const std::optional<TimePoint> t = parse_iso_time(text)) return *t;
  // "expected YYYY-MM-DD" of a text in that form had left the user looking for the slip.
  static const std::regex shape(R"(\d{4}-\d{2}-\d{2})");
  if (std::regex_match(text, shape))
    throw UsageError(option + " '" + text + "'", "is not a calendar date (no such day)");
  throw UsageError(option + " '" + text + "'", "expected YYYY-MM-DD");
}

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

std::vector<std::string> split_list(const std::string& text, const std::string& option) {
  // The job reader's splitter, which keeps an empty item between commas but drops a last one.
  std::vector<std::string> items = detail::split_list(text);
  if (std::any_of(items.begin(), items.end(), [](const std::string& item) { return item.empty(); }) ||
      (!text.empty() && text.back() == ','))
    throw UsageError(option + " '" + text + "'", "an empty item between commas");
  return items;
}

std::vector<int> parse_whole_numbers(const std::string& text, const std::string& option) {
  std::vector<int> numbers;
  for (const std::string& item : split_list(text, option)) {
    const double v = parse_number(item, option);
    if (v != std::floor(v) || std::abs(v) > 1e9) throw UsageError(option + " '" + item + "'", "expected a whole number");
    numbers.push_back(static_cast<int>(v));
  }
  return numbers;
}

std::optional<Window> parse_subset(const std::string& text) {
  if (text.empty()) return std::nullopt;
  const std::vector<int> v = parse_whole_numbers(text, "--subset");
  if (v.size() != 4) throw UsageError("--subset '" + text + "'", "expected COLUMN,ROW,WIDTH,HEIGHT in pixels");
  return Window{v[0], v[1], v[2], v[3]};
}

void print_memory_note(std::int64_t default_bytes, std::int64_t used_bytes) {
  std::fprintf(stderr,
               "note: one block of this stack needs %lld MiB, more than the default --memory of %lld MiB; "
               "used %lld MiB (at most half this machine's memory is taken unasked; --memory sets it)\n",
               (long long)(used_bytes >> 20), (long long)(default_bytes >> 20), (long long)(used_bytes >> 20));
}

std::string percent(std::int64_t part, std::int64_t whole) {
  if (whole <= 0) return "n/a";
  return percent_text(double(part) / double(whole));
}

Action add_fill_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("fill", "Fill gaps in time and write value, sd and flag layers");
  struct Options {
    FillRequest request;
    std::string tiles;
    bool mosaic = false;
    MethodOptionTexts method_texts;
    ValueRuleTexts rule_texts;
    std::string memory = "1G", every, compression = "deflate", marks = "auto", subset;
  };
  auto o = std::make_shared<Options>();
  FillRequest& r = o->request;
  sub->add_option("input", r.input,
                  "Quoted glob of single-date rasters ('ndvi/*.tif'), one variable of many files "
                  "('NETCDF:\"nc/*.nc\":ndvi'), or one multi-band raster")
      ->required();
  sub->add_option("--out", r.out_dir, "Output folder")->required();
  sub->add_option("--method", r.method.method, "whittaker, harmonic or spacetime")->capture_default_str();
  add_method_options(sub, r.method, o->method_texts);
  sub->add_flag("--smooth", r.smooth, "Write the fitted curve everywhere, not only in gaps");
  sub->add_option("--every", o->every, "Also write a regular calendar: 1M (months) or N days from 1 January, such as 16d or 8d");
  sub->add_option("--date-marks", o->marks,
                  std::string("For --every: what an input date marks in its composite: start (MODIS), middle or end; ") +
                      date_marks_auto_help)
      ->check(CLI::IsMember({"auto", "start", "middle", "end"}))
      ->capture_default_str();
  sub->add_option("--name", r.name, "Output name prefix (default: from the input)");
  sub->add_option("--qa", r.qa_input, "Quoted glob or raster of QA layers, paired by date");
  sub->add_option("--keep", r.qa_keep, "QA keep rule, e.g. 'bits0-1 in 0,1'");
  sub->add_option("--qa-band", r.qa_band, "Band of each QA file (e.g. 2 where each date's file holds the value and its QA)")
      ->capture_default_str();
  add_value_rule_options(sub, r.rules, o->rule_texts);
  sub->add_option("--tiles", o->tiles,
                  "The input is a tile set: where the tile's name sits in each path, e.g. 'tiles/{tile}/'; "
                  "outputs go to OUT/<tile>/");
  sub->add_flag("--mosaic", o->mosaic, "With --tiles: also write OUT/mosaic/, one VRT per date over all tiles");
  sub->add_option("--subset", o->subset, "Fill these pixels only: COLUMN,ROW,WIDTH,HEIGHT (as "
                  "gdal_translate -srcwin); a method with a halo still reads the pixels around them");
  CLI::Option* memory = sub->add_option("--memory", o->memory, "Working-set budget, e.g. 512M or 4G; when not given, 1G, "
                                        "or more where one block needs more, up to half the machine's memory")
                            ->capture_default_str();
  sub->add_option("--threads", r.threads, "Worker threads; 0 = all cores (the default)")->check(CLI::Range(0, 4096));
  sub->add_option("--compress", o->compression, "deflate, zstd, lzw or none")->capture_default_str();

  return [o, memory, sub, &global] {
    FillRequest& r = o->request;
    // "filled/" as typed: messages join names to it ("filled//calendar-1M").
    while (r.out_dir.size() > 1 && r.out_dir.back() == '/') r.out_dir.pop_back();
    apply_method_options(r.method, o->method_texts);
    check_options_apply({r.method.method}, options_given(*sub));
    apply_value_rule_options(r.rules, o->rule_texts);
    if (!o->every.empty()) r.every = CalendarPeriod::parse(o->every);
    r.marks = parse_date_marks(o->marks);
    r.memory_bytes = parse_memory(o->memory);
    if (memory->count() == 0) r.memory_ceiling = detail::usable_memory_bytes() / 2;
    r.compression = parse_compression(o->compression);
    r.command_line = global.command_line;
    const bool terminal = isatty(STDERR_FILENO) && !global.quiet;
    ProgressCallback progress;
    if (terminal)
      progress = [](int done, int total) {
        std::fprintf(stderr, "\rfill: %d/%d blocks", done, total);
        if (done == total) std::fprintf(stderr, "\n");
      };
    r.region = parse_subset(o->subset);
    if (r.region && !o->tiles.empty()) throw UsageError("--subset", "does not apply to a tile set (--tiles)");
    if (o->mosaic && o->tiles.empty()) throw UsageError("--mosaic", "needs --tiles");
    if (!o->tiles.empty()) {
      const TiledFillSummary tiled = run_tiled_fill(r, o->tiles, o->mosaic, progress);
      if (!global.quiet) {
        for (const FillSummary& s : tiled.tiles)
          fmt::print("kalends fill: {} dates of {} x {} px in {:.1f} s -> {}\n", s.dates, s.width, s.height,
                     s.seconds, s.out_dir);
        if (!tiled.mosaic_dir.empty()) fmt::print("  mosaic of every date in {}\n", tiled.mosaic_dir);
      }
      for (const std::string& note : tiled_fill_notes(r, tiled)) std::fprintf(stderr, "note: %s\n", note.c_str());
      return;
    }
    const FillSummary s = run_fill(r, progress);
    if (s.memory_raised_to > 0) print_memory_note(r.memory_bytes, s.memory_raised_to);
    // A note, not an error: the scaling may be applied already or belong to another convention.
    if (!s.unapplied_scaling.empty())
      std::fprintf(stderr,
                   "note: %s states %s, which GDAL leaves unapplied: the values were filled as stored; "
                   "give --scale/--offset if they are not in physical units (see kalends inspect)\n",
                   r.input.c_str(), s.unapplied_scaling.c_str());
    if (!s.time_grid_note.empty()) std::fprintf(stderr, "note: %s: %s\n", r.input.c_str(), s.time_grid_note.c_str());
    if (const std::string note = calendar_gap_note(s); !note.empty()) std::fprintf(stderr, "note: %s\n", note.c_str());
    // Only the calendar layers read the marks; the dated outputs keep the input's dates.
    if (r.every) note_monthly_marks(s.monthly_marks_note, r.marks);
    if (s.outputs_of_another_input > 0)
      std::fprintf(stderr,
                   "note: %d earlier output%s in %s made from another input (%s) had this fill's names and %s "
                   "replaced (give each stack its own --out to keep both)\n",
                   s.outputs_of_another_input, s.outputs_of_another_input == 1 ? "" : "s", r.out_dir.c_str(),
                   s.another_input.c_str(), s.outputs_of_another_input == 1 ? "was" : "were");
    if (!s.replaced_summary_of.empty())
      std::fprintf(stderr,
                   "note: %s/fill-summary.json of another input (%s) was replaced by this fill's; that input's "
                   "outputs stay (give each stack its own --out to keep both summaries)\n",
                   r.out_dir.c_str(), s.replaced_summary_of.c_str());
    if (!s.mixed_value_rules.empty())
      std::fprintf(stderr, "note: %s: the inputs' value rules differ: %s (give --scale, --offset or --nodata for all "
                           "if one file's metadata is wrong; a unit label is not converted; see kalends inspect "
                           "--dates)\n",
                   r.input.c_str(), s.mixed_value_rules.c_str());
    if (!s.date_conflict.empty()) std::fprintf(stderr, "note: %s: %s\n", r.input.c_str(), s.date_conflict.c_str());
    if (!s.mixed_names.empty()) std::fprintf(stderr, "note: %s: %s\n", r.input.c_str(), s.mixed_names.c_str());
    if (!global.quiet) {
      const std::int64_t pd = s.pixel_dates;
      fmt::print("kalends fill: {} dates of {} x {} px in {:.1f} s -> {}{}\n", s.dates, s.width,
                 s.height, s.seconds, s.out_dir,
                 s.outputs_removed ? fmt::format(" ({} earlier output{} no longer made removed)",
                                                 s.outputs_removed, s.outputs_removed == 1 ? "" : "s")
                                   : "");
      fmt::print("  missing {} of pixel-dates; filled {}, could not fill {}, rejected as outliers {}\n",
                 percent(s.missing, pd), percent(s.filled, pd), percent(s.unfilled, pd),
                 percent(s.rejected, pd));
      // A method that looks at neighbours (a halo) fills pixels never observed unless told to
      // leave them; with a reach the run does not count those it could not fill
      // (pixels_without_value < 0).
      const bool spatial = make_fill_method(r.method)->halo() > 0;
      const std::int64_t never = s.pixels_never_observed;
      const char* hint = "--never-observed leave keeps such pixels empty (sea, lakes, outside a boundary)";
      if (never > 0 && spatial && !r.method.fill_never_observed)
        fmt::print("  {} pixels have no observation on any date: left empty (--never-observed leave; "
                   "flag 3 throughout)\n", never);
      else if (never > 0 && s.pixels_without_value < 0 && spatial)
        fmt::print("  {} pixels have no observation on any date (filled from their neighbours where "
                   "the halo holds observations; flag 3 elsewhere); {}\n", never, hint);
      else if (never > 0 && (s.pixels_without_value < 0 || never == s.pixels_without_value))
        fmt::print("  {} pixels have no observation on any date (flag 3 throughout)\n", never);
      else if (never > 0 && s.pixels_without_value == 0)
        fmt::print("  {} pixels have no observation on any date, filled from their neighbours; {}\n",
                   never, hint);
      else if (never > 0)
        fmt::print("  {} pixels have no observation on any date, filled from their neighbours except "
                   "{} with none within the halo (flag 3 throughout); {}\n",
                   never, s.pixels_without_value, hint);
      for (const auto& [reason, n] : s.series_not_fitted)
        fmt::print("  {} {} not fitted: {}\n", n, r.method.reach_days > 0 ? "pixel-years" : "pixels",
                   reason);
      if (s.calendar_outputs > 0)
        fmt::print("  {} regular-calendar layers in {}/calendar-{}\n", s.calendar_outputs, s.out_dir,
                   r.every->label());
      if (s.calendar_outside_season > 0)
        fmt::print("  {} of them (from {}-{:02d}) lie where no composite of any year stands, outside the stack's "
                   "season: left empty (flag 3)\n",
                   s.calendar_outside_season, s.first_outside_season.year, s.first_outside_season.month);
    }
    if (global.verbose) {
      std::fprintf(stderr, "blocks: %d of %lld x %lld px, %d at a time\n", s.blocks,
                   (long long)s.block_width, (long long)s.block_height, s.blocks_at_once);
      if (s.kernel_seconds > 0)
        std::fprintf(stderr, "kernel: %.0f pixel-dates/s\n", double(s.pixel_dates) / s.kernel_seconds);
      std::fprintf(stderr, "peak memory: %.0f MiB\n", detail::peak_resident_bytes() / 1048576.0);
    }
  };
}

}  // namespace kalends::cli
