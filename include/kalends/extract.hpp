// Covariate values at survey points and dates: `kalends extract`. Each point's coordinates are
// transformed (PROJ, through GDAL/OGR) into each layer's CRS; each layer's file and band are
// chosen by the survey date (see covariates.hpp); the value is sampled nearest or bilinear,
// optionally with the mean over a buffer. Missing values carry a reason, never a zero.
#pragma once

#include <optional>
#include <string>
#include <vector>

#include "kalends/covariates.hpp"
#include "kalends/time.hpp"

namespace kalends {

/// Where the survey points are and which columns hold what.
struct PointsSource {
  std::string path;  // CSV (coordinates from columns) or any vector format OGR reads
  std::string id_column = "id";
  std::string x_column = "longitude", y_column = "latitude";  // CSV only
  std::string date_column = "date";  // YYYY-MM-DD or YYYY-MM; "" = no dates
  /// Whether the user named the date column: a file without the default one has no dates (fixed
  /// layers need none; dated layers then fail naming the column).
  bool date_column_given = false;
  std::string crs = "EPSG:4326";     // CSV coordinates (OGR vector files: their own CRS)
};

struct SurveyPoint {
  std::string id;
  double x = 0, y = 0;     // as given, in the points' CRS
  std::string x_text, y_text;  // a CSV's coordinates as written, echoed in the table
  std::string date_text;   // as given
  std::optional<CivilDate> date;
  bool month_only = false;  // a year-month: matched at the middle of the month (day 15)
  bool has_coordinates = true;  // false where the row leaves them empty
};

struct SurveyPoints {
  std::vector<SurveyPoint> points;
  std::string crs_wkt;
  bool from_columns = true;  // CSV: coordinates from the x and y columns; else geometries
  /// The columns as the file spells them (the options match them whatever their case).
  std::string id_name, x_name, y_name, date_name;
  std::vector<std::string> notes;  // what a user should know (a CRS assumed), a line each
};

/// Empty coordinates or dates are kept (the values get a reason); a column that is not there,
/// or a coordinate or date that cannot be read, is an InputError naming the file and the row.
SurveyPoints read_survey_points(const PointsSource& source);

enum class Sampling { nearest, bilinear };
/// "nearest" or "bilinear"; UsageError naming --sampling otherwise.
Sampling parse_sampling(const std::string& text);

struct ExtractRequest {
  std::vector<std::string> covariates;  // folders or raster files
  std::vector<std::string> name_prefixes;  // optional, one per covariate path (find_covariates)
  PointsSource points;
  std::string out;  // CSV path
  Sampling sampling = Sampling::nearest;
  double buffer_metres = 0;  // 0 = no buffer mean
  std::vector<int> lags;     // periods before the survey's period (1 = the one before)
  DateMarks marks = DateMarks::automatic;  // what the dates of dated layers mark in their composites
  std::vector<std::string> layers;  // series names or globs ("fill.*"); empty = all
  bool long_format = false;
  bool include_descriptors = false;
};

/// One value: a point, a series, a lag (0 = the survey's own period).
struct ExtractedValue {
  std::size_t point = 0, series = 0;
  int lag = 0;
  std::string matched;  // the date, year-period or period used ("2022-03-01", "2022 month 03")
  std::optional<double> value, sd, flag;
  std::optional<double> buffer_mean;
  int buffer_cells = 0, buffer_filled = 0;
  std::string reason;  // why value is missing; "" when it is there
};

struct ExtractResult {
  SurveyPoints points;
  std::vector<CovariateSeries> series;
  std::vector<ExtractedValue> values;  // point-major, then series, then lag
  int missing = 0;
  std::vector<std::string> repeated_ids;  // ids given to more than one point (kept, each its row)
  std::vector<std::string> notes;         // what a user should know, a line each (repeated ids)
  std::vector<std::string> cautions;      // the selected layers' KALENDS_CAUTION, each once
  bool table_written = false;             // false where request.out already held this table
};

/// The checks that need no file (buffer, lags); UsageError naming the option. run_extract calls
/// it first.
void check_extract_options(const ExtractRequest& request);

/// Samples every point in every selected series; writes `request.out` atomically when set.
ExtractResult run_extract(const ExtractRequest& request);

/// Where a survey date falls in a series: the file (index into series.files) and band, or why
/// there is none. `lag` counts periods (dated: files) back from the survey's own.
struct TimeMatch {
  int file = -1, band = 1;
  std::string label, reason;
};
TimeMatch match_time(const CovariateSeries& series, const SurveyPoint& point, int lag);

}  // namespace kalends
