// Temperature suitability for malaria transmission from stacks: the diurnal cycle rebuilt
// from daily extremes or two overpasses (run_diurnal), its parameters fitted to hourly records
// (run_calibration), and thermal-response models applied hour by hour and summarised per
// period and year (run_suitability).
//
// A temperature-suitability index describes temperature alone: it is not malaria risk,
// incidence or a case forecast. Land-surface temperature is not air temperature.
#pragma once

#include <optional>
#include <map>
#include <string>
#include <vector>

#include "kalends/fill.hpp"
#include "kalends/season.hpp"
#include "kalends/stack.hpp"
#include "kalends/thermal.hpp"

namespace kalends {

/// The one-line reminder printed whenever suitability layers are written.
extern const char* const suitability_caution;

enum class TemperatureUnit { automatic, kelvin, celsius };
TemperatureUnit parse_temperature_unit(const std::string& text);  // UsageError naming --units

/// Where temperatures come from: daily extremes (`tmin` + `tmax`), two overpasses a day
/// (`day` + `night`, paired by date), or temperatures used as they are (`temperature`:
/// monthly means, hourly records). Inputs are globs, folders of `kalends fill` outputs or
/// multi-band rasters.
struct TemperatureInputs {
  std::string tmin, tmax, day, night, temperature;
  ValueRules rules;
  /// An input's own rules where they differ from `rules` (a job's inputs each carry theirs),
  /// by role: "tmin", "tmax", "day", "night", "temperature".
  std::map<std::string, ValueRules> rules_of;
  TemperatureUnit unit = TemperatureUnit::automatic;
  double day_hour = 13.5, night_hour = 1.5;  // local solar time of the overpasses
  DateMarks marks = DateMarks::automatic;        // what a composite's date marks
};

struct DiurnalRequest {
  TemperatureInputs inputs;
  std::string parameters_file;  // TOML overriding the table (e.g. from --calibrate)
  std::string out_dir, name;    // name: default "diurnal"
  std::int64_t memory_bytes = std::int64_t(1) << 30;
  int threads = 0;
  Compression compression = Compression::deflate;
  std::string command_line;
};

struct DiurnalSummary {
  int days = 0, width = 0, height = 0;
  std::int64_t implausible = 0;  // values outside -100..100 deg C, taken as missing
  /// Pixel-days with tmin above tmax (taken as missing) or a day sample not warmer than the
  /// night one (taken as flat); a majority is an error.
  std::int64_t inverted = 0;
  std::vector<std::string> notes;  // what a user should know about the inputs, a line each
  DiurnalParameters parameters;
  double seconds = 0;
  std::vector<std::string> outputs;
  int outputs_removed = 0;  // earlier runs' files of dates this run does not make
};

/// One GeoTIFF per input date, `<name>_YYYY-MM-DD.tif`, 24 float32 bands `hour 00` ..
/// `hour 23` (UTC), deg C.
DiurnalSummary run_diurnal(const DiurnalRequest& request);

struct CalibrationRequest {
  std::string reference;  // hourly (sub-daily) temperatures: a multi-band raster or a glob
  ValueRules rules;
  TemperatureUnit unit = TemperatureUnit::automatic;
  std::optional<TimePoint> first_day, last_day;  // local solar days to fit on (inclusive)
  std::string parameters_file;                   // starting values (default: the table)
  std::string out_file;                          // TOML with the fitted [diurnal] a, b, c
  std::string command_line;
};

struct CalibrationSummary {
  DiurnalParameters initial, fitted;
  // K (= deg C); mid_range: each day constant at (Tmin + Tmax) / 2, the naive baseline.
  double rmse_initial = NAN, rmse_fitted = NAN, rmse_mid_range = NAN;
  std::int64_t hours = 0;
  int pixel_days = 0, iterations = 0;
  /// "b = 0.01 (the lowest the fit allows)" for each parameter the fit left on a bound of its
  /// search range: the data would have it further out, and it may not carry to another site.
  std::vector<std::string> at_bounds;
};

/// Fits a, b and c by least squares to every complete local solar day of the reference (each
/// day rebuilt from its own minimum and maximum, as run_diurnal does) and writes them to
/// `out_file` atomically.
CalibrationSummary run_calibration(const CalibrationRequest& request);

struct SuitabilityRequest;
/// The window model's limits as given (--window LOW,HIGH); UsageError unless both are finite
/// (NaN in the request means "from the parameter table").
void set_window(SuitabilityRequest& request, double low, double high);

struct SuitabilityRequest {
  TemperatureInputs inputs;
  ThermalModelKind model = ThermalModelKind::r0_2013;
  Parasite parasite = Parasite::falciparum;
  double window_low = NAN, window_high = NAN;  // NaN = from the table
  std::string parameters_file;
  CalendarPeriod period;  // default: calendar months
  std::optional<int> first_year, last_year;
  double threshold = 0;       // a period is suitable where its suitability is above this
  std::string out_dir, name;  // name: default the model's tag
  std::int64_t memory_bytes = std::int64_t(1) << 30;
  int threads = 0;
  Compression compression = Compression::deflate;
  std::string command_line;
  bool keep_unchanged = false;  // leave outputs that would not change as they are
  /// Compute only this window of the input's pixel grid (a tile, a shard's strip): outputs
  /// cover the window and are georeferenced as it.
  std::optional<Window> region;
  /// Years whose temperatures changed since an earlier run into the same folder: only their
  /// layers are computed and written; the synoptic layers take the other years' values from
  /// their existing year layers (a year whose layer is missing is computed).
  std::optional<std::vector<int>> only_years;
};

struct SuitabilitySummary {
  int outputs_written = 0, outputs_unchanged = 0;
  int outputs_removed = 0;  // an earlier run's year layers of years outside this run's
  int years = 0, periods = 0, files = 0, width = 0, height = 0, first_year = 0, last_year = 0;
  std::string model;
  double mean_suitable_periods = NAN;  // synoptic count, averaged over pixels with a value
  std::int64_t pixels_counted = 0;     // those pixels: a value in every period of the synoptic cycle
  std::int64_t implausible = 0;        // values outside -100..100 deg C, taken as missing
  std::int64_t inverted = 0;           // as in DiurnalSummary
  std::vector<std::string> notes;      // as in DiurnalSummary
  double seconds = 0;
  bool dates_at_month_ends = false;  // see dates_at_month_ends (season.hpp)
  std::string monthly_marks_note;    // see monthly_marks_note (season.hpp); "" where none
  std::vector<std::string> outputs;
};

/// The checks that need no input stack (threshold, kinds of input, model and window, the
/// parameters file); UsageError naming the option. run_suitability calls it first.
void check_suitability_options(const SuitabilityRequest& request);

SuitabilitySummary run_suitability(const SuitabilityRequest& request);


}  // namespace kalends
