// A small door into the method kernels for the Python reference checks: reads one problem from
// stdin, prints the result as JSON. Not installed; used only by tests/reference/*.py.
//
//   whittaker LAMBDA|auto ORDER ROBUST ENVELOPE N   then N values of y (nan = missing), N of w
//   harmonic K TREND REJECT_BELOW N                 then N days, N values of y, N of w
//   dct INVERSE N0 N1 N2                            then N0*N1*N2 values (row-major); ortho DCT-II
//                                                   (INVERSE 0) or DCT-III (INVERSE 1)
//   pls S_SPACE S_TIME N0 N1 N2                     then the values y and the weights w
#include <tbb/task_arena.h>

#include <chrono>
#include <cmath>
#include <iostream>
#include <string>
#include <vector>

#include "fill/dct_pls.hpp"
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
  } else if (kind == "dct") {
    int inverse = 0;
    detail::Shape3 shape;
    std::cin >> inverse >> shape[0] >> shape[1] >> shape[2];
    const int n = shape[0] * shape[1] * shape[2];
    const auto x = read_floats(n);
    detail::DctPlanCache plans;
    detail::DctBuffer data(n);
    for (int i = 0; i < n; ++i) data[i] = x[i];
    if (inverse)
      plans.inverse_ortho(shape, data.data());
    else
      plans.forward_ortho(shape, data.data());
    std::cout << "{";
    print_array("y", std::vector<double>(data.data(), data.data() + n), true);
    std::cout << "}\n";
  } else if (kind == "pls" || kind == "pls_single") {
    // pls: double precision, solved to 1e-12. pls_single: single precision (as the spacetime
    // fill solves), to the tolerance given after the shape.
    detail::PlsSettings settings;
    detail::Shape3 shape;
    std::cin >> settings.s_space >> settings.s_time >> shape[0] >> shape[1] >> shape[2];
    settings.tolerance = 1e-12;
    settings.single_precision = kind == "pls_single";
    if (settings.single_precision) std::cin >> settings.tolerance;
    settings.max_iterations = 5000;
    const int n = shape[0] * shape[1] * shape[2];
    const auto yf = read_floats(n), wf = read_floats(n);
    std::vector<double> y(yf.begin(), yf.end()), w(wf.begin(), wf.end()), z(n, 0.0);
    for (int i = 0; i < n; ++i)
      if (!(w[i] > 0)) y[i] = 0;
    detail::DctPlanCache plans;
    detail::PlsWorkspace ws;
    const auto result = detail::solve_pls(plans, shape, y, w, settings, z, ws);
    std::cout << "{";
    print_array("z", z);
    std::cout << "\"iterations\": " << result.iterations << ", \"converged\": "
              << (result.converged ? "true" : "false")
              << ", \"relative_residual\": " << result.relative_residual << "}\n";
  } else if (kind == "pls_timed") {
    // For tools/bench/pls_reference.py: one solve at a given tolerance and precision (1: single,
    // as the spacetime fill solves) with timed plans, the planning done before the clock
    // starts; prints the solve's seconds.
    detail::PlsSettings settings;
    detail::Shape3 shape;
    int single = 0;
    std::cin >> settings.s_space >> settings.s_time >> settings.tolerance >> shape[0] >> shape[1] >>
        shape[2] >> single;
    settings.single_precision = single != 0;
    settings.max_iterations = 5000;
    const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
    const auto yf = read_floats(int(n)), wf = read_floats(int(n));
    std::vector<double> y(yf.begin(), yf.end()), w(wf.begin(), wf.end()), z(n, 0.0);
    for (std::size_t i = 0; i < n; ++i)
      if (!(w[i] > 0)) y[i] = 0;
    detail::DctPlanCache plans(detail::DctPlanning{true, detail::default_wisdom_file()});
    {
      const detail::SlotRun all{0, shape[2]};
      detail::DctBuffer warm(n);
      std::fill(warm.data(), warm.data() + n, 0.0);
      plans.forward_space(shape, warm.data());
      plans.inverse_space(shape, warm.data());
      detail::BasicDctBuffer<float> warm_single(n);
      std::fill(warm_single.data(), warm_single.data() + n, 0.0f);
      plans.forward_space(shape, warm_single.data(), {&all, 1});
      plans.inverse_space(shape, warm_single.data(), {&all, 1});
    }
    detail::PlsWorkspace ws;
    // One thread, as the numpy/scipy reference (scipy.fft with workers=1): a per-core ratio.
    // The arena starts its thread before the clock does.
    tbb::task_arena one_thread(1);
    one_thread.initialize();
    detail::PlsResult result;
    const auto start = std::chrono::steady_clock::now();
    one_thread.execute([&] { result = detail::solve_pls(plans, shape, y, w, settings, z, ws); });
    const double seconds =
        std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
    std::cout << "{";
    print_array("z", z);
    std::cout << "\"iterations\": " << result.iterations << ", \"seconds\": " << seconds
              << ", \"converged\": " << (result.converged ? "true" : "false") << "}\n";
  } else {
    std::cerr << "probe: unknown problem '" << kind << "'\n";
    return 2;
  }
  return 0;
}
