// `kalends validate`: scores gap-filling methods on the user's own stack by withholding more
// observed values along real cloud patterns of the same stack, and compares them with simple
// baselines computed in the same run.
#pragma once

#include <array>
#include <cstdint>
#include <map>
#include <optional>
#include <string>
#include <vector>

#include "kalends/fill_method.hpp"
#include "kalends/stack.hpp"

namespace kalends {

struct ValidateRequest {
  std::string input;
  ValueRules rules;
  std::string qa_input, qa_keep;  // QA stack paired by date, and its keep rule (as for fill)
  int qa_band = 1;
  std::optional<Window> subset;  // validate these pixels only (column, row, width, height)
  std::vector<std::string> methods{"whittaker", "harmonic", "spacetime"};
  MethodOptions method;          // options for every method (the name is replaced)
  std::string out_dir;
  std::uint64_t seed = 1;
  double withhold = 0.2;         // share of the observed cells to withhold
  int neighbourhood_radius = 5;  // pixels; for the "neighbourhood missing" breakdown
  std::int64_t memory_bytes = std::int64_t(1) << 30;
  std::int64_t memory_ceiling = 0;  // as FillRequest::memory_ceiling, for each fill
  int threads = 0;
  bool keep_work = false;        // keep the withheld stack and the fills under OUT/work
  int series_pixels = 3;         // pixels whose truth and fills go to OUT/series.csv (0: none)
};

struct Score {
  std::string name;
  bool baseline = false;
  std::int64_t cells = 0, covered = 0;
  double rmse = 0, mae = 0, bias = 0, r2 = 0, coverage = 0;
  double within_one_sd = -1;  // share of covered cells with |error| <= sd; < 0 where no sd
  double within_95_interval = -1;  // ... with |error| <= 1.96 sd (a normal error's 95 % interval)
  double rms_error_over_sd = -1;  // sqrt(mean((error / sd)^2)); 1 = calibrated; < 0 where no sd
  std::vector<std::pair<std::string, Score>> by_gap, by_neighbourhood;
  MethodParameters parameters;  // the settings a method was scored with (none for baselines)
  std::map<std::string, std::int64_t> not_fitted;  // the fill's series_not_fitted (methods)
};

struct ValidateReport {
  std::int64_t observed = 0, withheld = 0, cells = 0;
  std::int64_t withhold_goal = 0;  // --withhold x observed: more than `withheld` where the masks ran out
  std::int64_t masked_by_qa = 0;  // values the QA rule removed before anything was withheld
  std::int64_t memory_raised_to = 0;  // the largest budget a fill took beyond memory_bytes; 0 if none
  int dates = 0, width = 0, height = 0, transplanted_masks = 0;
  std::vector<Score> scores;
  std::vector<std::pair<int, int>> series_pixels;  // column, row of the input grid, in OUT/series.csv
  // Cells by the gap-length classes of the breakdown: the input's missing cells, the withheld.
  std::array<std::int64_t, 5> own_gap_cells{}, withheld_gap_cells{};
};

/// Runs the validation and writes OUT/report.json, OUT/report.md and, for a few pixels with many
/// withheld values, OUT/series.csv (atomically).
ValidateReport run_validate(const ValidateRequest& request);

/// A note where fewer values were withheld than --withhold asked for (the masks ran out), or "".
std::string withhold_shortfall(const ValidateReport& report, double asked);

/// A note where the stack's own gaps are much longer than the withheld ones (at least a fifth of
/// its missing cells in pixels observed at least once lie in gaps of 49-365 days, and twice the
/// withheld cells' share), or "".
std::string gaps_unlike_the_stacks(const ValidateReport& report);

}  // namespace kalends
