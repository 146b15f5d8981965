// Descriptors of one year's cycle.
//
// Harmonics: the discrete Fourier transform X_k = sum_n x_n exp(-2 pi i k n / N) of the year's
// N regular values (FFTW's r2c transform, which computes exactly this sum); harmonic k has
// amplitude 2 |X_k| / N and, as x_n ~ A cos(2 pi k n / N + arg X_k), its first peak at
// n* = (-arg X_k / (2 pi k) mod 1) * N / k.
//
// Seasons: peaks whose prominence (peaks.cpp) is at least `prominence_share` of the year's
// amplitude (max - min). For each, the base on either side is the lowest value between it and
// the neighbouring season's peak (or one cycle away); the season starts where the curve rises
// through base + threshold_share (peak - base) and ends where it falls through it, linearly
// interpolated between periods. This amplitude-threshold rule is common practice; no single
// published standard fixes the share (default 50 %). The integral sums (value - base) over the
// periods inside the season, times the period length in days.
#include <fftw3.h>

#include <algorithm>
#include <cmath>
#include <mutex>
#include <numbers>
#include <stdexcept>

#include "kalends/season.hpp"

namespace kalends {

namespace {
// FFTW's planner is not thread-safe; execution of an existing plan on new arrays is.
std::mutex& planner_mutex() {
  static std::mutex mutex;
  return mutex;
}
constexpr double year_days = 365.25;
}  // namespace

HarmonicAnalysis::HarmonicAnalysis(int length) : length_(length) {
  if (length < 4) throw std::invalid_argument("harmonic analysis needs at least 4 periods a year");
  std::vector<double> in(length);
  std::vector<fftw_complex> out(length / 2 + 1);
  std::lock_guard lock(planner_mutex());
  plan_ = fftw_plan_dft_r2c_1d(length, in.data(), out.data(), FFTW_ESTIMATE | FFTW_UNALIGNED);
}

HarmonicAnalysis::~HarmonicAnalysis() {
  std::lock_guard lock(planner_mutex());
  fftw_destroy_plan(static_cast<fftw_plan>(plan_));
}

std::array<Harmonic, 2> HarmonicAnalysis::analyse(std::span<const double> series,
                                                  std::span<double> real,
                                                  std::span<std::complex<double>> spectrum) const {
  std::copy(series.begin(), series.end(), real.begin());
  fftw_execute_dft_r2c(static_cast<fftw_plan>(plan_), real.data(),
                       reinterpret_cast<fftw_complex*>(spectrum.data()));
  std::array<Harmonic, 2> result;
  const double n = length_;
  for (int k = 1; k <= 2; ++k) {
    const std::complex<double> x = spectrum[k];
    result[k - 1].amplitude = 2.0 * std::abs(x) / n;
    double turn = -std::arg(x) / (2 * std::numbers::pi * k);
    turn -= std::floor(turn);  // in [0, 1)
    const double n_peak = turn * n / k;
    result[k - 1].peak_doy = 1.0 + (n_peak + 0.5) * year_days / n;
  }
  return result;
}

namespace {

double doy_of_position(double position, int periods) {
  return 1.0 + (position + 0.5) * year_days / periods;
}

double wrap_doy(double doy) {
  double d = std::fmod(doy - 1.0, year_days);
  if (d < 0) d += year_days;
  return d + 1.0;
}

}  // namespace

CycleDescriptors describe_cycle(std::span<const double> padded, int periods,
                                const CycleOptions& options, const HarmonicAnalysis& harmonics) {
  CycleDescriptors d;
  const int P = periods;
  const auto year = padded.subspan(P, P);
  for (double v : year)
    if (!std::isfinite(v)) return d;
  d.min = *std::min_element(year.begin(), year.end());
  d.max = *std::max_element(year.begin(), year.end());
  double sum = 0;
  for (double v : year) sum += v;
  d.mean = sum / P;
  d.amplitude = d.max - d.min;
  std::vector<double> real(P);
  std::vector<std::complex<double>> spectrum(P / 2 + 1);
  const auto h = harmonics.analyse(year, real, spectrum);
  d.annual = h[0];
  d.semiannual = h[1];
  if (!(d.amplitude > 0)) return d;

  // Neighbouring cycles fill in where they are missing, so edges behave as in the cyclic case.
  std::vector<double> x(padded.begin(), padded.end());
  for (int i = 0; i < 3 * P; ++i)
    if (!std::isfinite(x[i])) x[i] = year[i % P];
  const std::vector<Peak> all = find_peaks(x, options.prominence_share * d.amplitude);
  std::vector<std::size_t> in_year;
  for (std::size_t k = 0; k < all.size(); ++k)
    if (all[k].index >= P && all[k].index < 2 * P) in_year.push_back(k);
  d.seasons = int(in_year.size());
  if (in_year.empty()) return d;
  std::size_t main = in_year.front();
  for (std::size_t k : in_year)
    if (x[all[k].index] > x[all[main].index]) main = k;
  d.main_peak_doy = doy_of_position(all[main].index - P, P);

  const double period_days = year_days / P;
  for (std::size_t s = 0; s < std::min<std::size_t>(2, in_year.size()); ++s) {
    const std::size_t k = in_year[s];
    const int peak = all[k].index;
    const int previous = k > 0 ? all[k - 1].index : std::max(0, peak - P);
    const int next = k + 1 < all.size() ? all[k + 1].index : std::min(3 * P - 1, peak + P);
    double left_base = x[peak], right_base = x[peak];
    for (int j = previous; j < peak; ++j) left_base = std::min(left_base, x[j]);
    for (int j = peak + 1; j <= next; ++j) right_base = std::min(right_base, x[j]);
    const double left_threshold = left_base + options.threshold_share * (x[peak] - left_base);
    const double right_threshold = right_base + options.threshold_share * (x[peak] - right_base);
    double start = previous, end = next;
    for (int j = peak - 1; j >= previous; --j)
      if (x[j] < left_threshold) {
        start = j + (left_threshold - x[j]) / (x[j + 1] - x[j]);
        break;
      }
    for (int j = peak + 1; j <= next; ++j)
      if (x[j] < right_threshold) {
        end = j - 1 + (x[j - 1] - right_threshold) / (x[j - 1] - x[j]);
        break;
      }
    const double base = std::min(left_base, right_base);
    double integral = 0;
    for (int j = int(std::ceil(start)); j <= int(std::floor(end)); ++j)
      integral += std::max(0.0, x[j] - base) * period_days;
    SeasonTiming& t = d.season[s];
    t.start_doy = wrap_doy(doy_of_position(start - P, P));
    t.end_doy = wrap_doy(doy_of_position(end - P, P));
    t.length_days = (end - start) * period_days;
    t.integral = integral;
  }
  return d;
}

}  // namespace kalends
