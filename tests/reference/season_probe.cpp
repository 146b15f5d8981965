// A door into the seasonal kernels for the Python reference checks: one problem on stdin, the
// result as JSON on stdout. Not installed; used only by tests/reference/test_seasons_*.py.
//
//   peaks PROMINENCE N x...            -> indices and prominences (find_peaks)
//   harmonics N x...                   -> annual and semi-annual amplitude and peak day of year
//                                         (N equal periods of 365 / N days)
//   cycle PROMINENCE THRESHOLD P x...  -> describe_cycle on 3P padded values
#include <cmath>
#include <iostream>
#include <string>
#include <vector>

#include "kalends/season.hpp"

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
  if (!std::isfinite(v)) return "NaN";
  char text[40];
  std::snprintf(text, sizeof text, "%.17g", v);
  return text;
}
}  // namespace

int main() {
  using namespace kalends;
  std::string kind;
  std::cin >> kind;
  if (kind == "peaks") {
    double prominence;
    int n;
    std::cin >> prominence >> n;
    const auto x = read_values(n);
    const auto peaks = find_peaks(x, prominence);
    std::cout << "{\"index\": [";
    for (std::size_t i = 0; i < peaks.size(); ++i) std::cout << (i ? ", " : "") << peaks[i].index;
    std::cout << "], \"prominence\": [";
    for (std::size_t i = 0; i < peaks.size(); ++i) std::cout << (i ? ", " : "") << number(peaks[i].prominence);
    std::cout << "]}\n";
  } else if (kind == "harmonics") {
    int n;
    std::cin >> n;
    const auto x = read_values(n);
    const HarmonicAnalysis analysis(n);
    std::vector<double> real(n);
    std::vector<std::complex<double>> spectrum(n / 2 + 1);
    const auto h = analysis.analyse(x, PeriodDays::equal(n), real, spectrum);
    std::cout << "{\"annual_amplitude\": " << number(h[0].amplitude) << ", \"annual_peak_doy\": "
              << number(h[0].peak_doy) << ", \"semiannual_amplitude\": " << number(h[1].amplitude)
              << ", \"semiannual_peak_doy\": " << number(h[1].peak_doy) << "}\n";
  } else if (kind == "cycle") {
    CycleOptions options;
    int p;
    std::cin >> options.prominence_share >> options.threshold_share >> p;
    const auto x = read_values(3 * p);
    const HarmonicAnalysis analysis(p);
    const CycleDescriptors d = describe_cycle(x, PeriodDays::equal(p), options, analysis);
    std::cout << "{\"mean\": " << number(d.mean) << ", \"min\": " << number(d.min) << ", \"max\": "
              << number(d.max) << ", \"amplitude\": " << number(d.amplitude) << ", \"seasons\": " << d.seasons
              << ", \"main_peak_doy\": " << number(d.main_peak_doy);
    for (int s = 0; s < 2; ++s)
      std::cout << ", \"season" << s + 1 << "\": [" << number(d.season[s].start_doy) << ", "
                << number(d.season[s].end_doy) << ", " << number(d.season[s].length_days) << ", "
                << number(d.season[s].integral) << "]";
    std::cout << "}\n";
  } else {
    std::cerr << "season_probe: unknown problem '" << kind << "'\n";
    return 2;
  }
  return 0;
}
