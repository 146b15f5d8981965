// kalends diurnal, kalends suitability
#include <fmt/format.h>

#include <cmath>
#include <cstdio>

#include "cli/commands.hpp"
#include "io/text_file.hpp"
#include "kalends/error.hpp"
#include "kalends/season.hpp"
#include "kalends/suitability.hpp"

namespace kalends::cli {

namespace {

std::pair<std::string, std::string> split_pair(const std::string& text, const std::string& option,
                                               const std::string& expected) {
  const auto comma = text.find(',');
  if (comma == std::string::npos || comma == 0 || comma + 1 == text.size() || !decimal_comma_hint(text).empty())
    throw UsageError(option + " '" + text + "'", "expected " + expected + decimal_comma_hint(text));
  return {text.substr(0, comma), text.substr(comma + 1)};
}

// The options every temperature command shares: where the temperatures come from and how to
// read them.
struct InputOptions {
  TemperatureInputs inputs;
  std::string units = "auto", scale, offset, nodata, marks = "auto";

  void add(CLI::App* sub, bool with_temperature) {
    sub->add_option("--tmin", inputs.tmin,
                    "Daily minimum temperature: quoted glob, folder or multi-band raster");
    sub->add_option("--tmax", inputs.tmax, "Daily maximum temperature, paired with --tmin by date");
    sub->add_option("--day", inputs.day,
                    "Daytime overpass temperature (e.g. land-surface temperature)");
    sub->add_option("--night", inputs.night,
                    "Night-time overpass temperature, paired with --day by date");
    if (with_temperature)
      sub->add_option(
          "--temperature", inputs.temperature,
          "Temperatures used as given, no diurnal cycle (monthly means, hourly records)");
    sub->add_option("--day-time", inputs.day_hour, "Local solar time of the day overpass, hours")
        ->capture_default_str();
    sub->add_option("--night-time", inputs.night_hour,
                    "Local solar time of the night overpass, hours")
        ->capture_default_str();
    sub->add_option("--units", units, "auto (from the files), kelvin or celsius")
        ->check(CLI::IsMember({"auto", "kelvin", "celsius"}))
        ->capture_default_str();
    sub->add_option("--scale", scale,
                    "Override the files' scale factor (e.g. 0.02 for kelvin x 50)");
    sub->add_option("--offset", offset, "Override the files' offset");
    sub->add_option("--nodata", nodata, "Override the files' nodata value");
    sub->add_option("--band", inputs.rules.band,
                    "Band of each single-date file (1 = value of fill outputs)")
        ->capture_default_str();
    sub->add_option("--date-marks", marks,
                    std::string("What an input date marks in its composite: start, middle or end; ") +
                        date_marks_auto_help)
        ->check(CLI::IsMember({"auto", "start", "middle", "end"}))
        ->capture_default_str();
  }

  void resolve() {
    inputs.unit = parse_temperature_unit(units);
    inputs.rules.scale = optional_number(scale, "--scale");
    inputs.rules.offset = optional_number(offset, "--offset");
    inputs.rules.nodata = optional_number(nodata, "--nodata");
    inputs.marks = parse_date_marks(marks);
  }
};

}  // namespace

Action add_diurnal_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("diurnal",
                                     "Hourly temperature (Parton & Logan 1981) from daily extremes "
                                     "or two overpasses; fit its parameters");
  struct Options {
    InputOptions in;
    DiurnalRequest request;
    std::string calibrate, save_parameters, fit_days, memory = "1G", compression = "deflate";
  };
  auto o = std::make_shared<Options>();
  o->in.add(sub, false);
  DiurnalRequest& r = o->request;
  sub->add_option("--out", r.out_dir, "Output folder (one 24-band GeoTIFF per day)");
  sub->add_option("--name", r.name, "Output name prefix (default: diurnal)");
  sub->add_option("--parameters", r.parameters_file,
                  "TOML file overriding the parameter table (e.g. from --calibrate)");
  sub->add_option(
      "--calibrate", o->calibrate,
      "Fit a, b and c by least squares to these hourly records (a multi-band raster or glob)");
  sub->add_option("--save-parameters", o->save_parameters,
                  "With --calibrate: the TOML file to write");
  sub->add_option("--fit-days", o->fit_days,
                  "With --calibrate: FIRST,LAST local solar days to fit on (YYYY-MM-DD)");
  sub->add_option("--memory", o->memory, "Working-set budget, e.g. 512M or 4G")
      ->capture_default_str();
  sub->add_option("--threads", r.threads, "Worker threads; 0 = all cores (the default)")->check(CLI::Range(0, 4096));
  sub->add_option("--compress", o->compression, "deflate, zstd, lzw or none")
      ->capture_default_str();
  return [o, &global] {
    o->in.resolve();
    if (!o->calibrate.empty() && !(o->request.out_dir.empty() && o->in.inputs.tmin.empty() &&
                                    o->in.inputs.tmax.empty() && o->in.inputs.day.empty() &&
                                    o->in.inputs.night.empty()))
      throw UsageError("--calibrate", "fits a, b and c alone; write the hourly layers in a second run with "
                                      "--parameters and the file --save-parameters wrote");
    if (o->calibrate.empty() && !o->save_parameters.empty())
      throw UsageError("--save-parameters", "writes what --calibrate fits; without --calibrate there is nothing to save");
    if (!o->calibrate.empty()) {
      // Before the fit, which had run to the end and then failed to write (exit 1).
      if (!o->save_parameters.empty()) detail::require_file_destination(o->save_parameters, "--save-parameters", "diurnal.toml");
      CalibrationRequest c;
      c.reference = o->calibrate;
      c.rules = o->in.inputs.rules;
      c.unit = o->in.inputs.unit;
      c.parameters_file = o->request.parameters_file;
      c.out_file = o->save_parameters;
      c.command_line = global.command_line;
      if (!o->fit_days.empty()) {
        const auto [first, last] =
            split_pair(o->fit_days, "--fit-days", "FIRST,LAST as YYYY-MM-DD,YYYY-MM-DD");
        c.first_day = parse_iso_time(first);
        c.last_day = parse_iso_time(last);
        if (!c.first_day || !c.last_day)
          throw UsageError("--fit-days '" + o->fit_days + "'", "expected YYYY-MM-DD,YYYY-MM-DD");
        if (*c.last_day < *c.first_day)
          throw UsageError("--fit-days '" + o->fit_days + "'", "the first day is after the last (FIRST,LAST)");
      }
      const CalibrationSummary s = run_calibration(c);
      if (!global.quiet)
        fmt::print(
            "kalends diurnal --calibrate: a={:.4f} b={:.4f} c={:.4f} fitted on {} pixel-days ({} "
            "hours) in {} "
            "iterations\n  RMSE {:.3f} K fitted, {:.3f} K with a={:g} b={:g} c={:g}, {:.3f} K for "
            "the constant (min + max) / 2 -> {}\n",
            s.fitted.a, s.fitted.b, s.fitted.c, s.pixel_days, s.hours, s.iterations, s.rmse_fitted,
            s.rmse_initial, s.initial.a, s.initial.b, s.initial.c, s.rmse_mid_range, c.out_file);
      for (const std::string& bound : s.at_bounds)
        std::fprintf(stderr,
                     "note: %s: on a bound of the search range; the data would have it further out, so check "
                     "the fit before carrying it to another site\n",
                     bound.c_str());
      return;
    }
    DiurnalRequest& r = o->request;
    r.inputs = o->in.inputs;
    if (r.out_dir.empty())
      throw UsageError("--out", "an output folder is required (or --calibrate)");
    r.memory_bytes = parse_memory(o->memory);
    r.compression = parse_compression(o->compression);
    r.command_line = global.command_line;
    const DiurnalSummary s = run_diurnal(r);
    if (!global.quiet) {
      fmt::print(
          "kalends diurnal: {} days of {} x {} px, 24 UTC hours each (a={:g} b={:g} c={:g}) in "
          "{:.1f} s -> {}{}\n",
          s.days, s.width, s.height, s.parameters.a, s.parameters.b, s.parameters.c, s.seconds,
          r.out_dir,
          s.outputs_removed ? fmt::format(" ({} earlier output{} of dates no longer given removed)", s.outputs_removed,
                                           s.outputs_removed == 1 ? "" : "s")
                            : "");
      std::fflush(stdout);
    }
    // Notes on the data print with -q too, on stderr, as every command's do (they had been on
    // stdout, hidden by -q).
    for (const std::string& note : s.notes) std::fprintf(stderr, "note: %s\n", note.c_str());
  };
}

Action add_suitability_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand("suitability",
                                     "Temperature suitability for malaria transmission (r0-2013, "
                                     "degree-day, window): per period and year");
  struct Options {
    InputOptions in;
    SuitabilityRequest request;
    std::string model = "r0-2013", parasite = "falciparum", window, period = "1M", years,
                memory = "1G", compression = "deflate";
  };
  auto o = std::make_shared<Options>();
  o->in.add(sub, true);
  SuitabilityRequest& r = o->request;
  sub->add_option("--out", r.out_dir, "Output folder")->required();
  sub->add_option("--model", o->model, "r0-2013, degree-day or window")->capture_default_str();
  CLI::Option* parasite = sub->add_option("--parasite", o->parasite, "degree-day model: falciparum or vivax")
                              ->capture_default_str();
  sub->add_option("--window", o->window, "window model: LOW,HIGH deg C (default 18,34)");
  sub->add_option("--threshold", r.threshold,
                  "A period is suitable where its suitability is above this")
      ->capture_default_str();
  sub->add_option("--period", o->period, "Calendar: 1M (months) or N days from 1 January, such as 16d or 8d")->capture_default_str();
  sub->add_option("--years", o->years, "Years to use, e.g. 2021-2023 or 2022");
  sub->add_option("--parameters", r.parameters_file, "TOML file overriding the parameter table");
  sub->add_option("--name", r.name, "Output name prefix (default: the model)");
  sub->add_option("--memory", o->memory, "Working-set budget, e.g. 512M or 4G")
      ->capture_default_str();
  sub->add_option("--threads", r.threads, "Worker threads; 0 = all cores (the default)")->check(CLI::Range(0, 4096));
  sub->add_option("--compress", o->compression, "deflate, zstd, lzw or none")
      ->capture_default_str();
  return [o, parasite, &global] {
    o->in.resolve();
    SuitabilityRequest& r = o->request;
    r.inputs = o->in.inputs;
    r.model = parse_model_kind(o->model);
    r.parasite = parse_parasite(o->parasite);
    // A model's own option given for another model would do nothing.
    if (!o->window.empty() && o->model != "window")
      throw UsageError("--window", "applies to --model window only (the model here: " + o->model + ")");
    if (parasite->count() > 0 && o->model != "degree-day")
      throw UsageError("--parasite", "applies to --model degree-day only (the model here: " + o->model + ")");
    if (!o->window.empty()) {
      const auto [low, high] = split_pair(o->window, "--window", "LOW,HIGH in deg C");
      set_window(r, *optional_number(low, "--window"), *optional_number(high, "--window"));
    }
    r.period = CalendarPeriod::parse(o->period, "--period");
    if (!o->years.empty()) std::tie(r.first_year, r.last_year) = parse_years(o->years);
    r.memory_bytes = parse_memory(o->memory);
    r.compression = parse_compression(o->compression);
    r.command_line = global.command_line;
    const SuitabilitySummary s = run_suitability(r);
    if (!global.quiet) {
      fmt::print(
          "kalends suitability: {}\n  {} year{} ({}-{}) x {} periods of {} x {} px in {:.1f} s -> "
          "{} ({} files)\n",
          s.model, s.years, s.years == 1 ? "" : "s", s.first_year, s.last_year, s.periods, s.width, s.height, s.seconds,
          r.out_dir, s.files);
      const char* periods = r.period.kind == CalendarPeriod::Kind::month ? "months" : "periods";
      // Over the pixels with a value in every period only: said when those are not all (two
      // thirds of a cloudy district had no count, and the average had read as the district's).
      const std::int64_t pixels = std::int64_t(s.width) * s.height;
      if (std::isfinite(s.mean_suitable_periods))
        fmt::print("  synoptic cycle: {:.2f} suitable {} per pixel on average (suitability above {:g}){}\n",
                   s.mean_suitable_periods, periods, r.threshold,
                   s.pixels_counted < pixels
                       ? fmt::format(", over the {} of {} pixels with a value in every period", s.pixels_counted, pixels)
                       : std::string());
      else
        fmt::print("  synoptic cycle: no pixel has data in every period, so suitable {} are not counted\n", periods);
      std::fflush(stdout);
    }
    for (const std::string& note : s.notes) std::fprintf(stderr, "note: %s\n", note.c_str());
    note_monthly_marks(s.monthly_marks_note, r.inputs.marks);
    std::fprintf(stderr, "%s\n", suitability_caution);
  };
}

}  // namespace kalends::cli
