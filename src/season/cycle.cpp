// Descriptors of one year's cycle.
//
// Harmonics: the discrete Fourier transform X_k = sum_n x_n exp(-2 pi i k n / N) of the year's
// N regular values (FFTW's r2c transform, which computes exactly this sum); harmonic k has
// amplitude 2 |X_k| / N and, as x_n ~ A cos(2 pi k n / N + arg X_k), its first peak where
// 2 pi k n / N + arg X_k = 0 (mod 2 pi): n* = (-arg X_k / (2 pi) mod 1) * N / k.
//
// Days: a position n (a period index, fractional between periods) becomes a day of year through
// the periods' middle days (PeriodDays), so that 16-day periods, whose last one is shorter, and
// months of unequal length are placed where they are.
//
// Seasons: peaks whose prominence (peaks.cpp) is at least `prominence_share` of the year's
// amplitude (max - min). For each, the base on either side is the lowest value between it and
// the neighbouring season's peak (or one cycle away); the season starts where the curve rises
// through base + threshold_share (peak - base) and ends where it falls through it, linearly
// interpolated between periods. This amplitude-threshold rule is common practice; no single
// published standard fixes the share (default 50 %). The integral sums (value - base) over the
// periods inside the season, times each period's length in days.
#include <fftw3.h>

#include <algorithm>
#include <cmath>
#include <mutex>
#include <numbers>
#include <stdexcept>

#include "engine/fftw_planner.hpp"
#include "kalends/season.hpp"

namespace kalends {

namespace {
// FFTW's planner is not thread-safe; execution of an existing plan on new arrays is.
constexpr double year_days = 365;  // the year PeriodDays places periods in
}  // namespace

PeriodDays PeriodDays::of_calendar(const CalendarPeriod& calendar) {
  PeriodDays d;
  const std::int64_t jan1 = days_from_civil(2001, 1, 1);  // a year of 365 days
  for (const Period& p : periods_of_year(2001, calendar)) {
    d.first_.push_back(double(p.first_day - jan1 + 1));
    d.days_.push_back(p.days);
  }
  return d;
}

PeriodDays PeriodDays::equal(int count) {
  PeriodDays d;
  for (int k = 0; k < count; ++k) {
    d.first_.push_back(1.0 + k * year_days / count);
    d.days_.push_back(year_days / count);
  }
  return d;
}

double PeriodDays::length(int index) const {
  const int n = count();
  return days_[std::size_t(((index % n) + n) % n)];
}

double PeriodDays::day(double position) const {
  // The middle day of period k, continued into the neighbouring years.
  const int n = count();
  auto middle = [&](int k) {
    const int cycles = int(std::floor(double(k) / n));
    const std::size_t i = std::size_t(k - cycles * n);
    return first_[i] + (days_[i] - 1) / 2 + cycles * year_days;
  };
  const int below = int(std::floor(position));
  const double f = position - below;
  return middle(below) + f * (middle(below + 1) - middle(below));
}

double PeriodDays::day_of_year(double position) const {
  double d = std::fmod(day(position) - 1.0, year_days);
  if (d < 0) d += year_days;
  return d + 1.0;
}

HarmonicAnalysis::HarmonicAnalysis(int length) : length_(length) {
  if (length < 4) throw std::invalid_argument("harmonic analysis needs at least 4 periods a year");
  std::vector<double> in(length);
  std::vector<fftw_complex> out(length / 2 + 1);
  std::lock_guard lock(detail::fftw_planner_mutex());
  plan_ = fftw_plan_dft_r2c_1d(length, in.data(), out.data(), FFTW_ESTIMATE | FFTW_UNALIGNED);
}

HarmonicAnalysis::~HarmonicAnalysis() {
  std::lock_guard lock(detail::fftw_planner_mutex());
  fftw_destroy_plan(static_cast<fftw_plan>(plan_));
}

std::array<Harmonic, 2> HarmonicAnalysis::analyse(std::span<const double> series, const PeriodDays& days,
                                                  std::span<double> real,
                                                  std::span<std::complex<double>> spectrum) const {
  std::copy(series.begin(), series.end(), real.begin());
  fftw_execute_dft_r2c(static_cast<fftw_plan>(plan_), real.data(),
                       reinterpret_cast<fftw_complex*>(spectrum.data()));
  std::array<Harmonic, 2> result;
  const double n = length_;
  double largest = 0;
  for (double v : series) largest = std::max(largest, std::abs(v));
  for (int k = 1; k <= 2; ++k) {
    const std::complex<double> x = spectrum[k];
    result[k - 1].amplitude = 2.0 * std::abs(x) / n;
    // A harmonic lost in the rounding of the values (a flat series) has no peak. Relative to
    // the values alone: with a floor of 1e-12 a cycle of amplitude 1e-15 (a variable in small
    // units) had none either.
    if (!(result[k - 1].amplitude > 1e-12 * largest)) {
      result[k - 1].peak_doy = NAN;
      continue;
    }
    double turn = -std::arg(x) / (2 * std::numbers::pi);
    turn -= std::floor(turn);  // in [0, 1)
    result[k - 1].peak_doy = days.day_of_year(turn * n / k);
  }
  return result;
}

CycleDescriptors describe_cycle(std::span<const double> padded, const PeriodDays& days,
                                const CycleOptions& options, const HarmonicAnalysis& harmonics) {
  CycleDescriptors d;
  const int P = days.count();
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
  const auto h = harmonics.analyse(year, days, real, spectrum);
  d.annual = h[0];
  d.semiannual = h[1];
  // A flat cycle, or one whose whole range is within what the user calls noise, has no season.
  if (!(d.amplitude > std::max(0.0, options.min_amplitude))) return d;

  // Neighbouring cycles fill in where they are missing, so edges behave as in the cyclic case;
  // but a season edge found among those stand-ins is the year's own shape, not the record's.
  std::vector<double> x(padded.begin(), padded.end());
  std::vector<char> stand_in(std::size_t(3 * P), 0);
  for (int i = 0; i < 3 * P; ++i)
    if (!std::isfinite(x[i])) x[i] = year[i % P], stand_in[std::size_t(i)] = 1;
  const auto any_stand_in = [&](int from, int to) {
    for (int j = std::max(0, from); j <= std::min(3 * P - 1, to); ++j)
      if (stand_in[std::size_t(j)]) return true;
    return false;
  };
  const std::vector<Peak> all = find_peaks(x, options.prominence_share * d.amplitude);
  std::vector<std::size_t> in_year;
  for (std::size_t k = 0; k < all.size(); ++k)
    if (all[k].index >= P && all[k].index < 2 * P) in_year.push_back(k);
  d.seasons = int(in_year.size());
  if (in_year.empty()) return d;
  std::size_t main = in_year.front();
  for (std::size_t k : in_year)
    if (x[all[k].index] > x[all[main].index]) main = k;
  d.main_peak_doy = days.day_of_year(all[main].index - P);

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
      integral += std::max(0.0, x[j] - base) * days.length(j);
    // An edge whose crossing lies among the stand-ins (the record starts or ends within the
    // season, or a neighbouring year has no data) is unknown: left empty, and counted, rather
    // than taken from another season's values. A base among them is kept: the lowest value
    // beyond the record's end moves the crossing little (a helper: the same late-October end
    // whether a February stand-in dipped 0.01 below the last January or not), and leaving it
    // out had emptied every last year's end.
    const bool start_known = !any_stand_in(int(std::floor(start)), peak);
    const bool end_known = !any_stand_in(peak, int(std::ceil(end)));
    SeasonTiming& t = d.season[s];
    t.start_doy = start_known ? days.day_of_year(start - P) : NAN;
    t.end_doy = end_known ? days.day_of_year(end - P) : NAN;
    t.length_days = start_known && end_known ? days.day(end - P) - days.day(start - P) : NAN;
    t.integral = start_known && end_known ? integral : NAN;
    if (!start_known) d.edges_unknown |= 1;
    if (!end_known) d.edges_unknown |= 2;
  }
  return d;
}

}  // namespace kalends
