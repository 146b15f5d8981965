// The parameter table of the thermal models, the models themselves and the run counts of
// suitable periods.
//
// r0-2013: relative R0(T) of Mordecai, E.A. et al. (2013), Optimal temperature for malaria
//   transmission is dramatically lower than previously predicted, Ecol. Lett. 16:22-30,
//   doi:10.1111/ele.12015, for Anopheles gambiae / Plasmodium falciparum:
//     R0 = sqrt(a^2 bc exp(-mu/PDR) EFD pEA MDR / mu^3)   (constants dropped), mu = -ln p,
//   with Briere fits B(T) = c T (T - T0) sqrt(Tm - T) on (T0, Tm), 0 elsewhere, and quadratic
//   fits with negative values set to 0. Every trait is set to 0 outside its range BEFORE the
//   product: between 14.7 and 15.3 deg C two quadratics are both negative and their product
//   would otherwise be positive. Scaled to 1 at its maximum (found numerically).
// degree-day: extrinsic incubation n = DD / (T - Tmin) days (Detinova 1962; Macdonald 1957),
//   daily survival p = exp(-1 / (l0 + l1 T + l2 T^2)) (Martens 1997), index p^n, scaled to 1
//   at its maximum over temperature.
// window: 1 inside [low, high] deg C, 0 outside (Bayoh & Lindsay 2003); its hourly mean is the
//   share of hours inside the range.
#include <fmt/format.h>
#include <toml++/toml.h>

#include <algorithm>
#include <filesystem>
#include <cmath>
#include <utility>

#include "kalends/error.hpp"
#include "kalends/thermal.hpp"

namespace kalends {

namespace {

constexpr const char* parton_logan =
    "Parton, W.J. & Logan, J.A. (1981), Agric. Meteorol. 23:205-216, Table 1 (air at 150 cm)";
constexpr const char* mordecai =
    "Mordecai, E.A. et al. (2013), Ecol. Lett. 16:22-30, doi:10.1111/ele.12015 (trait fits)";
constexpr const char* detinova_macdonald =
    "Detinova, T.S. (1962), WHO Monogr. Ser. 47; Macdonald, G. (1957), The epidemiology and "
    "control of malaria, Oxford University Press";
constexpr const char* martens =
    "Martens, W.J.M. (1997), Health impacts of climate change and ozone depletion, PhD thesis, "
    "Maastricht University (as used widely since; thesis details from memory)";
constexpr const char* bayoh_lindsay =
    "Bayoh, M.N. & Lindsay, S.W. (2003), Bull. Entomol. Res. 93:375-381 (adult emergence of "
    "An. gambiae s.s. larvae)";

// THE parameter table. Every model reads its numbers from here (or from a file overriding it).
std::vector<ThermalParameter> default_table() {
  return {
      {"diurnal", "a", {1.86}, "lag of the maximum after solar noon, hours", parton_logan},
      {"diurnal", "b", {2.20}, "night-time decay coefficient", parton_logan},
      {"diurnal", "c", {-0.17}, "lag of the minimum after sunrise, hours", parton_logan},
      {"r0-2013", "biting_rate", {2.03e-4, 11.7, 42.3}, "a: Briere c, T0, Tm (per day)", mordecai},
      {"r0-2013", "vector_competence", {-0.54, 25.2, -206}, "bc: quadratic q2, q1, q0", mordecai},
      {"r0-2013",
       "daily_survival",
       {-0.000828, 0.0367, 0.522},
       "p: quadratic q2, q1, q0",
       mordecai},
      {"r0-2013",
       "parasite_development_rate",
       {1.11e-4, 14.7, 34.4},
       "PDR: Briere c, T0, Tm (per day)",
       mordecai},
      {"r0-2013",
       "eggs_per_female_per_day",
       {-0.153, 8.61, -97.7},
       "EFD: quadratic q2, q1, q0",
       mordecai},
      {"r0-2013",
       "egg_to_adult_survival",
       {-0.00924, 0.453, -4.77},
       "pEA: quadratic q2, q1, q0",
       mordecai},
      {"r0-2013",
       "mosquito_development_rate",
       {1.11e-4, 14.7, 34.0},
       "MDR: Briere c, T0, Tm (per day)",
       mordecai},
      {"degree-day",
       "falciparum",
       {111, 16},
       "P. falciparum: degree-days of sporogony, threshold deg C",
       detinova_macdonald},
      {"degree-day",
       "vivax",
       {105, 14.5},
       "P. vivax: degree-days of sporogony, threshold deg C",
       detinova_macdonald},
      {"degree-day",
       "lifespan",
       {-4.4, 1.31, -0.03},
       "daily survival p = exp(-1/L), L = l0 + l1 T + l2 T^2 days",
       martens},
      {"window", "limits", {18, 34}, "low and high limits, deg C", bayoh_lindsay},
  };
}

double briere(const std::vector<double>& f, double t) {
  const double c = f[0], t0 = f[1], tm = f[2];
  return t > t0 && t < tm ? c * t * (t - t0) * std::sqrt(tm - t) : 0.0;
}

double quadratic(const std::vector<double>& f, double t) {
  return std::max(0.0, (f[0] * t + f[1]) * t + f[2]);
}

// The maximum of f on [lo, hi]: a scan at 0.01 then golden-section search around the best.
std::pair<double, double> maximise(const auto& f, double lo, double hi) {
  const double step = 0.01;
  double best_t = lo, best = f(lo);
  for (double t = lo; t <= hi; t += step)
    if (const double v = f(t); v > best) best = v, best_t = t;
  if (!(best > 0)) return {NAN, 0.0};
  const double g = (std::sqrt(5.0) - 1) / 2;
  double a = best_t - step, b = best_t + step;
  double x1 = b - g * (b - a), x2 = a + g * (b - a), f1 = f(x1), f2 = f(x2);
  for (int i = 0; i < 100 && b - a > 1e-12; ++i) {
    if (f1 < f2)
      a = x1, x1 = x2, f1 = f2, x2 = a + g * (b - a), f2 = f(x2);
    else
      b = x2, x2 = x1, f2 = f1, x1 = b - g * (b - a), f1 = f(x1);
  }
  const double t = (a + b) / 2;
  return {t, std::max({f(t), f1, f2, best})};
}

}  // namespace

// --------------------------------------------------------------------------------- table

ThermalParameters ThermalParameters::defaults() {
  ThermalParameters p;
  p.entries_ = default_table();
  return p;
}

const ThermalParameter& ThermalParameters::find(std::string_view section,
                                                std::string_view key) const {
  for (const ThermalParameter& e : entries_)
    if (e.section == section && e.key == key) return e;
  throw UsageError(std::string(section) + "." + std::string(key), "no such thermal parameter");
}

ThermalParameter& ThermalParameters::find(std::string_view section, std::string_view key) {
  return const_cast<ThermalParameter&>(std::as_const(*this).find(section, key));
}

const std::vector<double>& ThermalParameters::values(std::string_view section,
                                                     std::string_view key) const {
  return find(section, key).values;
}

void ThermalParameters::set(std::string_view section, std::string_view key,
                            std::vector<double> values, std::string source) {
  ThermalParameter& e = find(section, key);
  if (values.size() != e.values.size())
    throw UsageError(e.section + "." + e.key, fmt::format("expects {} values", e.values.size()));
  e.values = std::move(values);
  e.source = std::move(source);
}

namespace {

// Values a model cannot use, found where they are read so that the error names the file and
// the key rather than an option the user did not give.
void check_range(const std::string& path, const ThermalParameter& entry,
                 const std::vector<double>& values) {
  const std::string where = entry.section + "." + entry.key;
  if (entry.section == "diurnal") {
    const ParameterRange range = entry.key == "a"   ? diurnal_a_range
                                 : entry.key == "b" ? diurnal_b_range
                                                    : diurnal_c_range;
    if (!range.contains(values[0]))
      throw InputError(
          path,
          fmt::format("'{}' = {:g} is outside {:g}..{:g} ({}; the range --calibrate searches)",
                      where, values[0], range.low, range.high, entry.meaning));
  } else if (entry.section == "window" && !(values[0] < values[1])) {
    throw InputError(path, fmt::format("'{}' = [{:g}, {:g}]: the low limit must be below the "
                                       "high limit",
                                       where, values[0], values[1]));
  }
}

}  // namespace

void ThermalParameters::override_from_file(const std::string& path) {
  // A folder had read as an empty table: the published values were used without a word.
  std::error_code ec;
  if (std::filesystem::is_directory(path, ec))
    throw InputError(path, "is a folder; give the TOML parameter file");
  if (!std::filesystem::exists(path, ec)) throw InputError(path, "does not exist");
  toml::table file;
  try {
    file = toml::parse_file(path);
  } catch (const toml::parse_error& e) {
    throw InputError(path, fmt::format("not a readable TOML parameter file: {} (line {})",
                                       std::string(e.description()), e.source().begin.line));
  }
  if (file.empty())
    throw InputError(path, "holds no parameters; leave the parameter file out to use the published values");
  std::vector<ThermalParameter> updated = entries_;
  std::size_t keys = 0;
  for (auto&& [section_name, node] : file) {
    const std::string section(section_name.str());
    const toml::table* table = node.as_table();
    if (table == nullptr)
      throw InputError(path, "'" + section + "' is not a [section] of parameters");
    // A section of no known model, even an empty one, is a slip (it had been taken silently).
    if (std::none_of(updated.begin(), updated.end(), [&](const ThermalParameter& e) { return e.section == section; })) {
      std::string known;
      for (const ThermalParameter& e : updated)
        if (known.find("[" + e.section + "]") == std::string::npos) known += (known.empty() ? "" : ", ") + ("[" + e.section + "]");
      throw InputError(path, "unknown section [" + section + "] (known: " + known + ")");
    }
    keys += table->size();
    for (auto&& [key_name, value] : *table) {
      const std::string key(key_name.str()), where = section + "." + key;
      auto entry = std::find_if(updated.begin(), updated.end(), [&](const ThermalParameter& e) {
        return e.section == section && e.key == key;
      });
      if (entry == updated.end()) throw InputError(path, "unknown parameter '" + where + "'");
      std::vector<double> numbers;
      auto number = [&](const toml::node& n) {
        const std::optional<double> v = n.value<double>();
        if (!v || !std::isfinite(*v))
          throw InputError(path, "'" + where + "' must hold finite numbers");
        numbers.push_back(*v);
      };
      if (const toml::array* array = value.as_array())
        for (const toml::node& n : *array) number(n);
      else
        number(value);
      if (numbers.size() != entry->values.size())
        throw InputError(path, fmt::format("'{}' expects {} value(s), found {}", where,
                                           entry->values.size(), numbers.size()));
      check_range(path, *entry, numbers);
      entry->values = std::move(numbers);
      entry->source = "overridden by " + path;
    }
  }
  if (keys == 0)
    throw InputError(path, "holds no parameters, only empty sections; leave the parameter file out to use the published "
                           "values");
  entries_ = std::move(updated);
}

std::string ThermalParameters::to_toml(std::string_view section) const {
  std::string out = fmt::format("[{}]\n", section);
  for (const ThermalParameter& e : entries_) {
    if (e.section != section) continue;
    out += fmt::format("# {}; {}\n{} = ", e.meaning, e.source, e.key);
    if (e.values.size() == 1) {
      out += fmt::format("{:.10g}\n", e.values[0]);
    } else {
      out += "[";
      for (std::size_t i = 0; i < e.values.size(); ++i)
        out += fmt::format("{}{:.10g}", i ? ", " : "", e.values[i]);
      out += "]\n";
    }
  }
  return out;
}

DiurnalParameters DiurnalParameters::from(const ThermalParameters& table) {
  return {table.value("diurnal", "a"), table.value("diurnal", "b"), table.value("diurnal", "c")};
}

// --------------------------------------------------------------------------------- models

ThermalModelKind parse_model_kind(const std::string& text) {
  if (text == "r0-2013") return ThermalModelKind::r0_2013;
  if (text == "degree-day") return ThermalModelKind::degree_day;
  if (text == "window") return ThermalModelKind::window;
  throw UsageError("--model '" + text + "'", "expected r0-2013, degree-day or window");
}

Parasite parse_parasite(const std::string& text) {
  if (text == "falciparum") return Parasite::falciparum;
  if (text == "vivax") return Parasite::vivax;
  throw UsageError("--parasite '" + text + "'", "expected falciparum or vivax");
}

ThermalModel::ThermalModel(ThermalModelKind kind, Parasite parasite, const ThermalParameters& table,
                           double window_low, double window_high)
    : kind_(kind), parasite_(parasite) {
  biting_ = table.values("r0-2013", "biting_rate");
  competence_ = table.values("r0-2013", "vector_competence");
  survival_ = table.values("r0-2013", "daily_survival");
  pdr_ = table.values("r0-2013", "parasite_development_rate");
  eggs_ = table.values("r0-2013", "eggs_per_female_per_day");
  egg_adult_ = table.values("r0-2013", "egg_to_adult_survival");
  mdr_ = table.values("r0-2013", "mosquito_development_rate");
  const auto& sporogony =
      table.values("degree-day", parasite == Parasite::vivax ? "vivax" : "falciparum");
  degree_days_ = sporogony[0];
  threshold_ = sporogony[1];
  lifespan_ = table.values("degree-day", "lifespan");
  const auto& limits = table.values("window", "limits");
  low_ = std::isfinite(window_low) ? window_low : limits[0];
  high_ = std::isfinite(window_high) ? window_high : limits[1];
  if (!(low_ < high_))
    throw UsageError(
        "--window",
        fmt::format("the low limit ({:g}) must be below the high limit ({:g})", low_, high_));
  // A model the parameters leave at 0 everywhere: named with the file that set them, if any.
  const auto model_of = [&table](const char* section) {
    for (const ThermalParameter& entry : table.entries())
      if (entry.section == section && entry.source.starts_with("overridden by "))
        return fmt::format("{} (parameters {})", section, entry.source);
    return std::string(section);
  };
  if (kind_ == ThermalModelKind::r0_2013) {
    std::tie(optimum_, maximum_) =
        maximise([this](double t) { return r0_unscaled(t); }, -20.0, 60.0);
    if (!(maximum_ > 0))
      throw UsageError(model_of("r0-2013"), "the trait parameters give R0 = 0 at every temperature");
  } else if (kind_ == ThermalModelKind::degree_day) {
    std::tie(optimum_, maximum_) =
        maximise([this](double t) { return degree_day_unscaled(t); }, -20.0, 60.0);
    if (!(maximum_ > 0))
      throw UsageError(model_of("degree-day"), "the parameters give p^n = 0 at every temperature");
  } else {
    optimum_ = (low_ + high_) / 2;
    maximum_ = 1;
  }
}

double ThermalModel::r0_unscaled(double t) const {
  const double a = briere(biting_, t), bc = quadratic(competence_, t), p = quadratic(survival_, t),
               pdr = briere(pdr_, t), efd = quadratic(eggs_, t), pea = quadratic(egg_adult_, t),
               mdr = briere(mdr_, t);
  if (!(a > 0 && bc > 0 && p > 0 && p < 1 && pdr > 0 && efd > 0 && pea > 0 && mdr > 0)) return 0.0;
  const double mu = -std::log(p);
  return std::sqrt(a * a * bc * std::exp(-mu / pdr) * efd * pea * mdr / (mu * mu * mu));
}

double ThermalModel::incubation_days(double t) const {
  return t > threshold_ ? degree_days_ / (t - threshold_) : INFINITY;
}

double ThermalModel::daily_survival(double t) const {
  const double lifespan = (lifespan_[2] * t + lifespan_[1]) * t + lifespan_[0];
  return lifespan > 0 ? std::exp(-1.0 / lifespan) : 0.0;
}

double ThermalModel::degree_day_unscaled(double t) const {
  const double lifespan = (lifespan_[2] * t + lifespan_[1]) * t + lifespan_[0];
  if (!(t > threshold_) || !(lifespan > 0)) return 0.0;
  // p^n = exp(n ln p) = exp(-(DD / (T - Tmin)) / L)
  return std::exp(-degree_days_ / ((t - threshold_) * lifespan));
}

double ThermalModel::relative(double t) const {
  if (std::isnan(t)) return NAN;
  switch (kind_) {
    case ThermalModelKind::r0_2013:
      return r0_unscaled(t) / maximum_;
    case ThermalModelKind::degree_day:
      return degree_day_unscaled(t) / maximum_;
    case ThermalModelKind::window:
      return t >= low_ && t <= high_ ? 1.0 : 0.0;
  }
  return NAN;
}

std::string ThermalModel::tag() const {
  switch (kind_) {
    case ThermalModelKind::r0_2013:
      return "r0-2013";
    case ThermalModelKind::degree_day:
      return parasite_ == Parasite::vivax ? "degree-day-vivax" : "degree-day-falciparum";
    case ThermalModelKind::window:
      return "window";
  }
  return "";
}

std::string ThermalModel::description(bool of_hours) const {
  switch (kind_) {
    case ThermalModelKind::r0_2013:
      return fmt::format(
          "relative R0(T), Mordecai et al. 2013, An. gambiae / P. falciparum; maximum at {:.2f} °C",
          optimum_);
    case ThermalModelKind::degree_day:
      return fmt::format(
          "degree-day p^n, {} degree-days above {:g} °C, Martens survival; scaled to 1 at {:.2f} °C",
          degree_days_, threshold_, optimum_);
    case ThermalModelKind::window:
      // Temperatures as given (monthly means, hourly records) have no hours made from them.
      return fmt::format("share of {} between {:g} and {:g} °C", of_hours ? "hours" : "the values given", low_, high_);
  }
  return "";
}

SuitableRun suitable_runs(const double* values, int n, double threshold, bool cyclic) {
  SuitableRun out;
  if (n <= 0) return out;
  double sum = 0;
  int count = 0;
  for (int i = 0; i < n; ++i) {
    if (std::isnan(values[i])) return out;
    sum += values[i];
    count += values[i] > threshold;
  }
  int longest = 0, run = 0;
  for (int i = 0; i < (cyclic ? 2 * n : n); ++i) {
    run = values[i % n] > threshold ? run + 1 : 0;
    longest = std::max(longest, run);
  }
  out.count = count;
  out.longest = std::min(longest, n);
  out.mean = sum / n;
  return out;
}

}  // namespace kalends
