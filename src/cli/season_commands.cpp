// kalends index, kalends seasons, kalends compare
#include <fmt/format.h>

#include <cstdio>

#include "cli/commands.hpp"
#include "engine/memory_budget.hpp"
#include "kalends/compare.hpp"
#include "kalends/error.hpp"
#include "kalends/seasons.hpp"
#include "kalends/spectral_index.hpp"

namespace kalends::cli {


Action add_index_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("index", "Compute NDVI or EVI from red, near-infrared (and blue) stacks");
  struct Options {
    IndexRequest request;
    std::string kind = "ndvi", scale, offset, nodata, valid_range, date, compression = "deflate";
  };
  auto o = std::make_shared<Options>();
  IndexRequest& r = o->request;
  sub->add_option("--red", r.red, "Red band: quoted glob of single-date rasters, or one file")->required();
  sub->add_option("--nir", r.nir, "Near-infrared band, paired with red by date")->required();
  sub->add_option("--blue", r.blue, "Blue band (EVI)");
  CLI::Option* red_band = sub->add_option("--red-band", r.red_band,
                                          "Band of each red file (default 1; one file with a band per date, such "
                                          "as a NetCDF time axis, is read date by date)");
  CLI::Option* nir_band = sub->add_option("--nir-band", r.nir_band, "Band of each near-infrared file (as --red-band)");
  CLI::Option* blue_band = sub->add_option("--blue-band", r.blue_band, "Band of each blue file (as --red-band)");
  sub->add_option("--kind", o->kind, "ndvi or evi")->check(CLI::IsMember({"ndvi", "evi"}))->capture_default_str();
  sub->add_option("--qa", r.qa, "QA stack to pass through (copied to OUT/qa/, named by date)");
  sub->add_option("--qa-band", r.qa_band, "Band of the QA in each QA file")->capture_default_str();
  sub->add_option("--out", r.out_dir, "Output folder")->required();
  sub->add_option("--name", r.name, "Output name prefix (default: the kind)");
  sub->add_option("--scale", o->scale, "Override the files' scale factor");
  sub->add_option("--offset", o->offset, "Override the files' offset");
  sub->add_option("--nodata", o->nodata, "Override the files' nodata value");
  sub->add_option("--valid-range", o->valid_range, "MIN,MAX of each band in physical units; outside = missing");
  sub->add_option("--date", o->date, "Date of files whose names carry none (YYYY-MM-DD)");
  sub->add_option("--threads", r.threads, "Worker threads; 0 = all cores (the default)")->check(CLI::Range(0, 4096));
  sub->add_option("--compress", o->compression, "deflate, zstd, lzw or none")->capture_default_str();
  return [o, &global, red_band, nir_band, blue_band] {
    IndexRequest& r = o->request;
    r.red_band_given = red_band->count() > 0;
    r.nir_band_given = nir_band->count() > 0;
    r.blue_band_given = blue_band->count() > 0;
    r.kind = o->kind == "evi" ? SpectralIndex::evi : SpectralIndex::ndvi;
    r.rules.scale = optional_number(o->scale, "--scale");
    r.rules.offset = optional_number(o->offset, "--offset");
    r.rules.nodata = optional_number(o->nodata, "--nodata");
    // A job's index step took valid_range; the command had no such option.
    if (!o->valid_range.empty()) {
      const auto [low, high] = parse_range(o->valid_range, "--valid-range");
      r.rules.valid_min = low;
      r.rules.valid_max = high;
    }
    if (!o->date.empty()) {
      r.rules.date = parse_date_option(o->date, "--date");
    }
    r.compression = parse_compression(o->compression);
    r.command_line = global.command_line;
    const IndexSummary s = run_index(r);
    for (const std::string& note : s.notes) std::fprintf(stderr, "note: %s\n", note.c_str());
    if (!global.quiet)
      fmt::print("kalends index: {} date{} -> {} ({:.1f} % of values missing: nodata, zero denominator or out of range)\n",
                 s.dates, s.dates == 1 ? "" : "s", s.out_dir, s.pixels ? 100.0 * double(s.missing) / double(s.pixels) : 0.0);
  };
}

Action add_seasons_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("seasons", "Synoptic and year-specific layers, anomalies, cycle descriptors");
  struct Options {
    SeasonsRequest request;
    std::string period = "1M", years, marks = "auto", memory = "1G", compression = "deflate";
  };
  auto o = std::make_shared<Options>();
  SeasonsRequest& r = o->request;
  sub->add_option("input", r.input, "Folder of `kalends fill` outputs, a quoted glob, or a multi-band raster")->required();
  sub->add_option("--out", r.out_dir, "Output folder")->required();
  sub->add_option("--period", o->period, "Calendar: 1M (months) or N days from 1 January, such as 16d or 8d")->capture_default_str();
  sub->add_option("--years", o->years, "Years to use, e.g. 2004-2009 or 2006");
  sub->add_option("--date-marks", o->marks,
                  std::string("What an input date marks in its composite: start, middle or end; ") + date_marks_auto_help)
      ->check(CLI::IsMember({"auto", "start", "middle", "end"}))
      ->capture_default_str();
  sub->add_option("--prominence", r.cycle.prominence_share, "A peak is a season above this share of the amplitude")
      ->capture_default_str();
  sub->add_option("--threshold", r.cycle.threshold_share, "Season start/end at this share between base and peak")
      ->capture_default_str();
  sub->add_option("--min-amplitude", r.cycle.min_amplitude,
                  "No season in a cycle whose range (max - min) is not above this, in the input's unit (noise)")
      ->capture_default_str();
  sub->add_option("--name", r.name, "Output name prefix (default: from the input)");
  sub->add_option("--band", r.rules.band, "Band of each input file (1 = value of fill outputs)")->capture_default_str();
  CLI::Option* memory = sub->add_option("--memory", o->memory, "Working-set budget, e.g. 512M or 4G; when not given, "
                                        "1G, or more where one block needs more, up to half the machine's memory")
                            ->capture_default_str();
  sub->add_option("--threads", r.threads, "Worker threads; 0 = all cores (the default)")->check(CLI::Range(0, 4096));
  sub->add_option("--compress", o->compression, "deflate, zstd, lzw or none")->capture_default_str();
  return [o, &global, memory] {
    SeasonsRequest& r = o->request;
    r.period = CalendarPeriod::parse(o->period, "--period");
    if (!o->years.empty()) std::tie(r.first_year, r.last_year) = parse_years(o->years);
    r.marks = parse_date_marks(o->marks);
    r.memory_bytes = parse_memory(o->memory);
    if (memory->count() == 0) r.memory_ceiling = detail::usable_memory_bytes() / 2;
    r.compression = parse_compression(o->compression);
    r.command_line = global.command_line;
    const SeasonsSummary s = run_seasons(r);
    if (!global.quiet)
      fmt::print("kalends seasons: {} year{} ({}-{}) x {} periods of {} x {} px in {:.1f} s -> {} ({} files)\n",
                 s.years, s.years == 1 ? "" : "s", s.first_year, s.last_year, s.periods, s.width, s.height, s.seconds,
                 r.out_dir, s.files);
    if (s.memory_raised_to > 0) print_memory_note(r.memory_bytes, s.memory_raised_to);
    for (const std::string& note : seasons_notes(r, s)) std::fprintf(stderr, "note: %s\n", note.c_str());
    note_monthly_marks(s.monthly_marks_note, r.marks);
  };
}

Action add_compare_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("compare", "Where synoptic layers mislead: summaries of `kalends seasons` outputs");
  auto r = std::make_shared<CompareRequest>();
  sub->add_option("seasons", r->seasons_dir, "Folder of `kalends seasons` outputs")->required();
  sub->add_option("--out", r->out_dir, "Output folder")->required();
  sub->add_option("--zones", r->zones, "Integer zone raster on the same grid");
  sub->add_option("--name", r->name, "Layer set, where the folder holds several");
  sub->add_option("--top", r->top, "How many of the largest anomalies to list")->capture_default_str();
  return [r, &global] {
    r->command_line = global.command_line;
    const CompareSummary s = run_compare(*r);
    for (const std::string& note : compare_notes(s))
      std::fprintf(stderr, "note: %s: %s\n", r->seasons_dir.c_str(), note.c_str());
    // With two years every standardised anomaly is +-0.71 ((n - 1) / sqrt(n)): "no year beyond
    // 1 sd" had read as "no unusual year".
    std::string years_line;
    if (s.years == 2)
      years_line = "with 2 years no standardised anomaly can pass 1 sd; read the mean anomaly per year (compare.md)";
    else if (s.year_most_below.empty() && s.year_most_above.empty())
      years_line = "no year has a pixel-period beyond 1 sd";
    else if (s.year_most_below == s.year_most_above)
      years_line = fmt::format("most pixel-periods below -1 sd and above +1 sd both in {}: a year that swings both ways "
                               "(a season earlier or later than usual, say), not one higher or lower throughout",
                               s.year_most_below);
    else
      years_line = fmt::format("most pixel-periods below -1 sd in {}, above +1 sd in {}",
                               s.year_most_below.empty() ? "no year" : s.year_most_below,
                               s.year_most_above.empty() ? "no year" : s.year_most_above);
    if (!global.quiet)
      fmt::print("kalends compare: median synoptic RMSE {:.4g}, median explained share {:.3f}; {}\n  {}\n  {}\n  {}\n",
                 s.median_rmse, s.median_explained, years_line, s.markdown_path, s.json_path, s.class_path);
  };
}

}  // namespace kalends::cli
