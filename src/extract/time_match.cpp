// Which file and band of a series a survey date reads. Dated series: the last file whose date is
// on or before the survey day, as long as the survey day falls before the next file's date (the
// last file lasts one period or grid step); lags step back file by file. Periodic series: the
// period of the calendar year holding the survey day; lags step back period by period, into
// the year before (year layers) or round the calendar (synoptic layers).
#include <algorithm>

#include <fmt/format.h>

#include "kalends/extract.hpp"

namespace kalends {

namespace {

std::string period_label(const CalendarPeriod& period, int index) {
  if (period.kind == CalendarPeriod::Kind::month) return fmt::format("month {:02d}", index + 1);
  return fmt::format("doy {:03d}", 1 + index * period.days);
}

TimePoint end_of_last(const CovariateSeries& s) {
  const TimePoint last = s.files.back().time;
  if (s.period) return next_period_start(*s.period, last);
  if (s.step_days > 0) return TimePoint{last.seconds + static_cast<std::int64_t>(s.step_days * 86400)};
  if (s.files.size() >= 2) return TimePoint{2 * last.seconds - s.files[s.files.size() - 2].time.seconds};
  return TimePoint{last.seconds + 86400};
}

}  // namespace

TimeMatch match_time(const CovariateSeries& series, const SurveyPoint& point, int lag) {
  TimeMatch m;
  if (series.kind == SeriesKind::fixed) {
    m.file = 0;
    m.band = series.band;
    m.label = "fixed";
    return m;
  }
  if (!point.date) {
    m.reason = "no survey date";
    return m;
  }
  const CivilDate day = *point.date;
  if (series.kind == SeriesKind::dated) {
    const TimePoint t = TimePoint::from_date(day);
    const auto after = std::upper_bound(series.files.begin(), series.files.end(), t,
                                        [](TimePoint v, const SeriesFile& f) { return v < f.time; });
    if (after == series.files.begin()) {
      m.reason = "survey date before the layers (first " + series.files.front().time.label() + ")";
      return m;
    }
    const int own = static_cast<int>(after - series.files.begin()) - 1;
    if (after == series.files.end() && !(t < end_of_last(series))) {
      m.reason = "survey date after the layers (last " + series.files.back().time.label() + ")";
      return m;
    }
    if (own - lag < 0) {
      m.reason = "lag before the layers (first " + series.files.front().time.label() + ")";
      return m;
    }
    m.file = own - lag;
    m.band = 1;
    m.label = series.files[m.file].time.label();
    return m;
  }
  int index = period_index(*series.period, day) - lag;
  int year = day.year;
  const int count = series.period_count;
  while (index < 0) {
    index += count;
    --year;
  }
  if (index >= count) {
    m.reason = "period " + std::to_string(index + 1) + " beyond the layer's " + std::to_string(count) + " bands";
    return m;
  }
  m.band = index + 1;
  if (series.kind == SeriesKind::synoptic_period) {
    m.file = 0;
    m.label = period_label(*series.period, index);
    return m;
  }
  const auto found = std::find_if(series.files.begin(), series.files.end(),
                                  [&](const SeriesFile& f) { return f.year == year; });
  if (found == series.files.end()) {
    m.reason = fmt::format("no layer for {} (years {}-{})", year, series.files.front().year, series.files.back().year);
    return m;
  }
  m.file = static_cast<int>(found - series.files.begin());
  m.label = fmt::format("{} {}", year, period_label(*series.period, index));
  return m;
}

}  // namespace kalends
