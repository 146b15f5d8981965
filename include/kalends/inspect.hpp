// What kalends reads from a stack, before anything is computed: its dates and where they came
// from, the grid and CRS, the value rules (scale, offset, nodata, valid range), the regular time
// grid the temporal methods will use, and per date how much is observed, rejected by the QA
// rule or outside the valid range. So that a user can check a stack is read as intended.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include "kalends/stack.hpp"
#include "kalends/time_grid.hpp"

namespace kalends {

struct InspectRequest {
  std::string input;
  ValueRules rules;
  std::string qa_input, qa_keep;  // both or neither
  int qa_band = 1;
  bool read_values = true;        // false: dates, grid and rules only, no pixel is read
};

struct InspectedLayer {
  Layer layer;
  std::string date_source;  // "file name", "--date", or "band metadata"
  std::int64_t pixels = 0;
  std::int64_t observed = 0;       // a value after nodata, the valid range and the QA rule
  std::int64_t rejected_by_qa = 0;
  std::int64_t outside_valid_range = 0;
  std::optional<double> minimum{}, mean{}, maximum{};  // of the observed values
};

struct InspectReport {
  std::string input, name;
  Grid grid;
  std::string crs_name;  // "WGS 84 / UTM zone 36S (EPSG:32736)", or "" without a CRS
  std::vector<InspectedLayer> layers;
  TimeGrid time_grid;   // as the temporal methods build it
  int slots_with_data = 0;
  bool values_read = false;
  std::int64_t pixels_never_observed = 0;  // when values_read
  /// "scale_factor=10000, add_offset=0" where the first date's metadata states a scaling that
  /// GDAL does not apply (HDF-EOS grids, for one) and none is given; "" otherwise.
  std::string unapplied_scaling;
  std::string date_conflict;  // date_conflict_note (stack.hpp)
  std::string mixed_names;    // mixed_names_note (stack.hpp)
};

/// Opens the stack (and QA stack) as `kalends fill` does, with the same errors, and reads every
/// date's values unless `read_values` is false.
InspectReport inspect_stack(const InspectRequest& request);

}  // namespace kalends
