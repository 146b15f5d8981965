// The diurnal temperature cycle of Parton, W.J. & Logan, J.A. (1981), A model for diurnal
// variation in soil and air temperature, Agric. Meteorol. 23:205-216: a sine from the daily
// minimum (c hours after sunrise) through the maximum (its half period Y/2 + a hours later)
// to sunset, then an exponential decay through the night toward the next day's minimum.
//
// Choices where implementations differ (docs/methods.md, "Diurnal temperature"):
// - the night lasts N hours, from sunset to the NEXT minimum (next sunrise + c), and N is the
//   decay's denominator: T = Tmin' + (Ts - Tmin') (exp(-b n/N) - exp(-b)) / (1 - exp(-b)).
//   The normalisation makes the decay end exactly at the next minimum, so the curve is
//   continuous at dawn and needs no smoothing. The plain form Tmin' + (Ts - Tmin') exp(-b n/Z)
//   (Z = 24 - Y) ends (Ts - Tmin') exp(-b) above the minimum and jumps at dawn; on ERA5 2 m
//   temperature (March 2019) it fits the hours a little better with the published a, b, c
//   (RMSE 1.01 against 1.08 K) but parameters fitted on the first half of the month made the
//   second half worse (0.91 -> 0.93..0.95 K), while for this form they improve it
//   (0.97 -> 0.93 K). Measured in tests/integration/test_diurnal_era5.py and docs/methods.md.
// - sunrise and sunset are geometric (sun centre on the horizon, no refraction) in local mean
//   solar time (UTC + longitude / 15 h; the equation of time, at most about 16 minutes, is
//   ignored).
#include <algorithm>
#include <cmath>
#include <numbers>

#include "kalends/thermal.hpp"

namespace kalends {

namespace {

double day_curve(const DiurnalParameters& p, const DiurnalDay& day, double t) {
  const double minimum_time = day.sun.sunrise + p.c;
  return day.tmin + (day.tmax - day.tmin) * std::sin(std::numbers::pi * (t - minimum_time) /
                                                     (day.sun.day_length + 2 * p.a));
}

// From `sunset_value` at n = 0 to `next_minimum` at n = night_hours.
double night_curve(const DiurnalParameters& p, double sunset_value, double next_minimum, double n,
                   double night_hours) {
  const double x = n / night_hours;
  if (std::abs(p.b) < 1e-9) return next_minimum + (sunset_value - next_minimum) * (1 - x);
  const double floor = std::exp(-p.b);
  return next_minimum + (sunset_value - next_minimum) * (std::exp(-p.b * x) - floor) / (1 - floor);
}

}  // namespace

SunTimes sun_times(double latitude_deg, int day_of_year) {
  constexpr double degree = std::numbers::pi / 180;
  // Cooper, P.I. (1969), Solar Energy 12:333: declination 23.45 deg sin(360 (284 + n) / 365).
  const double declination =
      23.45 * degree * std::sin(2 * std::numbers::pi * (284 + day_of_year) / 365.0);
  const double latitude = std::clamp(latitude_deg, -89.9, 89.9) * degree;
  const double cos_hour_angle = std::clamp(-std::tan(latitude) * std::tan(declination), -1.0, 1.0);
  const double day_length =
      std::clamp(24.0 / std::numbers::pi * std::acos(cos_hour_angle), 1.0, 23.0);
  return {12.0 - day_length / 2, 12.0 + day_length / 2, day_length};
}

double diurnal_temperature(const DiurnalParameters& p, const DiurnalDay& yesterday,
                           const DiurnalDay& today, const DiurnalDay& tomorrow, double t) {
  const double minimum_time = today.sun.sunrise + p.c;
  if (t < minimum_time) {
    // Last night: from yesterday's sunset (yesterday.sunset - 24 h on today's clock).
    const double sunset = yesterday.sun.sunset - 24;
    return night_curve(p, day_curve(p, yesterday, yesterday.sun.sunset), today.tmin, t - sunset,
                       minimum_time - sunset);
  }
  if (t <= today.sun.sunset) return day_curve(p, today, t);
  const double next_minimum_time = tomorrow.sun.sunrise + p.c + 24;
  return night_curve(p, day_curve(p, today, today.sun.sunset), tomorrow.tmin, t - today.sun.sunset,
                     next_minimum_time - today.sun.sunset);
}

double diurnal_shape(const DiurnalParameters& p, const SunTimes& sun, double local_hour) {
  const DiurnalDay unit{0.0, 1.0, sun};
  return diurnal_temperature(p, unit, unit, unit, local_hour);
}

DiurnalDay extremes_from_samples(const DiurnalParameters& p, const SunTimes& sun, double day_value,
                                 double day_hour, double night_value, double night_hour) {
  DiurnalDay day{NAN, NAN, sun};
  if (!std::isfinite(day_value) || !std::isfinite(night_value)) return day;
  const double at_day = diurnal_shape(p, sun, day_hour),
               at_night = diurnal_shape(p, sun, night_hour);
  if (day_value > night_value && at_day > at_night) {
    const double range = (day_value - night_value) / (at_day - at_night);
    day.tmin = night_value - range * at_night;
    day.tmax = day.tmin + range;
  } else {
    day.tmin = day.tmax = (day_value + night_value) / 2;
  }
  return day;
}

}  // namespace kalends
