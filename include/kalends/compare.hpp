// Where synoptic layers mislead: summaries of `kalends seasons` outputs.
#pragma once

#include <string>
#include <vector>

namespace kalends {

struct CompareRequest {
  std::string seasons_dir;
  std::string out_dir;
  std::string name;   // empty = the one name found in seasons_dir
  std::string zones;  // optional integer raster on the same grid
  int top = 10;       // largest anomalies listed
  std::string command_line;  // recorded in the class raster (KALENDS_COMMAND)
};

struct CompareSummary {
  std::string json_path, markdown_path, class_path;
  double median_rmse = 0, median_explained = 0;
  std::string year_most_below, year_most_above;  // most pixel-periods beyond -1 / +1 sd; "" if none
  std::string synoptic_years;                    // the synoptic's KALENDS_YEARS, e.g. 2004-2009
  std::vector<int> stale_years;  // anomaly files outside the synoptic's years, left out
  /// Year-periods on fewer days than the same period in other years, left out of the years'
  /// shares and the largest anomalies: "2015 month 06 (21 days, against 30 in other years)".
  std::vector<std::string> partial_periods;
  /// Years with values in fewer than half the periods of the fullest year, left out of
  /// year_most_below/above: "2020 (1 of 12 periods)".
  std::vector<std::string> years_not_ranked;
  int years = 0;  // years with anomaly layers
  int files_written = 0, files_unchanged = 0;  // the class raster, compare.json and compare.md
};

CompareSummary run_compare(const CompareRequest& request);

/// What a user should know about a compare run's summaries (years left out or not ranked, a
/// synoptic miss that cannot be had), one line each, as `kalends compare` and a job's compare
/// step print them.
std::vector<std::string> compare_notes(const CompareSummary& summary);

}  // namespace kalends
