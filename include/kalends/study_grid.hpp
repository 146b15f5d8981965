// Delivering layers on a study grid: reprojected and aggregated with GDAL's warper to a CRS,
// resolution and extent of the analyst's choosing, clipped to a study area, written as Cloud
// Optimized GeoTIFF.
#pragma once

#include <optional>
#include <string>
#include <vector>

namespace kalends {

struct StudyGridRequest {
  std::vector<std::string> inputs;  // folders (their rasters, calendar subfolders too) or rasters
  std::string out_dir;
  std::string crs;                  // anything GDAL reads: EPSG:4326, a WKT or PROJ string
  std::optional<double> resolution;  // in the target CRS's units; none = GDAL's choice
  std::optional<std::vector<double>> extent;  // xmin, ymin, xmax, ymax in the target CRS
  std::string clip;                 // OGR vector source of the study area; cells outside: nodata
  std::string resample = "average";  // for continuous bands: average (area-weighted), nearest, bilinear, ...
  std::string command_line;
};

struct StudyGridSummary {
  int outputs_written = 0, outputs_unchanged = 0;
  int width = 0, height = 0;
  std::vector<std::string> outputs;
  /// Layers with no value anywhere on the study grid: an extent or clip beside the data, or a
  /// layer empty there. Written all the same (a nightly set keeps its dates).
  std::vector<std::string> without_value;
  /// A caution the layers carry (KALENDS_CAUTION: suitability's), to be shown with them.
  std::string caution;
  /// What the command should say about the grid it made (one line each): layers without a
  /// value, an --extent moved to whole cells.
  std::vector<std::string> notes;
};

/// The resampling methods a continuous band may take (GDAL's warper names).
const std::vector<std::string>& study_grid_resampling_names();

/// Checks the options that need no file (CRS, resolution, extent, resampling); UsageError
/// naming the option. run_study_grid calls it first.
void check_study_grid_options(const StudyGridRequest& request);

/// Warps every raster. Bands named "flag" take the mode (a class layer); the others
/// `resample`. For kalends fill outputs a band "filled_share" is added: the share of the
/// input cells with a value that were filled (flags 1 and 2), so users see how much of a coarse
/// cell was observed. Outputs are written atomically under the input's relative name.
StudyGridSummary run_study_grid(const StudyGridRequest& request);

}  // namespace kalends
