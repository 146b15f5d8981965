// How far a temporal method may reach into a gap. Beyond that a fitted curve is the smoother's
// extrapolation (linear for a second-order penalty, wild for harmonics), not information, so
// the slot is left unfilled (flag 3) rather than given a made-up value.
#pragma once

#include <cstdint>
#include <span>

#include "kalends/time_grid.hpp"

namespace kalends::detail {

/// Sets fitted and sd to NaN at every slot that lies in a gap between kept observations
/// longer than `max_gap_days` (<= 0: no limit), or before the first / after the last kept
/// observation by more than `max_extrapolation_days` (< 0: no limit). Kept = weight > 0 and
/// not rejected.
void limit_gaps(const TimeGrid& grid, std::span<const float> weights,
                std::span<const std::uint8_t> rejected, double max_gap_days,
                double max_extrapolation_days, std::span<float> fitted, std::span<float> sd);

}  // namespace kalends::detail
