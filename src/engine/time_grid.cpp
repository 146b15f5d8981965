#include "kalends/time_grid.hpp"

#include <algorithm>
#include <cmath>

#include "kalends/error.hpp"

namespace kalends {

TimeGrid TimeGrid::build(const std::vector<TimePoint>& times) {
  TimeGrid grid;
  if (times.empty()) return grid;
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

  // Nearest slots, a taken one moving the date on; the largest distance of a date from its slot.
  const auto place = [&](double step_days) {
    grid.slot_of_date.clear();
    grid.slot_of_date.reserve(times.size());
    int previous = -1;
    double farthest = 0;
    for (const TimePoint& t : times) {
      const double offset = (t.seconds - grid.start.seconds) / 86400.0;
      int slot = int(std::lround(offset / step_days));
      if (slot <= previous) slot = previous + 1;
      farthest = std::max(farthest, std::abs(slot * step_days - offset));
      grid.slot_of_date.push_back(slot);
      previous = slot;
    }
    return farthest;
  };
  // A calendar restart moves a year's dates by less than a step (MODIS 16-day: up to 11 days);
  // dates 8 days apart in a 16-day stack push each other on, slot after slot. On the smallest
  // spacing no two dates share a nearest slot.
  // The finer grid is taken only while it stays within kFinestGridFactor slots per date: two
  // scenes minutes apart in a 16-day stack must not make a grid of thousands of empty slots per
  // year; there the median grid stays and the displacement is reported (largest_shift_days).
  constexpr double kFinestGridFactor = 16;  // common practice: a bound on memory, not a published value
  grid.largest_shift_days = place(step);
  if (grid.largest_shift_days >= step) {
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
