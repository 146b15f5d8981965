// Regular calendar periods and the weights that turn a curve on the time grid into period
// means.
#pragma once

#include <string>
#include <vector>

#include "kalends/fill.hpp"
#include "kalends/time_grid.hpp"

namespace kalends::detail {

struct PeriodMean {
  TimePoint start;           // first day of the period
  TimePoint end;             // first day after it
  int days = 0;              // days of the period the mean is over (covered by the grid, in season)
  std::vector<int> slots;    // slots the mean draws on
  std::vector<double> weights;  // summing to 1
  std::vector<int> slots_inside;  // slots whose date falls inside the period
  /// Whether some composite, of any year, stands for a day of the year this period covers. A
  /// stack of summers alone has no winter: its winter periods are left empty, not filled from
  /// the curve across the gap.
  bool in_season = true;
};

/// The days of the year (index 0 = day 1, 366 entries) that some composite, of any year,
/// stands for: the stack's season, on which every year's calendar periods depend.
std::vector<char> season_days(const TimeGrid& grid, DateMarks marks);
/// The same as day-of-year ranges ("145-272"), to tell whether a run's season differs from an
/// earlier run's.
std::string season_label(const TimeGrid& grid, DateMarks marks);

/// Periods from the one holding the first composite to the one holding the last. Each
/// period's value is the day-weighted mean of the curve interpolated linearly between slots,
/// over the days the grid covers and, at the edges of a season, that some composite stands
/// for. A slot's value stands for the middle of its composite: half a step after its date when
/// the dates mark starts, half a step before when they mark ends.
std::vector<PeriodMean> period_means(const TimeGrid& grid, const CalendarPeriod& period,
                                     DateMarks marks = DateMarks::middle);

}  // namespace kalends::detail
