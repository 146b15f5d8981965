// Step 'fill': gap filling of one stack (kalends fill).
#include <fmt/format.h>

#include <array>
#include <cstdio>
#include <fstream>
#include <map>
#include <set>
#include <optional>

#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/qa_rule.hpp"
#include "kalends/tiles.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

std::vector<std::string> lines_of(const std::string& path) {
  std::ifstream in(path);
  if (!in) throw InputError(path, "cannot read");
  std::vector<std::string> lines;
  for (std::string line; std::getline(in, line);) lines.push_back(line);
  return lines;
}

// fill-years.tsv: the per-year counts of the shards' strips add up to the whole grid's.
void merge_years(const std::vector<std::string>& files, const std::string& path) {
  std::string header;
  std::map<int, std::array<long long, 5>> years;
  std::map<std::pair<int, std::string>, long long> not_fitted;  // (year, reason): pixel-years
  for (const std::string& file : files) {
    const auto lines = lines_of(file);
    if (lines.empty()) throw InputError(file, "empty");
    if (header.empty()) header = lines[0];
    if (lines[0] != header) throw InputError(file, "made on another time grid than the other shards' (" + lines[0] + ")");
    for (std::size_t i = 1; i < lines.size(); ++i) {
      int year = 0;
      long long c[5] = {0};
      int reason_at = 0;
      if (lines[i].starts_with("not-fitted\t")) {
        if (std::sscanf(lines[i].c_str() + 11, "%d\t%lld\t%n", &year, &c[0], &reason_at) != 2 || reason_at == 0)
          throw InputError(file, "unreadable line " + std::to_string(i + 1));
        not_fitted[{year, lines[i].substr(11 + reason_at)}] += c[0];
        continue;
      }
      if (std::sscanf(lines[i].c_str(), "%d %lld %lld %lld %lld %lld", &year, &c[0], &c[1], &c[2], &c[3], &c[4]) != 6)
        throw InputError(file, "unreadable line " + std::to_string(i + 1));
      auto& total = years[year];
      for (int k = 0; k < 5; ++k) total[k] += c[k];
    }
  }
  std::string text = header + "\n";
  for (const auto& [year, c] : years) text += fmt::format("{} {} {} {} {} {}\n", year, c[0], c[1], c[2], c[3], c[4]);
  for (const auto& [key, n] : not_fitted) text += fmt::format("not-fitted\t{}\t{}\t{}\n", key.first, n, key.second);
  write_text_atomically(path, text);
}

// fill-summary.json: counts add up; the size is the whole grid's; the rest (method, dates,
// block size) is the first shard's. 'blocks' is the number of blocks all shards computed.
void merge_summary(const std::vector<std::string>& files, const std::string& path, int width, int height) {
  static const std::set<std::string> additive = {"pixel_dates", "observed", "missing", "masked_by_qa", "rejected",
                                                 "filled", "unfilled", "pixels_never_observed",
                                                 "pixels_without_value", "blocks"};
  std::vector<std::string> lines = lines_of(files.front());
  std::map<std::string, long long> totals;
  std::set<std::string> unknown;  // null in some shard: not known for the whole grid either
  // "series_not_fitted": {"reason": count, ...} over several lines: the counts add up by reason
  // (the reasons are kept as written, escapes and all).
  std::map<std::string, long long> not_fitted;
  const std::string nested = "\"series_not_fitted\": {";
  for (const std::string& file : files) {
    bool inside = false;
    for (const std::string& line : lines_of(file)) {
      if (line.find(nested) != std::string::npos) {
        inside = line.find('}') == std::string::npos;
        continue;
      }
      if (!inside) continue;
      const auto close = line.rfind("\":");
      if (close == std::string::npos) {
        inside = false;  // the closing brace
        continue;
      }
      not_fitted[line.substr(line.find('"') + 1, close - line.find('"') - 1)] += std::stoll(line.substr(close + 2));
    }
  }
  for (const std::string& file : files)
    for (const std::string& line : lines_of(file)) {
      const auto q1 = line.find('"'), q2 = line.find('"', q1 + 1), colon = line.find(':', q2);
      if (q1 == std::string::npos || q2 == std::string::npos || colon == std::string::npos) continue;
      const std::string key = line.substr(q1 + 1, q2 - q1 - 1);
      if (!additive.count(key)) continue;
      const std::string value = line.substr(colon + 1);
      if (value.find("null") != std::string::npos) unknown.insert(key);
      else totals[key] += std::stoll(value);
    }
  // "chosen": one entry a line, per block of each shard's strip; the strips' blocks are
  // numbered on from the shards before, as one run numbers the blocks of the whole grid.
  std::vector<std::string> chosen;
  int block_offset = 0;
  for (const std::string& file : files) {
    bool inside = false;
    int blocks_here = 0;
    for (const std::string& line : lines_of(file)) {
      if (line.find("\"chosen\": [") != std::string::npos) {
        inside = true;
        continue;
      }
      if (!inside) continue;
      const auto at = line.find("{\"block\": ");
      if (at == std::string::npos) break;  // the closing bracket
      const auto number = at + 10, end = line.find(',', number);
      const int block = std::stoi(line.substr(number, end - number));
      blocks_here = std::max(blocks_here, block + 1);
      std::string entry = line.substr(0, number) + std::to_string(block + block_offset) + line.substr(end);
      if (!entry.empty() && entry.back() == ',') entry.pop_back();
      chosen.push_back(entry);
    }
    block_offset += blocks_here;
  }
  // The summed reasons in the layout of a single run's summary (json_counts with an indent).
  auto not_fitted_block = [&](const std::string& lead, bool comma) {
    std::string block = lead + nested;
    std::size_t k = 0;
    for (const auto& [reason, n] : not_fitted) block += fmt::format("{}\n    \"{}\": {}", k++ ? "," : "", reason, n);
    return block + (not_fitted.empty() ? "}" : "\n  }") + (comma ? "," : "") + "\n";
  };
  std::string text, lead;
  bool skipping = false, skipping_chosen = false;
  for (std::string line : lines) {
    if (skipping_chosen) {  // the first shard's own entries, up to the closing bracket
      if (line.find("{\"block\": ") != std::string::npos) continue;
      skipping_chosen = false;
      for (std::size_t k = 0; k < chosen.size(); ++k) text += chosen[k] + (k + 1 < chosen.size() ? ",\n" : "\n");
    }
    if (line.find("\"chosen\": [") != std::string::npos) {
      text += line + "\n";
      skipping_chosen = true;
      continue;
    }
    if (skipping) {  // the first shard's own reasons, up to its closing brace
      if (line.rfind("\":") == std::string::npos) {
        text += not_fitted_block(lead, !line.empty() && line.back() == ',');
        skipping = false;
      }
      continue;
    }
    if (const auto at = line.find(nested); at != std::string::npos) {
      lead = line.substr(0, at);
      if (line.find('}') != std::string::npos)
        text += not_fitted_block(lead, !line.empty() && line.back() == ',');
      else
        skipping = true;
      continue;
    }
    const auto q1 = line.find('"'), q2 = line.find('"', q1 + 1), colon = line.find(':', q2);
    if (q1 != std::string::npos && q2 != std::string::npos && colon != std::string::npos) {
      const std::string key = line.substr(q1 + 1, q2 - q1 - 1);
      const bool comma = !line.empty() && line.back() == ',';
      std::optional<std::string> value;
      if (key == "width") value = std::to_string(width);
      if (key == "height") value = std::to_string(height);
      if (additive.count(key)) value = unknown.count(key) ? "null" : std::to_string(totals[key]);
      if (value) line = line.substr(0, colon + 1) + " " + *value + (comma ? "," : "");
    }
    text += line + "\n";
  }
  write_text_atomically(path, text);
}

// The request a 'fill' step runs, from its keys; reads no file.
FillRequest fill_request(const StepContext& c) {
  const ResolvedInput in = c.resolve(c.text("input"));
  FillRequest r;
  r.out_dir_is_its_own = true;
  r.input = in.pattern;
  r.rules = in.rules;
  r.qa_input = in.qa;
  r.qa_keep = c.text("keep", in.keep);
  r.qa_band = in.qa_band;
  if (r.qa_input.empty()) r.qa_keep.clear();
  MethodOptions& m = r.method;
  m.method = c.text("method", m.method);
  m.lambda = c.number_or_auto("lambda", m.lambda);
  if (c.has("lambda_range")) std::tie(m.lambda_min, m.lambda_max) = c.pair("lambda_range");
  m.order = c.integer("order", m.order);
  const std::string envelope = c.text("envelope", "none");
  if (envelope != "none" && envelope != "upper")
    throw UsageError("--envelope '" + envelope + "'", "expected none or upper");
  m.envelope_upper = envelope == "upper";
  m.robust = c.flag("robust");
  m.iterations = c.integer("iterations", m.iterations);
  m.harmonics = c.integer("harmonics", m.harmonics);
  m.trend = c.flag("trend");
  m.reject_below = c.number("reject_below", m.reject_below);
  m.max_gap_days = c.number("max_gap", m.max_gap_days);
  m.max_extrapolation_days = c.number("max_extrapolation", m.max_extrapolation_days);
  m.reach_days = c.number("reach", m.reach_days);
  const std::string never_observed = c.text("never_observed", "fill");
  if (never_observed != "fill" && never_observed != "leave")
    throw UsageError("never_observed '" + never_observed + "'", "expected fill or leave");
  m.fill_never_observed = never_observed == "fill";
  m.spacetime_space_smoothing = c.number_or_auto("space_smoothing", m.spacetime_space_smoothing);
  m.spacetime_time_smoothing = c.number_or_auto("time_smoothing", m.spacetime_time_smoothing);
  m.spacetime_climate_smoothing = c.number("climate_smoothing", m.spacetime_climate_smoothing);
  m.spacetime_season_smoothing = c.number("season_smoothing", m.spacetime_season_smoothing);
  m.spacetime_halo = c.integer("halo", m.spacetime_halo);
  m.spacetime_tolerance = c.number("tolerance", m.spacetime_tolerance);
  m.spacetime_fft_wisdom = c.text("fft_wisdom", m.spacetime_fft_wisdom);
  m.spacetime_neighbour_radius = c.integer("neighbour_radius", m.spacetime_neighbour_radius);
  r.smooth = c.flag("smooth");
  if (c.has("every")) r.every = CalendarPeriod::parse(c.text("every"));
  r.marks = parse_date_marks(c.text("date_marks", "auto"));
  take_run_settings(r, c);
  return r;
}

}  // namespace

StepKind fill_step_kind() {
  using T = KeyType;
  StepKind kind;
  kind.name = "fill";
  kind.splits_by_area = true;
  kind.years_by_reach = true;
  kind.keys = {{"input", T::text, StepKey::Role::reads},
               {"method", T::text}, {"lambda", T::number_or_auto}, {"lambda_range", T::pair},
               {"order", T::integer}, {"envelope", T::text}, {"robust", T::boolean},
               {"iterations", T::integer}, {"harmonics", T::integer}, {"trend", T::boolean},
               {"reject_below", T::number}, {"smooth", T::boolean}, {"every", T::text},
               {"name", T::text}, {"max_gap", T::number}, {"max_extrapolation", T::number},
               {"reach", T::number}, {"never_observed", T::text}, {"compress", T::text}, {"keep", T::text},
               {"space_smoothing", T::number_or_auto}, {"time_smoothing", T::number_or_auto},
               {"climate_smoothing", T::number}, {"season_smoothing", T::number},
               {"halo", T::integer}, {"tolerance", T::number}, {"neighbour_radius", T::integer},
               {"fft_wisdom", T::text}, {"date_marks", T::text},
               {"tiles", T::text, StepKey::Role::path}};
  kind.check = [](const StepOptions& o) {
    return o.count("input") ? std::string() : std::string("a 'fill' step needs 'input'");
  };
  kind.merge_file = [](const std::string& name, const std::vector<std::string>& files, const std::string& path,
                       int width, int height) {
    if (name == "fill-years.tsv") merge_years(files, path);
    else if (name == "fill-summary.json") merge_summary(files, path, width, height);
    else return false;
    return true;
  };
  kind.check_values = [](const StepContext& c) {
    const FillRequest r = fill_request(c);
    if (c.has("keep")) QaRule::parse(c.text("keep"));  // a typo named at its line, before any step runs
    // A rule with no QA to apply it to had been ignored (the command refuses it). A job input's
    // QA is known now; an index step's only once it ran (see kind.run).
    if (c.has("keep") && r.qa_input.empty() && c.resolve(c.text("input")).folder.empty())
      throw UsageError("--keep", "given, but the input '" + c.text("input") + "' has no QA stack ('qa' in its [inputs." +
                                     c.text("input") + "])");
    std::vector<std::string> given;
    for (const auto& [key, value] : c.options) given.push_back(key);
    // The method's name first: a misspelt one with 'lambda' had been told that lambda applies
    // to whittaker only.
    make_fill_method(r.method);  // each method checks its own options
    check_options_apply({r.method.method}, given);
  };
  kind.check_memory = [](const StepContext& c) {
    FillRequest r = fill_request(c);
    r.check_only = true;
    // A tile set: the largest tile with its halo across the neighbours (tiles had been checked
    // only as they ran, so a later tile could fail a nightly run hours in).
    if (c.has("tiles")) run_tiled_fill(r, c.text("tiles"), false);
    else run_fill(r);
  };
  kind.run = [](const StepContext& c) {
    const FillRequest r = fill_request(c);
    if (c.has("keep") && r.qa_input.empty())
      throw UsageError("--keep", "given, but the step '" + c.text("input") + "' passes no QA stack through (its red "
                                     "input has no 'qa')");
    if (c.has("tiles")) {
      // Outputs per tile, and the mosaic VRTs later steps read (see the runner's resolve).
      const TiledFillSummary tiled = run_tiled_fill(r, c.text("tiles"), true, c.progress, c.only_tiles);
      StepOutcome outcome;
      for (const FillSummary& s : tiled.tiles) {
        outcome.outputs_written += s.outputs_written;
        outcome.outputs_unchanged += s.outputs_unchanged;
        outcome.outputs_removed += s.outputs_removed;
      }
      // The mosaic views later steps read are the step's files too.
      outcome.outputs_written += tiled.mosaic_written;
      outcome.outputs_unchanged += tiled.mosaic_unchanged;
      outcome.notes = tiled_fill_notes(r, tiled);
      return outcome;
    }
    const FillSummary s = run_fill(r, c.progress);
    StepOutcome outcome{s.outputs_written, s.outputs_unchanged, "", fill_notes(r, s), s.outputs_removed};
    outcome.rasters = s.outputs;
    return outcome;
  };
  return kind;
}

}  // namespace kalends::detail
