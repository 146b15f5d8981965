#include "kalends/time_grid.hpp"

#include <algorithm>

#include <fmt/format.h>
#include <cmath>
#include <cstdint>
#include <set>

#include "kalends/error.hpp"

namespace kalends {

namespace {

// Dates on a few fixed days of every month (dekads on the 1st, 11th and 21st; pentads;
// semi-monthly and monthly products): each day of the month taken in at least two months.
// Such a calendar's short intervals (21 February to 1 March, 8 days in a 10-day calendar) are
// the months' lengths, not dates denser than its step, and over years its drift from the grid
// moves an odd date on by one slot: it keeps its median step.
bool on_fixed_days_of_month(const std::vector<TimePoint>& times) {
  std::set<int> days;
  std::set<std::int64_t> times_of_day;
  for (const TimePoint& t : times) {
    days.insert(t.date().day);
    times_of_day.insert(((t.seconds % 86400) + 86400) % 86400);
  }
  return days.size() <= 6 && times_of_day.size() == 1 && times.size() >= 2 * days.size();
}

}  // namespace

TimeGrid TimeGrid::build(const std::vector<TimePoint>& times) {
  TimeGrid grid;
  if (times.empty()) return grid;
  // A stack's dates always are; a list made by hand may not be (a negative step had followed).
  for (std::size_t i = 1; i < times.size(); ++i)
    if (!(times[i - 1] < times[i]))
      throw UsageError("dates", fmt::format("must be in increasing order without repeats ({} follows {})",
                                            times[i].label(), times[i - 1].label()));
  grid.start = times.front();
  if (times.size() == 1) {
    grid.size = 1;
    grid.slot_of_date = {0};
    grid.slot_days = {0.0};
    return grid;
  }
  std::vector<double> steps;
  for (std::size_t i = 1; i < times.size(); ++i) steps.push_back((times[i].seconds - times[i - 1].seconds) / 86400.0);
  const double smallest = *std::min_element(steps.begin(), steps.end());
  std::nth_element(steps.begin(), steps.begin() + steps.size() / 2, steps.end());
  double step = steps[steps.size() / 2];
  if (step >= 1.0) step = std::round(step);
  grid.median_spacing_days = step;

  // Nearest slots, a taken one moving the date on. Returns how far the grid misstates the time
  // between two dates at most a year apart: |slots apart x step - days apart|, the largest.
  // Measured between dates, not against the grid's nominal times: a composite calendar that
  // restarts on 1 January (MODIS 16-day: 23 composites in 365 days, DOY 353 then DOY 1, 13 days
  // later) drifts from nominal times by about 3 days a year, yet each composite keeps its place
  // in the sequence, and the restart misstates one interval by 3-4 days. Dates 8 days apart in a
  // 16-day stack push each other on, slot after slot: the misstatement grows a whole step.
  // Pairs up to a year or 64 dates apart, whichever is nearer (years of hourly records).
  const auto misstatement = [&](double step_days) {
    double largest = 0;
    for (std::size_t i = 0; i < times.size(); ++i)
      for (std::size_t j = i + 1; j < times.size() && j <= i + 64; ++j) {
        const double apart = (times[j].seconds - times[i].seconds) / 86400.0;
        if (apart > 366) break;
        largest = std::max(largest, std::abs((grid.slot_of_date[j] - grid.slot_of_date[i]) * step_days - apart));
      }
    return largest;
  };
  const auto place = [&](double step_days) {
    grid.slot_of_date.clear();
    grid.slot_of_date.reserve(times.size());
    int previous = -1;
    for (const TimePoint& t : times) {
      const double offset = (t.seconds - grid.start.seconds) / 86400.0;
      int slot = int(std::lround(offset / step_days));
      if (slot <= previous) slot = previous + 1;
      grid.slot_of_date.push_back(slot);
      previous = slot;
    }
    return misstatement(step_days);
  };
  // On the smallest spacing no two dates share a nearest slot.
  // The finer grid is taken only while it stays within kFinestGridFactor slots per date: two
  // scenes minutes apart in a 16-day stack must not make a grid of thousands of empty slots per
  // year; there the median grid stays and the displacement is reported (largest_shift_days).
  constexpr double kFinestGridFactor = 16;  // common practice: a bound on memory, not a published value
  grid.largest_shift_days = place(step);
  // A calendar of fixed days of the month is kept while its misstatement stays near a step
  // (the months' lengths: 10-11 days for dekads over 10-30 years); monthly files followed by
  // dekads, or dekads with extra scenes, misstate by months and take the finer grid.
  grid.fixed_days_of_month = on_fixed_days_of_month(times) && grid.largest_shift_days <= 1.5 * step;
  // A composite calendar that restarts on 1 January runs ahead of the grid by about 3 days a
  // year; where a date is missing (withdrawn, late), the next one's nearest slot after a few
  // years is the missing one's, and the grid misstates that interval by a step: one missing
  // composite had switched a 10-year 8-day record to a 5-day grid, every year's values moved
  // and a --reach run redid every year. Placed from interval to interval instead (each date
  // the number of steps after the one before that its interval is worth), the drift does not
  // add up; taken only where the nearest slots fail, so stacks that fit them keep their grid.
  if (grid.largest_shift_days >= step && !grid.fixed_days_of_month) {
    const std::vector<int> nearest = grid.slot_of_date;
    const double nearest_shift = grid.largest_shift_days;
    grid.slot_of_date.assign(1, 0);
    for (std::size_t i = 1; i < times.size(); ++i) {
      const double apart = (times[i].seconds - times[i - 1].seconds) / 86400.0;
      grid.slot_of_date.push_back(grid.slot_of_date.back() + std::max(1, int(std::lround(apart / step))));
    }
    const double largest = misstatement(step);
    if (largest < step) {
      grid.placed_by_intervals = true;
      grid.largest_shift_days = largest;
    } else {
      grid.slot_of_date = nearest;
      grid.largest_shift_days = nearest_shift;
    }
  }
  if (grid.largest_shift_days >= step && !grid.fixed_days_of_month) {
    const double finer = smallest >= 1.0 ? std::floor(smallest) : smallest;
    const double span = (times.back().seconds - times.front().seconds) / 86400.0;
    if (span / finer + 1 <= kFinestGridFactor * double(times.size())) {
      step = finer;
      grid.from_smallest_spacing = true;
      grid.largest_shift_days = place(step);
    }
  }
  grid.step_days = step;
  grid.size = grid.slot_of_date.back() + 1;
  grid.slot_days.resize(grid.size);
  for (int s = 0; s < grid.size; ++s) grid.slot_days[s] = s * step;
  for (std::size_t i = 0; i < times.size(); ++i)
    grid.slot_days[grid.slot_of_date[i]] = (times[i].seconds - grid.start.seconds) / 86400.0;
  // Placed by intervals, a slot between two dates lies evenly between them: start + slot x step
  // may be days or months off after years of drift, out of order with the dates beside it.
  if (grid.placed_by_intervals)
    for (std::size_t i = 1; i < times.size(); ++i) {
      const int a = grid.slot_of_date[i - 1], b = grid.slot_of_date[i];
      for (int s = a + 1; s < b; ++s)
        grid.slot_days[s] = grid.slot_days[a] + (grid.slot_days[b] - grid.slot_days[a]) * (s - a) / (b - a);
    }
  return grid;
}

TimePoint TimeGrid::slot_time(int slot) const {
  return TimePoint{start.seconds + std::int64_t(std::llround(slot_days.at(slot) * 86400.0))};
}

bool in_year_slice(int year, double day, double reach_days) {
  return day >= double(days_from_civil(year, 1, 1)) - reach_days &&
         day < double(days_from_civil(year + 1, 1, 1)) + reach_days;
}

std::vector<int> years_reached(double day, double reach_days) {
  const int first = civil_from_days(std::int64_t(std::floor(day - reach_days))).year - 1;
  const int last = civil_from_days(std::int64_t(std::floor(day + reach_days))).year + 1;
  std::vector<int> years;
  for (int year = first; year <= last; ++year)
    if (in_year_slice(year, day, reach_days)) years.push_back(year);
  return years;
}

}  // namespace kalends
