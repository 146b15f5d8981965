// kalends validate PATTERN --out DIR [--methods a,b,c] [--seed N] [--withhold SHARE]
//                  [--qa QA --keep RULE] [--subset C,R,W,H] [method options]
#include <algorithm>
#include <cstdio>
#include <filesystem>

#include <fmt/format.h>

#include "cli/commands.hpp"
#include "kalends/percent.hpp"
#include "engine/memory_budget.hpp"
#include "kalends/error.hpp"
#include "validate/validate.hpp"

namespace kalends::cli {

Action add_validate_command(CLI::App& app, GlobalOptions& global) {
  CLI::App* sub = app.add_subcommand(
      "validate", "Withhold observed values along real cloud patterns and score each method");
  struct Options {
    ValidateRequest request;
    std::string methods = "whittaker,harmonic,spacetime", memory = "1G", subset;
    MethodOptionTexts method_texts;
    ValueRuleTexts rule_texts;
  };
  auto o = std::make_shared<Options>();
  ValidateRequest& r = o->request;
  sub->add_option("input", r.input, "Quoted glob of single-date rasters, one variable of many files "
                  "('NETCDF:\"nc/*.nc\":ndvi'), or one multi-band raster")
      ->required();
  sub->add_option("--out", r.out_dir, "Output folder (report.json, report.md, series.csv)")->required();
  sub->add_option("--methods", o->methods, "Comma-separated methods to score")->capture_default_str();
  sub->add_option("--seed", r.seed, "Seed of the mask transplant (same seed, same cells)")
      ->capture_default_str()
      ->check(CLI::Validator([](std::string& text) { return text.starts_with("-") ? std::string("must be 0 or more") : ""; },
                             "", "SEED"));
  sub->add_option("--withhold", r.withhold, "Share of the observed values to withhold")
      ->capture_default_str();
  sub->add_option("--radius", r.neighbourhood_radius,
                  "Neighbourhood radius (pixels) for the breakdown by missing neighbours")
      ->capture_default_str();
  CLI::Option* memory = sub->add_option("--memory", o->memory, "Working-set budget of each fill; when not given, 1G, "
                                        "or more where one block needs more, up to half the machine's memory")
                            ->capture_default_str();
  sub->add_option("--threads", r.threads, "Worker threads; 0 = all cores (the default)")->check(CLI::Range(0, 4096));
  sub->add_option("--series", r.series_pixels, "Pixels (those with the most withheld values) whose truth and "
                  "fills go to OUT/series.csv, for the report's plots")
      ->capture_default_str()->check(CLI::Range(0, 1000));
  sub->add_flag("--keep-work", r.keep_work, "Keep the withheld stack and the fills in OUT/work");
  sub->add_option("--subset", o->subset, "Validate these pixels only: COLUMN,ROW,WIDTH,HEIGHT (as "
                  "gdal_translate -srcwin), for an area too large to validate whole");
  sub->add_option("--qa", r.qa_input, "Quoted glob or raster of QA layers, paired by date; values the "
                  "keep rule rejects count as missing");
  sub->add_option("--keep", r.qa_keep, "QA keep rule, e.g. 'bits0-1 in 0,1'");
  sub->add_option("--qa-band", r.qa_band, "Band of each QA file")->capture_default_str();
  // Each method is scored with the settings it would fill with: the options of `kalends fill`.
  add_method_options(sub, r.method, o->method_texts);
  add_value_rule_options(sub, r.rules, o->rule_texts);
  return [o, memory, sub, &global] {
    ValidateRequest& r = o->request;
    apply_method_options(r.method, o->method_texts);
    apply_value_rule_options(r.rules, o->rule_texts);
    r.methods = split_list(o->methods, "--methods");
    check_options_apply(r.methods, options_given(*sub), "--methods");
    r.memory_bytes = parse_memory(o->memory);
    if (memory->count() == 0) r.memory_ceiling = detail::usable_memory_bytes() / 2;
    r.subset = parse_subset(o->subset);
    const ValidateReport report = run_validate(r);
    if (report.memory_raised_to > 0) print_memory_note(r.memory_bytes, report.memory_raised_to);
    if (const std::string note = withhold_shortfall(report, r.withhold); !note.empty())
      std::fprintf(stderr, "note: %s\n", note.c_str());
    if (const std::string note = gaps_unlike_the_stacks(report); !note.empty())
      std::fprintf(stderr, "note: %s\n", note.c_str());
    if (!global.quiet) {
      fmt::print("kalends validate: {} of {} observed values withheld along {} transplanted masks\n",
                 report.withheld, report.observed, report.transplanted_masks);
      const auto label = [](const Score& s) { return s.name + (s.baseline ? " (baseline)" : ""); };
      std::size_t width = 0;
      for (const Score& s : report.scores) width = std::max(width, label(s).size());
      for (const Score& s : report.scores) {
        if (s.covered == 0) {
          // Say why, as `kalends fill` does: the commonest reason a series was not fitted.
          std::string why;
          const auto commonest = std::max_element(
              s.not_fitted.begin(), s.not_fitted.end(),
              [](const auto& a, const auto& b) { return a.second < b.second; });
          if (commonest != s.not_fitted.end())
            why = fmt::format(" ({} pixels not fitted: {})", commonest->second, commonest->first);
          fmt::print("  {:<{}} no value on any withheld cell{}\n", label(s), width, why);
        } else {
          fmt::print("  {:<{}} RMSE {:.4f}  MAE {:.4f}  bias {:+.4f}  R2 {:.3f}  coverage {}\n",
                     label(s), width, s.rmse, s.mae, s.bias, s.r2, percent_text(s.coverage));
        }
      }
      const std::string out = (std::filesystem::path(r.out_dir) / "").string();  // one slash, however given
      fmt::print("  -> {0}report.json, {0}report.md{1}\n", out,
                 report.series_pixels.empty() ? "" : fmt::format(", {}series.csv", out));
    }
  };
}

}  // namespace kalends::cli
