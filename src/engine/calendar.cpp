#include "engine/calendar.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <map>

#include "kalends/error.hpp"
#include "kalends/season.hpp"

namespace kalends {

CalendarPeriod CalendarPeriod::parse(const std::string& text, const std::string& option) {
  CalendarPeriod p;
  if (text == "1M" || text == "1m" || text == "month") {
    p.kind = Kind::month;
    return p;
  }
  if (text.size() >= 2 && (text.back() == 'd' || text.back() == 'D')) {
    try {
      std::size_t used = 0;
      const int days = std::stoi(text.substr(0, text.size() - 1), &used);
      if (used == text.size() - 1 && days >= 1 && days <= 366) {
        p.kind = Kind::days;
        p.days = days;
        return p;
      }
    } catch (const std::exception&) {
    }
  }
  throw UsageError(option + " '" + text + "'", "expected 1M or a number of days such as 8d or 16d");
}

int CalendarPeriod::per_year() const {
  if (kind == Kind::month) return 12;
  // A struct filled by hand, not parsed: 0 days had divided by zero.
  if (days < 1 || days > 366)
    throw UsageError("--every '" + std::to_string(days) + "d'", "a period of days must be 1 to 366 days");
  return (365 + days - 1) / days;
}

std::pair<std::int64_t, std::int64_t> CalendarPeriod::span_of_day(std::int64_t day) const {
  const int per = per_year();  // checks the period
  const CivilDate d = civil_from_days(day);
  if (kind == Kind::month) {
    const std::int64_t first = days_from_civil(d.year, d.month, 1);
    return {first, first + days_in_month(d.year, d.month)};
  }
  // N days from 1 January, as many every year; the year's last period runs to 31 December, so
  // day 366 of a leap year is not a period of its own where 365 is a multiple of N.
  const std::int64_t jan1 = days_from_civil(d.year, 1, 1);
  const std::int64_t next_jan1 = days_from_civil(d.year + 1, 1, 1);
  const std::int64_t index = std::min<std::int64_t>((day - jan1) / days, per - 1);
  const std::int64_t first = jan1 + index * days;
  return {first, index == per - 1 ? next_jan1 : first + days};
}

std::string CalendarPeriod::label() const {
  return kind == Kind::month ? "1M" : std::to_string(days) + "d";
}

namespace detail {

std::vector<char> season_days(const TimeGrid& grid, DateMarks marks) {
  // From its date on (start marks), up to it (end) or around it (middle), one step long.
  std::vector<char> season(366, 0);
  const double span_from = marks == DateMarks::start ? 0.0 : marks == DateMarks::end ? 1.0 - grid.step_days
                                                                                      : -grid.step_days / 2;
  for (int slot : grid.slot_of_date) {
    const double date = grid.start.seconds / 86400.0 + grid.slot_days[slot];
    for (double d = std::floor(date + span_from); d < std::floor(date + span_from) + std::max(1.0, grid.step_days); ++d)
      season[std::size_t(day_of_year(civil_from_days(std::int64_t(d))) - 1)] = 1;
  }
  return season;
}

std::string season_label(const TimeGrid& grid, DateMarks marks) {
  const std::vector<char> season = season_days(grid, marks);
  std::string label;
  for (std::size_t d = 0; d < season.size();) {
    if (!season[d]) {
      ++d;
      continue;
    }
    std::size_t e = d;
    while (e + 1 < season.size() && season[e + 1]) ++e;
    label += fmt::format("{}{}-{}", label.empty() ? "" : ",", d + 1, e + 1);
    d = e + 1;
  }
  return label;
}

std::vector<PeriodMean> period_means(const TimeGrid& grid, const CalendarPeriod& period, DateMarks marks) {
  std::vector<PeriodMean> periods;
  if (grid.size == 0) return periods;
  // Calendar day d reads the curve at d - shift: slot times are moved to their composites' middles.
  const double shift = marks == DateMarks::start ? grid.step_days / 2 : marks == DateMarks::end ? -grid.step_days / 2 : 0.0;
  const double start_day = grid.start.seconds / 86400.0 + shift;
  const double first_day = start_day + grid.slot_days.front();
  const double last_day = start_day + grid.slot_days.back();
  const std::vector<char> season = season_days(grid, marks);
  // The calendar covers the days the first and the last composites stand for, by the rule of
  // seasons and extract (composite_spans: from the first's date with start marks, to the end of
  // the last's step or 31 December), not only from the first one's middle to the last one's:
  // beyond those middles the curve is held at the end slot's value. Sub-daily records are
  // instants: their calendar stays between the first and the last.
  std::int64_t first_covered = std::int64_t(std::floor(first_day));
  std::int64_t last_covered = std::int64_t(std::floor(last_day));
  const bool whole_spans = grid.step_days >= 1.0;
  if (whole_spans) {
    std::vector<std::int64_t> dates;
    for (int slot : grid.slot_of_date)
      dates.push_back(std::int64_t(std::floor(grid.start.seconds / 86400.0 + grid.slot_days[slot])));
    const auto spans = composite_spans(dates, std::max<std::int64_t>(1, std::llround(grid.step_days)), marks, 1);
    first_covered = std::min(first_covered, spans.front().first);
    last_covered = std::max(last_covered, spans.back().second - 1);
  }
  std::int64_t day = first_covered;
  while (day <= last_covered) {
    const auto [begin, end] = period.span_of_day(day);
    PeriodMean mean;
    mean.start = TimePoint{begin * 86400};
    mean.end = TimePoint{end * 86400};
    mean.in_season = false;
    for (std::int64_t d = begin; d < end && !mean.in_season; ++d)
      mean.in_season = season[std::size_t(day_of_year(civil_from_days(d)) - 1)] != 0;
    std::map<int, double> weight;
    for (std::int64_t d = begin; d < end; ++d) {
      // A whole day is read at its middle, as a composite stands at the middle of its days: read
      // at 00:00, every period had taken half a day of the period before and left half of its
      // own last day (a daily stack's February read 1.98 where each month held its number).
      // Sub-daily records are instants, and their days are read at 00:00 as before.
      double t = double(d) + (whole_spans ? 0.5 : 0.0) - start_day;  // days since grid start
      if (whole_spans ? d < first_covered || d > last_covered : t < grid.slot_days.front() || t > grid.slot_days.back())
        continue;
      t = std::clamp(t, grid.slot_days.front(), grid.slot_days.back());  // held at the stack's ends
      // A month at the edge of the season: only its days that some composite stands for, not
      // the curve across the gap between seasons.
      if (mean.in_season && !season[std::size_t(day_of_year(civil_from_days(d)) - 1)]) continue;
      const auto upper = std::upper_bound(grid.slot_days.begin(), grid.slot_days.end(), t);
      const int hi = std::min<int>(grid.size - 1, int(upper - grid.slot_days.begin()));
      const int lo = std::max(0, hi - 1);
      const double span = grid.slot_days[hi] - grid.slot_days[lo];
      const double f = span > 0 ? (t - grid.slot_days[lo]) / span : 0.0;
      weight[lo] += 1.0 - f;
      weight[hi] += f;
      ++mean.days;
    }
    if (mean.days > 0) {
      for (const auto& [slot, w] : weight)
        if (w > 0) {
          mean.slots.push_back(slot);
          mean.weights.push_back(w / mean.days);
        }
      for (int s = 0; s < grid.size; ++s) {
        const double t = start_day + grid.slot_days[s];
        if (t >= double(begin) && t < double(end)) mean.slots_inside.push_back(s);
      }
      periods.push_back(std::move(mean));
    }
    day = end;
  }
  return periods;
}

}  // namespace detail
}  // namespace kalends
