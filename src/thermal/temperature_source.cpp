#include "thermal/temperature_source.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cctype>
#include <cmath>
#include <iterator>
#include <tuple>

#include "io/gdal_session.hpp"
#include "kalends/error.hpp"
#include "kalends/seasons.hpp"

namespace kalends::detail {

namespace {

std::string normalised_unit(std::string unit) {
  std::string out;
  for (std::size_t i = 0; i < unit.size(); ++i) {
    const unsigned char c = static_cast<unsigned char>(unit[i]);
    if (c == 0xC2 && i + 1 < unit.size() && static_cast<unsigned char>(unit[i + 1]) == 0xB0) {
      ++i;  // the degree sign in UTF-8
      continue;
    }
    if (std::isspace(c) || c == '[' || c == ']' || c == '_' || c == '.') continue;
    out += char(std::tolower(c));
  }
  for (const char* word : {"degrees", "degree", "deg"})
    if (out.rfind(word, 0) == 0) {
      out.erase(0, std::string(word).size());
      break;
    }
  return out;
}

}  // namespace

TemperatureUnit unit_of(const Stack& stack, TemperatureUnit unit, const std::string& option) {
  if (unit != TemperatureUnit::automatic) return unit;
  const Layer& layer = stack.layers().front();
  std::string stated = layer.unit;
  if (stated.empty()) {
    // GRIB files carry the unit in their metadata, not the band's unit type.
    GDALDatasetUniquePtr dataset = open_raster(layer.path);
    if (GDALRasterBand* band = dataset->GetRasterBand(layer.band))
      if (const char* grib = band->GetMetadataItem("GRIB_UNIT")) stated = grib;
  }
  const std::string u = normalised_unit(stated);
  TemperatureUnit found = TemperatureUnit::automatic;
  if (u == "k" || u == "kelvin") found = TemperatureUnit::kelvin;
  if (u == "c" || u == "celsius") found = TemperatureUnit::celsius;
  if (found != TemperatureUnit::automatic) {
    // A stated unit must agree with the values: no temperature on Earth is above 150 in
    // degrees C or below 150 in kelvin. (GDAL 3.6 labels GRIB1 temperatures "[C]" while still
    // returning kelvin.)
    const double median = first_date_median(stack, 1024);
    const bool looks_kelvin = median > 150;
    if (std::isfinite(median) && looks_kelvin != (found == TemperatureUnit::kelvin))
      throw UsageError(option + " " + layer.path,
                       fmt::format("the file states unit '{}' but its values (median {:.1f}) look "
                                   "like {}; give --units kelvin or --units celsius",
                                   stated, median, looks_kelvin ? "kelvin" : "degrees Celsius"));
    return found;
  }
  throw UsageError(option + " " + layer.path,
                   (stated.empty() ? std::string("the file states no unit")
                                   : "unit '" + stated + "' is not kelvin or degrees Celsius") +
                       "; give --units kelvin or --units celsius (for every input: inputs in two units need "
                       "their files labelled, gdal_edit.py -units K or -units C)");
}

}  // namespace kalends::detail

namespace kalends {
TemperatureUnit parse_temperature_unit(const std::string& text) {
  if (text == "auto") return TemperatureUnit::automatic;
  if (text == "kelvin" || text == "K") return TemperatureUnit::kelvin;
  if (text == "celsius" || text == "C") return TemperatureUnit::celsius;
  throw UsageError("--units '" + text + "'", "expected auto, kelvin (K) or celsius (C)");
}
}  // namespace kalends

namespace kalends::detail {

TemperatureSource::Mode TemperatureSource::mode_of(const TemperatureInputs& in) {
  const bool extremes = !in.tmin.empty() || !in.tmax.empty();
  const bool overpasses = !in.day.empty() || !in.night.empty();
  const bool constant = !in.temperature.empty();
  if (int(extremes) + int(overpasses) + int(constant) != 1)
    throw UsageError("inputs",
                     "give either --tmin and --tmax, or --day and --night, or --temperature");
  if (extremes) {
    if (in.tmin.empty() || in.tmax.empty()) throw UsageError("--tmin/--tmax", "give both");
    return Mode::extremes;
  }
  if (overpasses) {
    if (in.day.empty() || in.night.empty()) throw UsageError("--day/--night", "give both");
    if (!(in.day_hour >= 0 && in.day_hour < 24 && in.night_hour >= 0 && in.night_hour < 24))
      throw UsageError("--day-time/--night-time", "local solar hours must lie in [0, 24)");
    // Two samples at one hour cannot tell the day's minimum from its maximum.
    if (in.day_hour == in.night_hour)
      throw UsageError("--day-time/--night-time", "the two overpasses must be at different hours");
    // The day overpass must sample the warm part of the Parton-Logan curve and the night one
    // the cool part: swapped or both near noon, every pixel had taken the mean of the two as a
    // flat day without a word. Judged at an equinox (sunrise 6 h, sunset 18 h) with the default
    // parameters; a fifth of the daily range is common practice, not a published bound (Terra's
    // 10:30 and 22:30 keep about half of it, Aqua's 13:30 and 01:30 nearly all).
    const SunTimes equinox{};
    const DiurnalParameters shape{};
    const double apart = diurnal_shape(shape, equinox, in.day_hour) - diurnal_shape(shape, equinox, in.night_hour);
    if (apart < 0.2)
      throw UsageError(fmt::format("--day-time {:g} --night-time {:g}", in.day_hour, in.night_hour),
                       fmt::format("the day overpass must be the warm one: at these hours it samples {:.0f} % of the "
                                   "daily range above the night one (at least 20 % needed; Aqua is 13.5 and 1.5)",
                                   100 * apart));
    return Mode::overpasses;
  }
  return Mode::constant;
}

namespace {

// A file of kalends diurnal holds one date's 24 hours as bands: read as a daily temperature,
// band 1 (00 h UTC) alone had been taken for the whole day.
void require_not_hourly(const Stack& stack, const std::string& option) {
  const Layer& first = stack.layers().front();
  GDALDatasetUniquePtr dataset = detail::open_raster(first.path);
  if (dataset->GetMetadataItem("KALENDS_HOURS") != nullptr && dataset->GetRasterCount() == 24)
    throw UsageError(option + " " + first.path,
                     "holds 24 hourly bands (kalends diurnal output), not a daily temperature; give the daily "
                     "inputs it was made from (--tmin/--tmax or --day/--night), from which the same hours are made");
}

}  // namespace

TemperatureSource TemperatureSource::open(const TemperatureInputs& in) {
  TemperatureSource s;
  s.mode = mode_of(in);
  std::vector<std::pair<std::string, std::string>> inputs;  // option, input
  if (s.mode == Mode::extremes) {
    inputs = {{"--tmin", in.tmin}, {"--tmax", in.tmax}};
  } else if (s.mode == Mode::overpasses) {
    s.day_hour = in.day_hour;
    s.night_hour = in.night_hour;
    inputs = {{"--day", in.day}, {"--night", in.night}};
  } else {
    inputs = {{"--temperature", in.temperature}};
  }
  for (const auto& [option, input] : inputs) {
    const auto own = in.rules_of.find(option.substr(2));  // "--day" -> "day"
    s.stacks.push_back(Stack::open(stack_input(input), own != in.rules_of.end() ? own->second : in.rules));
    if (detail::is_flag_band(s.stacks.back().layers().front().path, s.stacks.back().layers().front().band))
      throw UsageError("--band " + std::to_string(s.stacks.back().rules().band), "is the flag band of the fill outputs in '" + input +
                                       "' (codes 0-3, not temperatures): band 1 holds the values");
    require_not_hourly(s.stacks.back(), option);
    const TemperatureUnit unit = unit_of(s.stacks.back(), in.unit, option);
    s.to_celsius.push_back(unit == TemperatureUnit::kelvin ? -273.15 : 0.0);
  }
  s.grid = s.stacks.front().grid();
  s.times = s.stacks.front().times();
  for (std::size_t k = 1; k < s.stacks.size(); ++k) {
    const Stack& other = s.stacks[k];
    require_same_grid(s.grid, other.grid(), inputs[k].first + " " + other.input(),
                      inputs.front().first + " " + s.stacks.front().input());
    // Dates of one input without the other's (a composite that arrived before its partner, or
    // one a --skip-bad run left out) are left out with a note; a pairing that matches under half
    // of either input's dates is taken for a mistake (inputs of different calendars).
    const std::vector<TimePoint> times = other.times();
    std::vector<TimePoint> common;
    std::set_intersection(s.times.begin(), s.times.end(), times.begin(), times.end(), std::back_inserter(common));
    auto refuse = [&](const Stack& lacking, const std::vector<TimePoint>& having, const Stack& has) {
      for (const TimePoint& t : having)
        if (!std::binary_search(common.begin(), common.end(), t))
          throw InputError(lacking.input(), "has no layer for " + t.label() + ", which " + has.input() +
                                                " has (" + std::to_string(common.size()) + " of their dates pair)");
    };
    if (2 * common.size() < s.times.size()) refuse(other, s.times, s.stacks.front());
    if (2 * common.size() < times.size()) refuse(s.stacks.front(), times, other);
    for (const auto& [having, option, lacking_option] :
         {std::tuple{static_cast<const std::vector<TimePoint>*>(&s.times), inputs.front().first, inputs[k].first},
          std::tuple{&times, inputs[k].first, inputs.front().first}}) {
      std::vector<std::string> alone;
      for (const TimePoint& t : *having)
        if (!std::binary_search(common.begin(), common.end(), t)) alone.push_back(t.label());
      if (!alone.empty())
        s.unpaired.push_back(fmt::format("{} date{} of {} without {} left out: {}{}", alone.size(),
                                         alone.size() == 1 ? "" : "s", option, lacking_option, alone.front(),
                                         alone.size() > 1 ? fmt::format(" (and {} more)", alone.size() - 1) : ""));
    }
    if (common.size() < s.times.size() || common.size() < times.size()) {
      for (Stack& stack : s.stacks) stack = stack.only_times(common);
      s.times = common;
    }
  }
  s.name = s.stacks.front().name();
  const std::size_t n = s.times.size();
  s.days.resize(n);
  for (std::size_t i = 0; i < n; ++i) s.days[i] = std::int64_t(std::floor(s.times[i].days()));
  for (std::size_t i = 1; i < n; ++i)
    if (s.days[i] == s.days[i - 1]) s.sub_daily = true;
  const std::int64_t step = s.sub_daily ? 1 : median_spacing(s.days, 1);
  // The sun of a composite is that of the middle of the days it stands for.
  const DateMarks marks = resolve_date_marks(in.marks, s.times);
  const std::int64_t shift = marks == DateMarks::start ? step / 2
                             : marks == DateMarks::end ? -(step / 2)
                                                          : 0;
  s.day_of_year.resize(n);
  s.adjacent_before.assign(n, 0);
  for (std::size_t i = 0; i < n; ++i) {
    s.day_of_year[i] = kalends::day_of_year(civil_from_days(s.days[i] + shift));
    if (i > 0 && s.days[i] - s.days[i - 1] == 1) s.adjacent_before[i] = 1;
  }
  return s;
}

void TemperatureCounts::add(const TemperatureCounts& other) {
  implausible.resize(std::max(implausible.size(), other.implausible.size()), 0);
  finite.resize(implausible.size(), 0);
  for (std::size_t k = 0; k < other.implausible.size(); ++k)
    implausible[k] += other.implausible[k], finite[k] += other.finite[k];
  date_ranges.resize(std::max(date_ranges.size(), other.date_ranges.size()));
  for (std::size_t k = 0; k < other.date_ranges.size(); ++k) {
    date_ranges[k].resize(std::max(date_ranges[k].size(), other.date_ranges[k].size()), 0);
    for (std::size_t i = 0; i < other.date_ranges[k].size(); ++i) date_ranges[k][i] |= other.date_ranges[k][i];
  }
  pairs += other.pairs;
  inverted += other.inverted;
}

std::int64_t TemperatureCounts::total_implausible() const {
  std::int64_t sum = 0;
  for (std::int64_t n : implausible) sum += n;
  return sum;
}

TemperatureBlock::TemperatureBlock(const TemperatureSource& source) : source_(source) {
  for (const Stack& stack : source.stacks) readers_.push_back(stack.reader());
  planes_.resize(source.stacks.size());
  counts.implausible.assign(source.stacks.size(), 0);
  counts.finite.assign(source.stacks.size(), 0);
  counts.date_ranges.assign(source.stacks.size(), std::vector<std::uint8_t>(source.dates(), 0));
}

void TemperatureBlock::read(const Window& window, std::size_t first, std::size_t last) {
  first_ = first;
  pixels_ = window.pixels();
  for (std::size_t k = 0; k < readers_.size(); ++k) {
    std::vector<float>& plane = planes_[k];
    plane.resize((last - first) * pixels_);
    const double offset = source_.to_celsius[k];
    for (std::size_t i = first; i < last; ++i) {
      float* out = plane.data() + (i - first) * pixels_;
      const std::int64_t outside_valid_range = readers_[k]->read_values(i, window, out);
      std::int64_t outside = 0, inside = 0;
      for (std::int64_t p = 0; p < pixels_; ++p) {
        if (!std::isfinite(out[p])) continue;
        const double c = double(out[p]) + offset;
        if (c < plausible_low_celsius || c > plausible_high_celsius) {
          out[p] = NAN;
          ++outside;
        } else {
          out[p] = float(c);
          ++inside;
        }
      }
      counts.implausible[k] += outside;
      counts.finite[k] += inside;
      counts.date_ranges[k][i] |=
          std::uint8_t((outside > 0 ? 1 : 0) | (inside > 0 ? 2 : 0) | (outside_valid_range > 0 ? 4 : 0));
    }
  }
  if (source_.mode == TemperatureSource::Mode::constant) return;
  const bool extremes = source_.mode == TemperatureSource::Mode::extremes;
  const std::size_t values = (last - first) * std::size_t(pixels_);
  for (std::size_t v = 0; v < values; ++v) {
    const float a = planes_[0][v], b = planes_[1][v];  // tmin, tmax | day, night
    if (!std::isfinite(a) || !std::isfinite(b)) continue;
    ++counts.pairs;
    if (extremes ? a > b : a <= b) ++counts.inverted;
  }
}

void check_temperature_counts(const TemperatureSource& source, const TemperatureCounts& counts) {
  static const char* const options[3][2] = {{"--tmin", "--tmax"}, {"--day", "--night"}, {"--temperature", ""}};
  const int mode = int(source.mode);
  for (std::size_t k = 0; k < counts.implausible.size(); ++k)
    if (counts.implausible[k] > counts.finite[k])
      throw InputError(
          std::string(options[mode][k]) + " " + source.stacks[k].input(),
          fmt::format("{} of {} values lie outside {:g}..{:g} deg C after unit conversion: the unit "
                      "(--units) or scale factor (--scale) is probably wrong",
                      counts.implausible[k], counts.implausible[k] + counts.finite[k],
                      plausible_low_celsius, plausible_high_celsius));
  // One date of a sound input with every value out of range (a file without the scale factor
  // the others state) had gone missing among the counted values.
  // As for a fill: a date whose every value the valid range took out (a wrong range or scale).
  for (std::size_t k = 0; k < counts.date_ranges.size(); ++k)
    for (std::size_t i = 0; i < counts.date_ranges[k].size(); ++i)
      if (counts.date_ranges[k][i] == 4) {
        const ValueRules& rules = source.stacks[k].rules();
        throw InputError(source.stacks[k].layers()[i].path,
                         fmt::format("every value is outside the valid range {:g} to {:g} (wrong scale factor or range?)",
                                     rules.valid_min.value_or(-INFINITY), rules.valid_max.value_or(INFINITY)));
      }
  for (std::size_t k = 0; k < counts.date_ranges.size(); ++k)
    for (std::size_t i = 0; i < counts.date_ranges[k].size(); ++i)
      if ((counts.date_ranges[k][i] & 3) == 1)
        throw InputError(source.stacks[k].layers()[i].path,
                         fmt::format("every value lies outside {:g}..{:g} deg C after unit conversion, unlike the "
                                     "input's other dates: this file's unit or scale factor is probably wrong",
                                     plausible_low_celsius, plausible_high_celsius));
  if (counts.pairs == 0 || double(counts.inverted) <= swapped_extremes_share * double(counts.pairs))
    return;
  const std::string inputs = fmt::format("{} {}, {} {}", options[mode][0], source.stacks[0].input(),
                                         options[mode][1], source.stacks[1].input());
  const double percent = 100.0 * double(counts.inverted) / double(counts.pairs);
  if (source.mode == TemperatureSource::Mode::extremes)
    throw InputError(inputs, fmt::format("tmin is above tmax on {:.0f} % of pixel-days ({} of {}): are "
                                         "--tmin and --tmax swapped?",
                                         percent, counts.inverted, counts.pairs));
  throw InputError(inputs, fmt::format("the day sample is not warmer than the night sample on {:.0f} % of "
                                       "pixel-days ({} of {}): are --day and --night swapped?",
                                       percent, counts.inverted, counts.pairs));
}

std::vector<std::string> temperature_notes(const TemperatureSource& source, const TemperatureCounts& counts) {
  std::vector<std::string> notes = source.unpaired;
  if (const std::int64_t implausible = counts.total_implausible(); implausible > 0)
    notes.push_back(fmt::format("{} values outside {:g}..{:g} deg C were taken as missing", implausible,
                                plausible_low_celsius, plausible_high_celsius));
  if (counts.inverted > 0 && source.mode == TemperatureSource::Mode::extremes)
    notes.push_back(fmt::format("{} pixel-day(s) with tmin above tmax were taken as missing", counts.inverted));
  if (counts.inverted > 0 && source.mode == TemperatureSource::Mode::overpasses)
    notes.push_back(fmt::format("{} pixel-day(s) with the day sample not warmer than the night sample were "
                                "taken as flat at their mean",
                                counts.inverted));
  return notes;
}

PixelLocator::PixelLocator(const Grid& grid, const std::string& where) : grid_(grid) {
  if (!grid.has_geotransform || grid.crs_wkt.empty())
    throw InputError(where,
                     "has no georeferencing (geotransform and CRS); the diurnal cycle needs "
                     "each pixel's latitude and longitude");
  OGRSpatialReference source, target;
  if (source.importFromWkt(grid.crs_wkt.c_str()) != OGRERR_NONE)
    throw InputError(where, "its coordinate reference system cannot be read");
  target.importFromEPSG(4326);
  source.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
  target.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
  transform_.reset(OGRCreateCoordinateTransformation(&source, &target));
  if (!transform_)
    throw InputError(where, "its coordinates cannot be transformed to latitude and longitude");
}

void PixelLocator::locate(const Window& window, std::vector<double>& latitude,
                          std::vector<double>& longitude) {
  const auto& g = grid_.geotransform;
  const std::int64_t n = window.pixels();
  longitude.resize(n);
  latitude.resize(n);
  for (int r = 0; r < window.height; ++r)
    for (int c = 0; c < window.width; ++c) {
      const double col = window.x + c + 0.5, row = window.y + r + 0.5;
      longitude[std::size_t(r) * window.width + c] = g[0] + col * g[1] + row * g[2];
      latitude[std::size_t(r) * window.width + c] = g[3] + col * g[4] + row * g[5];
    }
  std::vector<int> ok(n, 0);
  if (!transform_->Transform(int(n), longitude.data(), latitude.data(), nullptr, ok.data()) ||
      std::find(ok.begin(), ok.end(), 0) != ok.end())
    throw InputError("georeferencing",
                     "some pixel centres cannot be transformed to latitude and longitude");
  for (double& lon : longitude) lon = std::remainder(lon, 360.0);  // [-180, 180]
}

PixelDays::PixelDays(const TemperatureSource& source, const DiurnalParameters& parameters)
    : source_(source), parameters_(parameters), days_(source.dates(), DiurnalDay{NAN, NAN, {}}) {}

void PixelDays::build(const TemperatureBlock& block, std::int64_t pixel, double latitude,
                      std::size_t first, std::size_t last) {
  const bool overpasses = source_.mode == TemperatureSource::Mode::overpasses;
  for (std::size_t i = built_first_; i < built_last_; ++i) days_[i].tmin = days_[i].tmax = NAN;
  last = std::min(last, days_.size());
  built_first_ = first;
  built_last_ = last;
  for (std::size_t i = first; i < last; ++i) {
    const SunTimes sun = sun_times(latitude, source_.day_of_year[i]);
    const double a = block.values(0, i)[pixel], b = block.values(1, i)[pixel];
    if (overpasses) {
      days_[i] =
          extremes_from_samples(parameters_, sun, a, source_.day_hour, b, source_.night_hour);
    } else if (std::isfinite(a) && std::isfinite(b) && a <= b) {
      days_[i] = {a, b, sun};
    } else {
      days_[i] = {NAN, NAN, sun};
    }
  }
}

const DiurnalDay& PixelDays::yesterday(std::size_t i) const {
  if (source_.mode == TemperatureSource::Mode::extremes && source_.adjacent_before[i] && has(i - 1))
    return days_[i - 1];
  return days_[i];
}

const DiurnalDay& PixelDays::tomorrow(std::size_t i) const {
  if (source_.mode == TemperatureSource::Mode::extremes && i + 1 < days_.size() &&
      source_.adjacent_before[i + 1] && has(i + 1))
    return days_[i + 1];
  return days_[i];
}

double PixelDays::at(std::size_t i, double local_hour) const {
  if (!has(i)) return NAN;
  const DiurnalDay& today = days_[i];
  if (local_hour < 0) {
    if (&yesterday(i) != &today)
      return diurnal_temperature(parameters_, yesterday(i - 1), days_[i - 1], today,
                                 local_hour + 24);
    // No previous day (first date, gap): it is taken as a copy of today, so its evening
    // falls from today's own sunset value to today's minimum, as today's own morning does.
    // Today's evening instead would decay toward tomorrow's minimum and jump at dawn.
    return diurnal_temperature(parameters_, today, today, today, local_hour + 24);
  }
  if (local_hour >= 24) {
    if (&tomorrow(i) != &today)
      return diurnal_temperature(parameters_, today, days_[i + 1], tomorrow(i + 1),
                                 local_hour - 24);
    // No next day (last date, gap): a copy of today, its morning the night after today's
    // sunset, not the night before today.
    return diurnal_temperature(parameters_, today, today, today, local_hour - 24);
  }
  return diurnal_temperature(parameters_, yesterday(i), today, tomorrow(i), local_hour);
}

double PixelDays::daily_mean(std::size_t i, const ThermalModel& model) const {
  if (!has(i)) return NAN;
  double sum = 0;
  for (int h = 0; h < 24; ++h)
    sum += model.relative(
        diurnal_temperature(parameters_, yesterday(i), days_[i], tomorrow(i), h + 0.5));
  return sum / 24;
}

}  // namespace kalends::detail
