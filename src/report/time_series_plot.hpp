// Time-series plots of one pixel as inline SVG: observations kept and rejected, the filled
// curve with its +-1 sd band, and the synoptic cycle.
#pragma once

#include <string>
#include <vector>

namespace kalends::detail {

struct PlotDate {
  double day = 0;           // days since 1970-01-01
  double value = 0, sd = 0;  // the filled curve (NaN where none)
  double raw = 0;           // the input observation (NaN where none)
  int flag = 3;
  double synoptic = 0;      // the synoptic mean of the date's period (NaN where none)
};

/// An SVG element (width x height px) with axes, year ticks and a legend.
std::string time_series_svg(const std::vector<PlotDate>& dates, const std::string& unit, int width = 760,
                            int height = 240);

}  // namespace kalends::detail
