// Temperature inputs shared by `kalends diurnal` and `kalends suitability`: the stacks paired
// by date, their units, each pixel's position and each date's diurnal day.
#pragma once

#include <ogr_spatialref.h>

#include <algorithm>
#include <cmath>
#include <memory>
#include <string>
#include <vector>

#include "engine/memory_budget.hpp"
#include "kalends/stack.hpp"
#include "kalends/suitability.hpp"
#include "kalends/thermal.hpp"

namespace kalends::detail {

/// Values outside this range (deg C, after unit conversion) are taken as missing: they point
/// to a wrong unit or a missing scale factor rather than a temperature.
constexpr double plausible_low_celsius = -100, plausible_high_celsius = 100;

/// Above this share of pixel-days with tmin above tmax (or a day overpass not warmer than the
/// night one) the inputs are taken to be swapped and the run stops; below it those pixel-days
/// are taken as missing (flat) and counted. Common practice (no source): a majority rule, since
/// swapped inputs invert nearly every pixel-day and sound ones invert few or none.
constexpr double swapped_extremes_share = 0.5;

/// Pixels per block: what the memory budget allows, but small enough that every worker gets
/// blocks (about two per thread), never below one tile.
inline std::int64_t parallel_block_pixels(const Grid& grid, const MemoryShare& share, int threads,
                                          int tile = 256) {
  const std::int64_t shared = std::int64_t(grid.width) * grid.height / (2 * std::max(threads, 1));
  return std::min(share.max_read_pixels, std::max<std::int64_t>(std::int64_t(tile) * tile, shared));
}

/// Kelvin or Celsius of a stack: from `unit` when given, else from the band's unit (or GRIB's
/// GRIB_UNIT); UsageError naming `option` and the file when it cannot be told.
TemperatureUnit unit_of(const Stack& stack, TemperatureUnit unit, const std::string& option);

struct TemperatureSource {
  enum class Mode { extremes, overpasses, constant } mode = Mode::extremes;
  std::vector<Stack> stacks;       // tmin, tmax | day, night | temperature
  std::vector<double> to_celsius;  // per stack: offset added to physical values
  std::vector<TimePoint> times;
  std::vector<std::int64_t> days;            // date of each time (days since 1970)
  std::vector<int> day_of_year;              // of the day each date stands for (for the sun)
  std::vector<char> adjacent_before;         // the previous date is the previous day
  bool sub_daily = false;                    // two dates share a day (hourly records)
  double day_hour = 13.5, night_hour = 1.5;  // overpass local solar times
  Grid grid;
  std::string name;
  std::vector<std::string> unpaired;  // notes: dates of one input of a pair without the other's, left out

  /// Opens and checks everything: exactly one kind of input, stacks on one grid with the same
  /// dates (InputError naming the file and the date otherwise), known units.
  static TemperatureSource open(const TemperatureInputs& inputs);
  /// The kind of input given, and the checks that need no file (exactly one kind, both halves
  /// of a pair, overpass hours); UsageError otherwise.
  static Mode mode_of(const TemperatureInputs& inputs);
  std::size_t dates() const { return times.size(); }
};

/// What the reading of temperatures found, summed over blocks and checked once at the end.
struct TemperatureCounts {
  std::vector<std::int64_t> implausible, finite;  // per stack: values outside / inside the range
  /// Per stack and date: 1 where a value lay outside the range, 2 inside, 3 both; 4 where the
  /// input's valid range took a value out.
  std::vector<std::vector<std::uint8_t>> date_ranges;
  /// Pixel-dates with both values of a pair (tmin and tmax, or day and night), and those whose
  /// order is wrong: tmin above tmax, or a day sample not warmer than the night sample.
  std::int64_t pairs = 0, inverted = 0;
  void add(const TemperatureCounts& other);
  std::int64_t total_implausible() const;
};

/// One worker's view: its readers and buffers. Values are deg C, [date][pixel].
class TemperatureBlock {
 public:
  explicit TemperatureBlock(const TemperatureSource& source);
  /// Reads dates [first, last) of every stack for `window` and counts what it finds.
  void read(const Window& window, std::size_t first, std::size_t last);
  const float* values(std::size_t stack, std::size_t date) const {
    return planes_[stack].data() + (date - first_) * pixels_;
  }
  TemperatureCounts counts;

 private:
  const TemperatureSource& source_;
  std::vector<std::unique_ptr<StackReader>> readers_;
  std::vector<std::vector<float>> planes_;
  std::size_t first_ = 0;
  std::int64_t pixels_ = 0;
};

/// After every block is read, before anything is published: InputError naming the input when
/// most of one stack's values are implausible (a wrong unit or scale factor: each stack on its
/// own, since one wrong stack of two is only half of the values), and naming both inputs when
/// more than `swapped_extremes_share` of the pairs are inverted (the inputs are swapped).
/// Fewer are left to the caller to report; they are missing (or flat) in the outputs.
void check_temperature_counts(const TemperatureSource& source, const TemperatureCounts& counts);

/// What a user should know about the input temperatures (values taken as missing, inverted
/// pairs), one line each; empty when there is nothing to say. `kalends diurnal`, `kalends
/// suitability` and a job's suitability step show the same lines.
std::vector<std::string> temperature_notes(const TemperatureSource& source, const TemperatureCounts& counts);

/// Latitude and longitude (degrees, WGS 84) of pixel centres. Owns its transformation; use
/// one per thread.
class PixelLocator {
 public:
  /// InputError naming `where` when the grid has no CRS or geotransform.
  PixelLocator(const Grid& grid, const std::string& where);
  void locate(const Window& window, std::vector<double>& latitude, std::vector<double>& longitude);

 private:
  Grid grid_;
  std::unique_ptr<OGRCoordinateTransformation> transform_;
};

/// The diurnal days of one pixel over all dates (extremes or overpasses mode), and the
/// temperature at any hour of any date.
class PixelDays {
 public:
  PixelDays(const TemperatureSource& source, const DiurnalParameters& parameters);
  /// Builds the days [first, last) of the pixel at `pixel` of `block` (latitude for the sun);
  /// other dates count as missing until built. Evaluate dates at least two inside the range
  /// (or at the ends of the series), so that their neighbours are built too.
  void build(const TemperatureBlock& block, std::int64_t pixel, double latitude, std::size_t first,
             std::size_t last);
  /// Temperature at `local_hour` (may be below 0 or past 24: the neighbouring day) of date i.
  /// A neighbouring day missing from the input (before the first date, after the last, in a
  /// gap) is taken as a copy of day i, as its own night is (docs/methods.md).
  double at(std::size_t i, double local_hour) const;
  bool has(std::size_t i) const { return std::isfinite(days_[i].tmin); }
  /// Mean of the thermal model over 24 hourly midpoints (local solar time) of date i.
  double daily_mean(std::size_t i, const ThermalModel& model) const;

 private:
  const DiurnalDay& yesterday(std::size_t i) const;
  const DiurnalDay& tomorrow(std::size_t i) const;
  const TemperatureSource& source_;
  DiurnalParameters parameters_;
  std::vector<DiurnalDay> days_;
  std::size_t built_first_ = 0, built_last_ = 0;
};

}  // namespace kalends::detail
