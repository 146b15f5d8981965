// Time-series plots of one pixel as inline SVG: observations kept and rejected, the filled
// curve with its +-1 sd band, and the synoptic cycle; or, for a validation, the truth kept and
// withheld beside each method's curve.
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

/// An SVG element (width x height px) with axes, year ticks and a legend; `description` is its
/// accessible name (aria-label). Curves break where the dates leave a season without composites.
std::string time_series_svg(const std::vector<PlotDate>& dates, const std::string& unit,
                            const std::string& description = "", int width = 760, int height = 240);

/// One pixel of a validation: what the input held on each date, and the curves scored on it.
struct ValidationPlot {
  std::vector<double> days;      // days since 1970-01-01
  std::vector<double> truth;     // the input value (NaN where none)
  std::vector<bool> withheld;    // withheld by the validation (truth is then the answer)
  std::vector<std::pair<std::string, std::vector<double>>> curves;  // label, value per date
};

/// An SVG element with the kept observations as dots, the withheld ones as rings, one line per
/// curve (methods solid, a label ending in "baseline" dashed grey) and a legend.
std::string validation_svg(const ValidationPlot& plot, const std::string& unit, const std::string& description = "",
                           int width = 760, int height = 240);

/// Per date, whether the curve breaks before it: the step from the date before is more than
/// 2.5 times the median step (a winter without composites, a season's break).
std::vector<bool> breaks_before(const std::vector<double>& days);

}  // namespace kalends::detail
