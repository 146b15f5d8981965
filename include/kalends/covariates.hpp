// The covariate layers found in folders written by kalends (fill, seasons, suitability and
// the other steps), or in any raster: grouped into series that share a name, each with the
// rule by which a survey date picks its file and band.
#pragma once

#include <optional>
#include <string>
#include <vector>

#include "kalends/fill.hpp"
#include "kalends/season.hpp"
#include "kalends/stack.hpp"
#include "kalends/time.hpp"

namespace kalends {

enum class SeriesKind {
  dated,            // one file (or band) per date: fill outputs, calendar period means, stacks
  year_period,      // one file per year, one band per period (seasons, suitability year layers)
  synoptic_period,  // one file, one band per period of the calendar year (synoptic layers)
  fixed,            // one band with no time (any other raster band)
};

struct SeriesFile {
  std::string path;
  TimePoint time;  // dated: the file's date (the start of its period)
  int year = 0;    // year_period: the year
  /// A calendar period of a fill that no composite of any year stands for (the stack's
  /// off-season: KALENDS_PERIOD_DAYS_COVERED 0); its values are empty by design.
  bool outside_season = false;
  /// dated: the band of the file that holds the date (a multi-band stack: a band per date).
  int band = 1;
  /// A calendar period of a fill: the days of it some composite stands for
  /// (KALENDS_PERIOD_DAYS_COVERED; -1 where the file does not say).
  int days_covered = -1;
};

struct CovariateSeries {
  /// Unique, documented in docs/extract.md: the folder below the searched root joined by '.',
  /// then the file stem without its date or year ("fill.ndvi", "seasons.ndvi_year"); a fixed
  /// band adds ".bN" when its file has several bands.
  std::string name;
  SeriesKind kind = SeriesKind::fixed;
  std::vector<SeriesFile> files;  // dated: by time; year_period: by year
  int band = 1;                   // the value band (fixed: the band)
  bool has_sd_and_flag = false;   // fill outputs: bands 2 (sd) and 3 (flag)
  /// dated: how long the last file's period lasts (its successor's start for the others);
  /// periodic kinds: the period of the bands.
  std::optional<CalendarPeriod> period;
  double step_days = 0;  // dated fill outputs on the time grid: the grid step
  /// dated: the times [from, until) each file stands for (set_date_marks; find_covariates sets
  /// them for start marks). match_time reads them.
  std::vector<std::pair<TimePoint, TimePoint>> spans;
  int period_count = 0;  // periodic kinds: bands per year
  std::string unit, description;
  std::string caution;  // KALENDS_CAUTION where the layers carry one (suitability)
  std::string note;     // how it was read, where a user may have expected otherwise (for a note)
  Grid grid;
};

/// Every series under `paths` (folders searched recursively, hidden entries skipped, or single
/// raster files). A raster that kalends did not write and whose bands carry dates (a CF time
/// axis, GRIB valid times, dates as band descriptions), one variable of a NetCDF file
/// (NETCDF:"f.nc":tas; a file of several variables gives a series each) or a pattern of files
/// dated by their names is read as `kalends fill` reads a stack: a dated series. Rasters that are summaries with no single value per time (cycle
/// descriptors, suitable-month counts) are kept as fixed bands as `descriptors` says: none, those
/// of the synoptic cycle alone (a page of maps), or all. InputError naming the path when a path
/// does not exist or holds no raster.
/// `prefixes`, when given, one per path, start the names of that path's series ("fill" makes
/// "fill.ndvi" of a fill step's folder, as if its parent had been searched).
enum class Descriptors { none, synoptic, all };
std::vector<CovariateSeries> find_covariates(const std::vector<std::string>& paths,
                                             Descriptors descriptors = Descriptors::none,
                                             const std::vector<std::string>& prefixes = {});

/// Sets the spans of a dated series from what its dates mark in each composite. A file stands
/// for one step (the grid step of fill outputs, else the median spacing of its dates) from its
/// date (start), up to it (end) or around it (middle), never past its neighbours' dates: the
/// rule `kalends seasons` applies to composites (docs/methods.md). Calendar outputs
/// (`--every`, KALENDS_PERIOD) are dated at their period's start whatever `marks` says.
/// find_covariates sets start.
void set_date_marks(CovariateSeries& series, DateMarks marks);

/// The period (0-based) of the calendar year that holds `date`, for a periodic series.
int period_index(const CalendarPeriod& period, const CivilDate& date);
/// The start of the period after the one starting at `start`.
TimePoint next_period_start(const CalendarPeriod& period, TimePoint start);

}  // namespace kalends
