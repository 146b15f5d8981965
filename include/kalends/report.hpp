// `kalends report`: one self-contained HTML page to judge a run by eye. Quicklook maps of every
// layer (colour-blind-safe ramp, legend, units, cautions), the validation tables and fill
// statistics found in the folder, and time series of sample pixels: observations kept and
// rejected, the filled curve with a +-1 sd band, and the synoptic cycle. Images are embedded
// (PNG as data URIs, plots as inline SVG); the page needs no network and no script.
#pragma once

#include <string>
#include <utility>
#include <vector>

namespace kalends {

struct ReportRequest {
  std::string folder;  // a job's out/ (or a step's folder)
  /// Only these subfolders of `folder` (a job's steps: what a report step's 'after' names);
  /// every one when empty. A folder an earlier version of the job left is then not shown.
  std::vector<std::string> steps;
  std::string html;    // the page to write
  std::vector<std::pair<int, int>> pixels;  // (column, row) to plot; empty = spread over the grid
  int samples = 4;     // pixels spread over the grid when none are given
  int map_size = 320;  // longest side of a quicklook, in pixels
  std::string title;   // default: the folder's name
};

struct ReportSummary {
  int maps = 0, plots = 0, validation_reports = 0, validation_plots = 0, fill_summaries = 0;
  std::size_t bytes = 0;
  bool written = false;  // false where request.html already held this page
  std::vector<std::string> notes;  // what a user should know, a line each (pixels not drawn)
};

/// A pixel as the command line and the job file give it: "COLUMN,ROW" or "COLUMN ROW", whole
/// numbers; UsageError naming `where` otherwise.
std::pair<int, int> parse_pixel(const std::string& text, const std::string& where);

/// Writes request.html atomically. InputError when the folder holds no layer.
ReportSummary run_report(const ReportRequest& request);

}  // namespace kalends
