// A small door into the method kernels for the Python reference checks: reads one problem from
// stdin, prints the result as JSON. Not installed; used only by tests/reference/*.py.
//
//   whittaker LAMBDA|auto ORDER ROBUST ENVELOPE N   then N values of y (nan = missing), N of w
//   harmonic K TREND REJECT_BELOW N                 then N days, N values of y, N of w
#include <cmath>
#include <iostream>
#include <string>
#include <vector>

#include "fill/harmonic.hpp"
#include "fill/whittaker.hpp"

namespace {

std::vector<float> read_floats(int n) {
  std::vector<float> v(n);
  for (float& x : v) {
    std::string token;
    std::cin >> token;
    x = token == "nan" ? NAN : std::stof(token);
  }
  return v;
}

template <typename T>
void print_array(const char* key, const std::vector<T>& v, bool last = false) {
  std::cout << "\"" << key << "\": [";
  for (std::size_t i = 0; i < v.size(); ++i) {
    if (i) std::cout << ", ";
    if constexpr (std::is_floating_point_v<T>) {
      if (std::isfinite(double(v[i])))
        std::cout << double(v[i]);
      else
        std::cout << "NaN";
    } else {
      std::cout << int(v[i]);
    }
  }
  std::cout << "]" << (last ? "" : ", ");
}

}  // namespace

int main() {
  using namespace kalends;
  std::cout.precision(17);
  std::string kind;
  std::cin >> kind;
  MethodOptions options;
  options.max_extrapolation_days = -1;
  if (kind == "whittaker") {
    std::string lambda;
    int robust = 0, envelope = 0, n = 0;
    std::cin >> lambda >> options.order >> robust >> envelope >> n;
    if (lambda != "auto") options.lambda = std::stod(lambda);
    options.robust = robust;
    options.envelope_upper = envelope;
    const auto y = read_floats(n), w = read_floats(n);
    WhittakerMethod method(options);
    WhittakerMethod::Workspace ws;
    std::vector<float> z(n), sd(n);
    std::vector<std::uint8_t> rejected(n);
    const auto fit = method.smooth(y, w, z, sd, rejected, ws);
    std::cout << "{";
    print_array("z", z);
    print_array("sd", sd);
    print_array("rejected", rejected);
    std::cout << "\"lambda\": " << fit.lambda << ", \"trace\": " << fit.trace
              << ", \"sigma\": " << fit.sigma << ", \"gcv\": " << fit.gcv << "}\n";
  } else if (kind == "harmonic") {
    int trend = 0, n = 0;
    std::cin >> options.harmonics >> trend >> options.reject_below >> n;
    options.trend = trend;
    const auto days_f = read_floats(n), y = read_floats(n), w = read_floats(n);
    const std::vector<double> days(days_f.begin(), days_f.end());
    HarmonicMethod method(options);
    const auto x = method.design(days);
    std::vector<float> z(n), sd(n);
    std::vector<std::uint8_t> rejected(n);
    const auto fit = method.fit(x, y, w, z, sd, rejected);
    std::cout << "{";
    print_array("z", z);
    print_array("sd", sd);
    print_array("rejected", rejected);
    print_array("coefficients", fit.coefficients);
    std::cout << "\"sigma\": " << fit.sigma << "}\n";
  } else {
    std::cerr << "probe: unknown problem '" << kind << "'\n";
    return 2;
  }
  return 0;
}
