// The regular time axis on which the temporal methods work.
#pragma once

#include <vector>

#include "kalends/time.hpp"

namespace kalends {

/// Dates placed on a regular grid of the stack's typical step. Slots without a date carry zero
/// weight, so long gaps and year breaks keep their true length.
struct TimeGrid {
  TimePoint start;
  double step_days = 1.0;
  /// The step is the smallest spacing, not the median: at the median, dates of mixed or
  /// irregular spacing (8- and 16-day composites) would have moved a whole step or more.
  bool from_smallest_spacing = false;
  double median_spacing_days = 0;
  /// The dates lie on a few fixed days of every month (dekads): the median step is kept.
  bool fixed_days_of_month = false;
  /// Each date placed the number of steps after the one before that their interval is worth
  /// (where nearest slots would misstate an interval by a step: a composite calendar drifting
  /// from the grid, a date missing); a slot between two dates then lies evenly between them.
  bool placed_by_intervals = false;
  /// How far, in days, the grid misstates the time between two dates at most a year (and 64
  /// dates) apart: |slots apart x step - days apart|, the largest such.
  double largest_shift_days = 0;
  int size = 0;
  std::vector<int> slot_of_date;   // for each input date (sorted), its slot
  std::vector<double> slot_days;   // days since `start`: the true date where a slot holds one,
                                   // else evenly between its dates where placed by intervals,
                                   // else start + slot * step

  /// `times` must be sorted and distinct. The step is the median spacing, in whole days where
  /// it is a day or more. A date is put in its nearest slot; a date whose nearest slot is
  /// taken (a composite calendar restarting on 1 January) moves to the next free one. Where the
  /// grid would then misstate the time between two dates by a whole step or more
  /// (largest_shift_days), dates are placed by intervals (placed_by_intervals); where that
  /// misstates a step too, the step is the smallest spacing instead (whole days, rounded down),
  /// on which every date has a slot of its own, if that needs at most 16 slots per date. A
  /// calendar of a few fixed days of every month (dekads: 1st, 11th, 21st) keeps its median step.
  static TimeGrid build(const std::vector<TimePoint>& times);
  TimePoint slot_time(int slot) const;
};

/// With a reach of D days, calendar year Y is filled from the days [1 Jan Y - D, 1 Jan Y+1 + D):
/// whether `day` (days since 1970-01-01) lies in that slice.
bool in_year_slice(int year, double day, double reach_days);

/// The years whose slices hold `day`: those a composite of that day changes.
std::vector<int> years_reached(double day, double reach_days);

}  // namespace kalends
