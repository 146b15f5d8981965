// Regular calendar periods and the weights that turn a curve on the time grid into period
// means.
#pragma once

#include <vector>

#include "kalends/fill.hpp"
#include "kalends/time_grid.hpp"

namespace kalends::detail {

struct PeriodMean {
  TimePoint start;           // first day of the period
  int days = 0;              // days of the period covered by the grid
  std::vector<int> slots;    // slots the mean draws on
  std::vector<double> weights;  // summing to 1
  std::vector<int> slots_inside;  // slots whose date falls inside the period
};

/// Periods from the one holding the first grid date to the one holding the last. Each
/// period's value is the day-weighted mean of the curve interpolated linearly between slots,
/// over the days the grid covers.
std::vector<PeriodMean> period_means(const TimeGrid& grid, const CalendarPeriod& period);

}  // namespace kalends::detail
