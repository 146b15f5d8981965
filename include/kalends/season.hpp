// Seasonal descriptors of one pixel's regular series: period means, harmonics, growing
// seasons. The kernels know nothing of files; run_seasons (seasons.hpp) applies them to stacks.
#pragma once

#include <array>
#include <complex>
#include <memory>
#include <span>
#include <string>
#include <utility>
#include <vector>

#include "kalends/fill.hpp"
#include "kalends/time.hpp"

namespace kalends {

/// Whether the dates (two or more, a month apart or more) fall on the last day of their month,
/// nine in ten of them at least: the way CF files commonly stamp monthly means, which
/// `DateMarks::end` reads as each month's own (the default, DateMarks::automatic, does).
bool dates_at_month_ends(const std::vector<TimePoint>& dates);

/// Whether the dates (two or more, a month apart or more) fall in the middle of their month (its
/// 14th to 16th), nine in ten at least: monthly means stamped at the middle of their time bounds,
/// as CF files also do. Read as starts, each had stood for half of its month and half the next.
bool dates_at_month_middles(const std::vector<TimePoint>& dates);

/// The note for dates the default reads as month ends or middles ("" for neither); `option`
/// names what reads them otherwise.
std::string monthly_marks_note(const std::vector<TimePoint>& dates, const std::string& option);

/// `given`, or for DateMarks::automatic: `end` on dates at month ends, `middle` at month middles,
/// else `start`. Read as starts, monthly means stamped on the month's last day had each stood
/// for the month after.
DateMarks resolve_date_marks(DateMarks given, const std::vector<TimePoint>& dates);

/// The note commands give when the automatic rule reads such dates as ends; `option` is how to
/// ask for starts ("--date-marks start", or a job file's key).
std::string month_end_note(const std::string& option);

/// "2004-2009" or "2006" -> first and last year; UsageError otherwise.
std::pair<int, int> parse_years(const std::string& text);

/// The periods of one year on a calendar: their first day (days since 1970) and length.
struct Period {
  std::int64_t first_day = 0;
  int days = 0;
};
/// calendar.per_year() of them, the last N-day one ending on 31 December.
std::vector<Period> periods_of_year(int year, const CalendarPeriod& calendar);

/// The median spacing of sorted times `at` (in their own unit: days, seconds), at least 1;
/// `fallback` for fewer than two times.
std::int64_t median_spacing(const std::vector<std::int64_t>& at, std::int64_t fallback);

/// The [first, last) each composite dated `at` (sorted, in units since 1970 of which a day has
/// `units_per_day`: 1 for days, 86400 for seconds) stands for, by what its date marks
/// (DateMarks, fill.hpp): `step` from its date (start), up to and including its date's unit
/// (end), or around it (middle); never past its neighbours' dates, and, for start dates on a
/// calendar that restarts every 1 January (restarts_each_year), never past 31 December. One
/// rule for seasons, extract and the rest.
std::vector<std::pair<std::int64_t, std::int64_t>> composite_spans(const std::vector<std::int64_t>& at,
                                                                   std::int64_t step, DateMarks marks,
                                                                   std::int64_t units_per_day);

/// Whether midnight dates `at` (units as composite_spans) all fall on days of year 1, 1 + s,
/// 1 + 2s, ... for a `step` of s whole days (2 to 183): composites that restart every 1 January,
/// as MODIS 8- and 16-day ones, whose last of a year is shorter.
bool restarts_each_year(const std::vector<std::int64_t>& at, std::int64_t step, std::int64_t units_per_day);

/// For each period of `periods`, the composites that overlap it and by how many days. Each
/// composite covers `step_days` from where its date marks (a shorter span when the next
/// composite starts sooner). Value of a period = overlap-weighted mean of its composites.
struct PeriodSources {
  std::vector<int> composite;
  std::vector<double> days;
};
std::vector<PeriodSources> period_sources(const std::vector<TimePoint>& dates,
                                          const std::vector<Period>& periods, DateMarks marks);

/// The years first_year, first_year + 1, ... (each `periods_per_year` entries of `sources`) on
/// no day of which any composite stands: a year missing from the stack. UsageError("--years")
/// when that is every year of the range (a --years that asks for missing years only).
std::vector<int> years_without_composite(const std::vector<PeriodSources>& sources, int first_year,
                                         int periods_per_year);
/// The note on such years: their layers are empty.
std::string years_without_composite_note(const std::vector<int>& years);

/// A local maximum with its prominence, as scipy.signal.find_peaks / peak_prominences define
/// them (flat tops: the middle sample, rounded down; no window length).
struct Peak {
  int index = 0;
  double prominence = 0;
  int left_base = 0, right_base = 0;
};
std::vector<Peak> find_peaks(std::span<const double> x, double min_prominence);

/// Where a year's periods lie in days: each period's middle day as a day of year (1 January
/// = 1; January's middle is day 16, the 16-day period from day 193 has its middle at 200.5), on
/// a 365-day year. A fractional position between two periods (a harmonic's peak, a season's
/// edge) lies between their middles, linearly; positions before or after the year continue
/// into the neighbouring years.
class PeriodDays {
 public:
  /// The periods of a calendar in a year of 365 days.
  static PeriodDays of_calendar(const CalendarPeriod& calendar);
  /// `count` equal periods of 365 / count days.
  static PeriodDays equal(int count);
  int count() const { return int(first_.size()); }
  /// Day of year of a position (period index, fractional, any sign), not wrapped.
  double day(double position) const;
  /// The same wrapped into [1, 366).
  double day_of_year(double position) const;
  /// Days of period `index` (wrapped into the year).
  double length(int index) const;

 private:
  std::vector<double> first_, days_;  // first day of year (1-based) and length of each period
};

/// Amplitude and the day of year of the first peak of one harmonic (NaN where the amplitude is
/// nil: the phase of a zero harmonic is rounding noise).
struct Harmonic {
  double amplitude = 0;
  double peak_doy = 0;
};

/// Annual and semi-annual harmonics of a year's regular series by FFTW's real transform. The
/// plan is made once, for one series length; `analyse` may then be called from any thread.
class HarmonicAnalysis {
 public:
  /// std::invalid_argument where `length` is below 4 (a calendar has at least 12 periods).
  explicit HarmonicAnalysis(int length);
  ~HarmonicAnalysis();
  HarmonicAnalysis(const HarmonicAnalysis&) = delete;
  HarmonicAnalysis& operator=(const HarmonicAnalysis&) = delete;
  int length() const { return length_; }
  /// `series` (length()) -> the annual (k = 1) and semi-annual (k = 2) harmonics, peak days
  /// placed by `days` (of length() periods).
  std::array<Harmonic, 2> analyse(std::span<const double> series, const PeriodDays& days,
                                  std::span<double> scratch_real,
                                  std::span<std::complex<double>> scratch_spectrum) const;

 private:
  int length_;
  void* plan_ = nullptr;
};

struct CycleOptions {
  double prominence_share = 0.2;  // peaks count as seasons above this share of the amplitude
  double threshold_share = 0.5;   // season start/end where the curve crosses base + share (peak - base)
  double min_amplitude = 0;       // no season where max - min is not above this (input units): noise
};

struct SeasonTiming {
  double start_doy = NAN, end_doy = NAN, length_days = NAN, integral = NAN;
};

struct CycleDescriptors {
  double mean = NAN, min = NAN, max = NAN, amplitude = NAN;
  Harmonic annual{NAN, NAN}, semiannual{NAN, NAN};
  int seasons = 0;
  double main_peak_doy = NAN;
  std::array<SeasonTiming, 2> season;  // the first two seasons of the year, by peak date
  /// 1: a season's start, 2: its end is unknown (NaN, with its length and integral): it lies
  /// where `padded` had no value and the year's own values stood in.
  int edges_unknown = 0;
};

/// Describes one year given `padded` = [previous cycle | the year | next cycle], each of
/// `days.count()` values (NaN where a neighbouring year has none: the year's own values stand
/// in for the peak search, but a season edge among them is left unknown).
/// Peaks and season edges are searched on the padded series, so a season that spans
/// 1 January is not cut; a season belongs to the year that holds its peak.
CycleDescriptors describe_cycle(std::span<const double> padded, const PeriodDays& days,
                                const CycleOptions& options, const HarmonicAnalysis& harmonics);

}  // namespace kalends
