// Which file and band of a series a survey date reads. Dated series: the file whose span (the
// time its composite stands for, set_date_marks) holds the survey day; lags step back file by
// file. Periodic series: the period of the calendar year holding the survey day; lags step back
// period by period, into the year before (year layers) or round the calendar (synoptic layers).
#include <algorithm>
#include <cmath>

#include <fmt/format.h>

#include "kalends/extract.hpp"

namespace kalends {

namespace {

std::string period_label(const CalendarPeriod& period, int index) {
  if (period.kind == CalendarPeriod::Kind::month) return fmt::format("month {:02d}", index + 1);
  return fmt::format("doy {:03d}", 1 + index * period.days);
}


}  // namespace

void set_date_marks(CovariateSeries& s, DateMarks marks) {
  s.spans.clear();
  if (s.kind != SeriesKind::dated || s.files.empty()) return;
  if (s.period) {  // kalends calendar outputs: each file is its period, dated at the start
    for (const SeriesFile& f : s.files) s.spans.push_back({f.time, next_period_start(*s.period, f.time)});
    return;
  }
  // The rule of period_sources, in seconds (sub-daily series); with 'end' a span ends with the
  // dated second itself, so the day it names reads it. One step: the fill's grid step, else the
  // median spacing of the dates (a day for a single file).
  std::vector<std::int64_t> at;
  for (const SeriesFile& f : s.files) at.push_back(f.time.seconds);
  const std::int64_t step =
      s.step_days > 0 ? std::max<std::int64_t>(1, std::llround(s.step_days * 86400)) : median_spacing(at, 86400);
  for (const auto& [first, last] : composite_spans(at, step, marks, 86400)) s.spans.push_back({TimePoint{first}, TimePoint{last}});
}

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
    const auto& spans = series.spans;  // set by find_covariates and run_extract (set_date_marks)
    const TimePoint t = TimePoint::from_date(day);
    // The survey day is the midnight that starts it: the span holding that moment.
    const auto after = std::upper_bound(spans.begin(), spans.end(), t,
                                        [](TimePoint v, const auto& span) { return v < span.first; });
    if (after == spans.begin()) {
      m.reason = "survey date before the layers (first " + series.files.front().time.label() + ")";
      return m;
    }
    int own = static_cast<int>(after - spans.begin()) - 1;
    if (!(t < spans[own].second) && after == spans.end()) {
      // A calendar's periods go on past its last file: the survey's own period is not written
      // yet, and its lags read those that are (lag 1 of a survey in January reads December), as
      // a year layer's lags do. A composite's successor cannot be counted so.
      int period_of_survey = own;
      if (series.period && lag > 0)
        for (TimePoint start = spans.back().second;;) {
          ++period_of_survey;
          const TimePoint next = next_period_start(*series.period, start);
          if (t < next || !(start < next)) break;
          start = next;
        }
      if (period_of_survey == own || period_of_survey - lag >= static_cast<int>(spans.size())) {
        m.reason = "survey date after the layers (last " + series.files.back().time.label() + ")";
        return m;
      }
      own = period_of_survey;
    } else if (!(t < spans[own].second)) {
      // Between two seasons of composites: the day itself reads nothing, and its lags read the
      // composites before the gap, lag 1 the last of them.
      if (lag == 0) {
        m.reason = "no layer stands for the survey date (between " + series.files[own].time.label() + " and " +
                   series.files[own + 1].time.label() + ")";
        return m;
      }
      ++own;
    }
    if (own - lag < 0) {
      m.reason = "lag before the layers (first " + series.files.front().time.label() + ")";
      return m;
    }
    m.file = own - lag;
    m.band = series.files[m.file].band;
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
