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

// One step of the series, in seconds: the grid step of fill outputs, else the median spacing
// of the dates (a day for a single file).
std::int64_t step_seconds(const CovariateSeries& s) {
  if (s.step_days > 0) return std::max<std::int64_t>(1, std::llround(s.step_days * 86400));
  std::vector<std::int64_t> gaps;
  for (std::size_t i = 1; i < s.files.size(); ++i) gaps.push_back(s.files[i].time.seconds - s.files[i - 1].time.seconds);
  if (gaps.empty()) return 86400;
  std::nth_element(gaps.begin(), gaps.begin() + gaps.size() / 2, gaps.end());
  return std::max<std::int64_t>(1, gaps[gaps.size() / 2]);
}

}  // namespace

void set_date_marks(CovariateSeries& s, DateMarks marks) {
  s.spans.clear();
  if (s.kind != SeriesKind::dated || s.files.empty()) return;
  const std::size_t n = s.files.size();
  const auto at = [&](std::size_t i) { return s.files[i].time.seconds; };
  if (s.period) {  // kalends calendar outputs: each file is its period, dated at the start
    for (std::size_t i = 0; i < n; ++i)
      s.spans.push_back({s.files[i].time, next_period_start(*s.period, s.files[i].time)});
    return;
  }
  // As period_sources (src/season/periods.cpp) does in days; here in seconds, for sub-daily series.
  const std::int64_t step = step_seconds(s);
  for (std::size_t i = 0; i < n; ++i) {
    std::int64_t first, last;
    if (marks == DateMarks::start) {
      first = at(i);
      last = first + (i + 1 < n ? std::min(step, at(i + 1) - at(i)) : step);
    } else if (marks == DateMarks::end) {
      last = at(i) + 1;  // the dated second itself, so that the day it names reads it
      first = last - (i > 0 ? std::min(step, at(i) - at(i - 1)) : step);
    } else {
      const std::int64_t half = step / 2;
      first = i > 0 ? std::max(at(i) - half, (at(i - 1) + at(i) + 1) / 2) : at(i) - half;
      last = i + 1 < n ? std::min(at(i) + (step - half), (at(i) + at(i + 1) + 1) / 2) : at(i) + (step - half);
    }
    s.spans.push_back({TimePoint{first}, TimePoint{last}});
  }
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
    CovariateSeries marked;  // a series made by hand, without spans: the default marks
    if (series.spans.size() != series.files.size()) {
      marked = series;
      set_date_marks(marked, DateMarks::start);
    }
    const auto& spans = series.spans.size() == series.files.size() ? series.spans : marked.spans;
    const TimePoint t = TimePoint::from_date(day);
    // The survey day is the midnight that starts it: the span holding that moment.
    const auto after = std::upper_bound(spans.begin(), spans.end(), t,
                                        [](TimePoint v, const auto& span) { return v < span.first; });
    if (after == spans.begin()) {
      m.reason = "survey date before the layers (first " + series.files.front().time.label() + ")";
      return m;
    }
    const int own = static_cast<int>(after - spans.begin()) - 1;
    if (!(t < spans[own].second)) {
      m.reason = after == spans.end()
                     ? "survey date after the layers (last " + series.files.back().time.label() + ")"
                     : "no layer stands for the survey date (between " + series.files[own].time.label() +
                           " and " + series.files[own + 1].time.label() + ")";
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
