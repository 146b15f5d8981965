// A door into the thermal kernels for the Python reference checks: one problem on stdin, the
// result as JSON on stdout. Not installed; used only by tests/reference/test_thermal_*.py.
//
//   model KIND PARASITE N t...                 -> relative, r0, incubation, survival, degree_day,
//   optimum sun LAT DOY                                -> sunrise, sunset, day_length diurnal A B C
//   LAT DOY y_min y_max t_min t_max n_min n_max N hour...
//                                              -> temperatures of day DOY (yesterday DOY-1,
//                                              tomorrow DOY+1)
//   samples A B C LAT DOY DAY_VALUE DAY_HOUR NIGHT_VALUE NIGHT_HOUR -> tmin, tmax
//   runs THRESHOLD CYCLIC N v...               -> count, longest, mean
#include <cmath>
#include <iostream>
#include <string>
#include <vector>

#include "kalends/thermal.hpp"

namespace {
std::vector<double> read_values(int n) {
  std::vector<double> v(n);
  for (double& x : v) {
    std::string token;
    std::cin >> token;
    x = token == "nan" ? NAN : std::stod(token);
  }
  return v;
}
std::string number(double v) {
  if (std::isnan(v)) return "NaN";
  if (std::isinf(v)) return v > 0 ? "Infinity" : "-Infinity";
  char text[40];
  std::snprintf(text, sizeof text, "%.17g", v);
  return text;
}
void print_array(const char* key, const std::vector<double>& v, bool first = false) {
  std::cout << (first ? "" : ", ") << "\"" << key << "\": [";
  for (std::size_t i = 0; i < v.size(); ++i) std::cout << (i ? ", " : "") << number(v[i]);
  std::cout << "]";
}
}  // namespace

int main() {
  using namespace kalends;
  std::string kind;
  std::cin >> kind;
  const ThermalParameters table = ThermalParameters::defaults();
  if (kind == "model") {
    std::string model_kind, parasite;
    int n;
    std::cin >> model_kind >> parasite >> n;
    const auto t = read_values(n);
    const ThermalModel model(parse_model_kind(model_kind), parse_parasite(parasite), table);
    std::vector<double> relative, r0, incubation, survival, degree_day;
    for (double x : t) {
      relative.push_back(model.relative(x));
      r0.push_back(model.r0_unscaled(x));
      incubation.push_back(model.incubation_days(x));
      survival.push_back(model.daily_survival(x));
      degree_day.push_back(model.degree_day_unscaled(x));
    }
    std::cout << "{";
    print_array("relative", relative, true);
    print_array("r0", r0);
    print_array("incubation", incubation);
    print_array("survival", survival);
    print_array("degree_day", degree_day);
    std::cout << ", \"optimum\": " << number(model.optimum()) << "}\n";
  } else if (kind == "sun") {
    double lat;
    int doy;
    std::cin >> lat >> doy;
    const SunTimes s = sun_times(lat, doy);
    std::cout << "{\"sunrise\": " << number(s.sunrise) << ", \"sunset\": " << number(s.sunset)
              << ", \"day_length\": " << number(s.day_length) << "}\n";
  } else if (kind == "diurnal") {
    DiurnalParameters p;
    double lat;
    int doy, n;
    std::cin >> p.a >> p.b >> p.c >> lat >> doy;
    const auto extremes = read_values(6);
    std::cin >> n;
    const auto hours = read_values(n);
    const DiurnalDay yesterday{extremes[0], extremes[1], sun_times(lat, doy - 1)};
    const DiurnalDay today{extremes[2], extremes[3], sun_times(lat, doy)};
    const DiurnalDay tomorrow{extremes[4], extremes[5], sun_times(lat, doy + 1)};
    std::vector<double> t;
    for (double h : hours) t.push_back(diurnal_temperature(p, yesterday, today, tomorrow, h));
    std::cout << "{";
    print_array("temperature", t, true);
    std::cout << "}\n";
  } else if (kind == "samples") {
    DiurnalParameters p;
    double lat, day_value, day_hour, night_value, night_hour;
    int doy;
    std::cin >> p.a >> p.b >> p.c >> lat >> doy >> day_value >> day_hour >> night_value >>
        night_hour;
    const DiurnalDay d =
        extremes_from_samples(p, sun_times(lat, doy), day_value, day_hour, night_value, night_hour);
    std::cout << "{\"tmin\": " << number(d.tmin) << ", \"tmax\": " << number(d.tmax) << "}\n";
  } else if (kind == "runs") {
    double threshold;
    int cyclic, n;
    std::cin >> threshold >> cyclic >> n;
    const auto v = read_values(n);
    const SuitableRun r = suitable_runs(v.data(), n, threshold, cyclic != 0);
    std::cout << "{\"count\": " << number(r.count) << ", \"longest\": " << number(r.longest)
              << ", \"mean\": " << number(r.mean) << "}\n";
  } else {
    std::cerr << "thermal_probe: unknown problem '" << kind << "'\n";
    return 2;
  }
  return 0;
}
