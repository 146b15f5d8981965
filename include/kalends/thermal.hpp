// Temperature kernels: the diurnal cycle of Parton & Logan (1981) and published thermal-response
// models of malaria transmission, with their parameter table. They know nothing of files;
// run_diurnal and run_suitability (suitability.hpp) apply them to stacks.
//
// A temperature-suitability index describes temperature alone. It is not malaria risk,
// incidence or a case forecast (see the README's cautions).
#pragma once

#include <cmath>
#include <string>
#include <string_view>
#include <vector>

namespace kalends {

// ------------------------------------------------------------------------------- parameters

/// One documented parameter of the thermal models: where it is used, its values, what they
/// mean and where they come from.
struct ThermalParameter {
  std::string section;  // "diurnal", "r0-2013", "degree-day", "window"
  std::string key;
  std::vector<double> values;
  std::string meaning;
  std::string source;
};

/// The parameter table. `defaults()` is the one documented table (src/thermal/thermal_models.cpp);
/// a TOML file may override any entry (same section and key, same number of values).
class ThermalParameters {
 public:
  static ThermalParameters defaults();

  /// Overrides entries from a TOML file: `[section]` tables of `key = number` or
  /// `key = [numbers]`. Unknown sections or keys, wrong value counts, diurnal a, b, c outside
  /// their ranges and window limits not in order raise InputError naming the file and the
  /// key; nothing is changed then.
  void override_from_file(const std::string& path);

  const std::vector<double>& values(std::string_view section, std::string_view key) const;
  double value(std::string_view section, std::string_view key) const {
    return values(section, key).at(0);
  }
  /// Replaces one entry's values (same count) and its source.
  void set(std::string_view section, std::string_view key, std::vector<double> values,
           std::string source);
  const std::vector<ThermalParameter>& entries() const noexcept { return entries_; }

  /// The entries of `section` as TOML that override_from_file reads back, sources as comments.
  std::string to_toml(std::string_view section) const;

 private:
  ThermalParameter& find(std::string_view section, std::string_view key);
  const ThermalParameter& find(std::string_view section, std::string_view key) const;
  std::vector<ThermalParameter> entries_;
};

// ---------------------------------------------------------------------------------- diurnal

/// Sunrise and sunset in local mean solar time (hours after local midnight) and the day length.
struct SunTimes {
  double sunrise = 6, sunset = 18, day_length = 12;
};

/// Geometric sunrise and sunset (sun centre on the horizon) from latitude and day of year:
/// declination of Cooper (1969), day length Y = (2/15) arccos(-tan(lat) tan(decl)) hours.
/// Beyond the polar circles Y is held between 1 and 23 hours so a day and a night always exist.
SunTimes sun_times(double latitude_deg, int day_of_year);

/// Parameters of Parton & Logan (1981): `a` lag of the maximum after solar noon (h), `b`
/// night-time decay coefficient, `c` lag of the minimum after sunrise (h).
struct DiurnalParameters {
  double a = 1.86, b = 2.20, c = -0.17;
  static DiurnalParameters from(const ThermalParameters& table);
};

/// The range of one diurnal parameter: where --calibrate searches, and all a parameter file
/// may set. Outside them the curve stops being a day and a night: a < 0 shortens the sine's
/// half period Y + 2a, so the day oscillates; b < 0 turns the night's decay into a late
/// plunge toward dawn.
struct ParameterRange {
  double low, high;
  bool contains(double v) const { return v >= low && v <= high; }
};
inline constexpr ParameterRange diurnal_a_range{0.0, 6.0}, diurnal_b_range{0.01, 20.0},
    diurnal_c_range{-3.0, 3.0};

/// One local solar day: its extremes and its sun.
struct DiurnalDay {
  double tmin = 0, tmax = 0;
  SunTimes sun;
};

/// Temperature at `local_hour` (0..24, local mean solar time) of `today`, with the previous
/// night coming from `yesterday` and the coming night decaying toward `tomorrow`'s minimum.
///   day   (minimum time tn = sunrise + c up to sunset):
///           T = Tmin + (Tmax - Tmin) sin(pi (t - tn) / (Y + 2a))
///   night (sunset to the next minimum time, lasting N hours, n hours into it):
///           T = Tmin' + (Ts - Tmin') (exp(-b n / N) - exp(-b)) / (1 - exp(-b))
/// where Ts is the day curve at sunset and Tmin' the next day's minimum. Our choices: the
/// night's denominator is N, the whole time from sunset to the next minimum, and the decay is
/// normalised so that it reaches Tmin' exactly there: the curve is continuous at dawn.
double diurnal_temperature(const DiurnalParameters& p, const DiurnalDay& yesterday,
                           const DiurnalDay& today, const DiurnalDay& tomorrow, double local_hour);

/// The share of the day's range reached at `local_hour` when every day is the same
/// (Tmin = 0, Tmax = 1): T(t) = Tmin + (Tmax - Tmin) shape(t).
double diurnal_shape(const DiurnalParameters& p, const SunTimes& sun, double local_hour);

/// Daily extremes from two samples of one day (a day and a night overpass at their local
/// solar times), assuming the neighbouring days are the same (a composite's typical day):
/// range = (Tday - Tnight) / (shape(day) - shape(night)), Tmin = Tnight - range shape(night).
/// Where the day sample is not warmer than the night sample the day is flat at their mean.
DiurnalDay extremes_from_samples(const DiurnalParameters& p, const SunTimes& sun, double day_value,
                                 double day_hour, double night_value, double night_hour);

// ---------------------------------------------------------------------------- thermal models

enum class ThermalModelKind { r0_2013, degree_day, window };
enum class Parasite { falciparum, vivax };

/// A thermal-response model: temperature (deg C) -> relative suitability 0..1. Immutable;
/// `relative` may be called from any thread.
class ThermalModel {
 public:
  /// `window_low`/`window_high` override the table's window limits when finite.
  ThermalModel(ThermalModelKind kind, Parasite parasite, const ThermalParameters& table,
               double window_low = NAN, double window_high = NAN);

  ThermalModelKind kind() const noexcept { return kind_; }
  /// Relative suitability at `celsius`: 0..1, 1 at the model's optimum.
  double relative(double celsius) const;
  /// The temperature of the maximum (deg C) and the unscaled maximum.
  double optimum() const noexcept { return optimum_; }
  /// A short name for outputs: "r0-2013", "degree-day-falciparum", "window".
  std::string tag() const;
  /// One line describing the model and its parameters (for metadata). `of_hours`: the model is
  /// applied to hours made from daily extremes or overpasses, else to temperatures as given.
  std::string description(bool of_hours = true) const;

  // Pieces, for the reference checks.
  /// Unscaled R0 of Mordecai et al. (2013) (0 where any trait is 0).
  double r0_unscaled(double celsius) const;
  /// Extrinsic incubation period in days (infinite at or below the threshold).
  double incubation_days(double celsius) const;
  /// Martens (1997) daily survival probability (0 where the lifespan term is not positive).
  double daily_survival(double celsius) const;
  /// p^n of the degree-day model, unscaled.
  double degree_day_unscaled(double celsius) const;

 private:
  ThermalModelKind kind_;
  Parasite parasite_;
  // r0-2013 traits: Brière (c, T0, Tm) or quadratic (q2, q1, q0).
  std::vector<double> biting_, competence_, survival_, pdr_, eggs_, egg_adult_, mdr_;
  double degree_days_ = 0, threshold_ = 0;
  std::vector<double> lifespan_;  // Martens: L(T) = l0 + l1 T + l2 T^2 days
  double low_ = 0, high_ = 0;
  double optimum_ = NAN, maximum_ = 1;
};

ThermalModelKind parse_model_kind(const std::string& text);  // UsageError naming --model
Parasite parse_parasite(const std::string& text);            // UsageError naming --parasite

/// The number of periods above `threshold`, the longest run of consecutive such periods
/// (wrapping over the end of the series when `cyclic`) and the mean. NaN in, NaN out.
struct SuitableRun {
  double count = NAN, longest = NAN, mean = NAN;
};
SuitableRun suitable_runs(const double* values, int n, double threshold, bool cyclic);

}  // namespace kalends
