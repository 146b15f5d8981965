// Calendar periods and the composites that feed them.
#include <algorithm>
#include <cmath>
#include <cstdio>

#include <fmt/format.h>
#include <fmt/ranges.h>

#include "kalends/error.hpp"

#include "kalends/season.hpp"

namespace kalends {

std::string month_end_note(const std::string& option) {
  return "the input dates are the last days of their months: read as month ends, each standing for the month it "
         "closes (as CF files stamp monthly means); give " + option + " if each stands for the month after";
}

DateMarks resolve_date_marks(DateMarks given, const std::vector<TimePoint>& dates) {
  if (given != DateMarks::automatic) return given;
  return dates_at_month_ends(dates) ? DateMarks::end : dates_at_month_middles(dates) ? DateMarks::middle : DateMarks::start;
}

namespace {

// Whether the dates are a month apart or more and nine in ten of them at least are `at` their
// month's day.
template <typename At>
bool monthly_dates(const std::vector<TimePoint>& dates, At at) {
  if (dates.size() < 2) return false;
  std::size_t count = 0;
  for (std::size_t i = 0; i < dates.size(); ++i) {
    count += at(dates[i].date());
    // Months apart: 26 days or more, so that a February stamped a day early (27 days after 31
    // January) still counts.
    if (i > 0 && dates[i].days() - dates[i - 1].days() < 26) return false;
  }
  // Nine in ten: a monthly stack with one stamp a day early (29 June, or 28 February of a leap
  // year) is still one of month ends; all or nothing, it had been read as starts, every month
  // taken for the month after, without a note.
  return 10 * count >= 9 * dates.size();
}

}  // namespace

bool dates_at_month_ends(const std::vector<TimePoint>& dates) {
  return monthly_dates(dates, [](const CivilDate& d) { return d.day == days_in_month(d.year, d.month); });
}

bool dates_at_month_middles(const std::vector<TimePoint>& dates) {
  // The middle of a month's time bounds falls on its 15th or 16th (the 14th or 15th in
  // February); a day either side is allowed as for month ends.
  return monthly_dates(dates, [](const CivilDate& d) { return d.day >= 14 && d.day <= 16; });
}

std::string monthly_marks_note(const std::vector<TimePoint>& dates, const std::string& option) {
  if (dates_at_month_ends(dates)) return month_end_note(option);
  if (dates_at_month_middles(dates))
    return "the input dates are the middles of their months: read as middles, each standing for the days around "
           "it (as CF files stamp monthly means at the middle of their time bounds); give " + option +
           " if each stands for the days after it";
  return "";
}

DateMarks parse_date_marks(const std::string& text) {
  if (text == "auto") return DateMarks::automatic;
  if (text == "start") return DateMarks::start;
  if (text == "middle") return DateMarks::middle;
  if (text == "end") return DateMarks::end;
  throw UsageError("--date-marks '" + text + "'", "expected auto, start, middle or end");
}

std::pair<int, int> parse_years(const std::string& text) {
  int a = 0, b = 0;
  char dash = 0, extra = 0;
  if (std::sscanf(text.c_str(), "%d%c%d%c", &a, &dash, &b, &extra) == 3 && dash == '-' && a <= b) return {a, b};
  if (std::sscanf(text.c_str(), "%d%c", &a, &extra) == 1) return {a, a};
  throw UsageError("--years '" + text + "'", "expected YYYY or YYYY-YYYY (first year first)");
}

std::vector<Period> periods_of_year(int year, const CalendarPeriod& calendar) {
  std::vector<Period> periods;
  const std::int64_t jan1 = days_from_civil(year, 1, 1), next = days_from_civil(year + 1, 1, 1);
  // As many every year (a layer has a band each), by the rule of span_of_day: where 365 is a
  // multiple of N (1, 5, 73 days) a leap year's 31 December had been a period of its own, which
  // moved every later year's periods along by one.
  for (std::int64_t day = jan1; day < next;) {
    const auto [first, after] = calendar.span_of_day(day);
    periods.push_back({first, int(after - first)});
    day = after;
  }
  return periods;
}

std::int64_t median_spacing(const std::vector<std::int64_t>& at, std::int64_t fallback) {
  if (at.size() < 2) return fallback;
  std::vector<std::int64_t> gaps;
  for (std::size_t i = 1; i < at.size(); ++i) gaps.push_back(at[i] - at[i - 1]);
  std::nth_element(gaps.begin(), gaps.begin() + gaps.size() / 2, gaps.end());
  return std::max<std::int64_t>(1, gaps[gaps.size() / 2]);
}

bool restarts_each_year(const std::vector<std::int64_t>& at, std::int64_t step, std::int64_t units_per_day) {
  if (at.size() < 2 || units_per_day <= 0 || step % units_per_day != 0) return false;
  const std::int64_t step_days = step / units_per_day;
  if (step_days < 2 || step_days > 183) return false;
  for (std::int64_t t : at) {
    if (t % units_per_day != 0) return false;  // a time of day: not a composite's date
    const std::int64_t day = t / units_per_day;
    if ((day_of_year(civil_from_days(day)) - 1) % step_days != 0) return false;
  }
  return true;
}

std::vector<std::pair<std::int64_t, std::int64_t>> composite_spans(const std::vector<std::int64_t>& at,
                                                                   std::int64_t step, DateMarks marks,
                                                                   std::int64_t units_per_day) {
  const std::size_t n = at.size();
  std::vector<std::pair<std::int64_t, std::int64_t>> spans(n);
  // Composites whose calendar restarts every 1 January (MODIS: days of year 1, 9, 17, ... or 1,
  // 17, 33, ...): the last of a year ends on 31 December. Without the next year's first
  // composite (a year missing, the stack's end) it had stood for the next year's first days.
  const bool yearly = marks == DateMarks::start && restarts_each_year(at, step, units_per_day);
  for (std::size_t i = 0; i < n; ++i) {
    std::int64_t first, last;
    if (marks == DateMarks::start) {
      first = at[i];
      last = first + (i + 1 < n ? std::min(step, at[i + 1] - at[i]) : step);
      if (yearly) {
        const CivilDate date = civil_from_days(first / units_per_day);
        last = std::min(last, days_from_civil(date.year + 1, 1, 1) * units_per_day);
      }
    } else if (marks == DateMarks::end) {
      last = at[i] + 1;
      first = last - (i > 0 ? std::min(step, at[i] - at[i - 1]) : step);
    } else {
      const std::int64_t half = step / 2;
      first = i > 0 ? std::max(at[i] - half, (at[i - 1] + at[i] + 1) / 2) : at[i] - half;
      last = i + 1 < n ? std::min(at[i] + (step - half), (at[i] + at[i + 1] + 1) / 2) : at[i] + (step - half);
    }
    spans[i] = {first, last};
  }
  return spans;
}

std::vector<PeriodSources> period_sources(const std::vector<TimePoint>& dates,
                                          const std::vector<Period>& periods, DateMarks marks) {
  std::vector<PeriodSources> sources(periods.size());
  const std::size_t n = dates.size();
  if (n == 0) return sources;
  std::vector<std::int64_t> day(n);
  for (std::size_t i = 0; i < n; ++i) day[i] = std::int64_t(std::floor(dates[i].days()));
  // Sub-daily records (two on one day: hourly temperature) are instants, not composites: each
  // counts once, equally, in the period holding it. Spans of whole days would give a day to its
  // last record alone.
  bool sub_daily = false;
  for (std::size_t i = 1; i < n; ++i) sub_daily = sub_daily || day[i] == day[i - 1];
  if (sub_daily) {
    for (std::size_t i = 0; i < n; ++i)
      for (std::size_t p = 0; p < periods.size(); ++p)
        if (day[i] >= periods[p].first_day && day[i] < periods[p].first_day + periods[p].days) {
          sources[p].composite.push_back(int(i));
          sources[p].days.push_back(1.0);
        }
    return sources;
  }
  const auto spans = composite_spans(day, median_spacing(day, 1), marks, 1);
  for (std::size_t i = 0; i < n; ++i) {
    const auto [first, last] = spans[i];  // the days [first, last) the composite stands for
    for (std::size_t p = 0; p < periods.size(); ++p) {
      const std::int64_t a = std::max(first, periods[p].first_day);
      const std::int64_t b = std::min(last, periods[p].first_day + periods[p].days);
      if (b > a) {
        sources[p].composite.push_back(int(i));
        sources[p].days.push_back(double(b - a));
      }
    }
  }
  return sources;
}

std::vector<int> years_without_composite(const std::vector<PeriodSources>& sources, int first_year,
                                         int periods_per_year) {
  std::vector<int> years;
  const int count = periods_per_year > 0 ? int(sources.size()) / periods_per_year : 0;
  for (int y = 0; y < count; ++y) {
    bool any = false;
    for (int q = 0; q < periods_per_year; ++q) any = any || !sources[std::size_t(y) * periods_per_year + q].days.empty();
    if (!any) years.push_back(first_year + y);
  }
  if (count > 0 && int(years.size()) == count)
    throw UsageError("--years", count == 1 ? fmt::format("no composite stands for any day of {}", first_year)
                                           : fmt::format("no composite stands for any day of {}-{}", first_year,
                                                         first_year + count - 1));
  return years;
}

std::string years_without_composite_note(const std::vector<int>& years) {
  if (years.empty()) return "";
  return fmt::format("no composite stands for any day of {}: the layers of {} are empty", fmt::join(years, ", "),
                     years.size() == 1 ? "that year" : "those years");
}

}  // namespace kalends
