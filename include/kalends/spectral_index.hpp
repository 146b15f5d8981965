// Vegetation indices from band stacks.
#pragma once

#include <optional>
#include <map>
#include <string>

#include "kalends/fill.hpp"
#include "kalends/stack.hpp"

namespace kalends {

enum class SpectralIndex { ndvi, evi };

/// NDVI = (NIR - red) / (NIR + red) (Tucker 1979, Remote Sens. Environ. 8:127; reference from
/// memory).
/// EVI = 2.5 (NIR - red) / (NIR + 6 red - 7.5 blue + 1) on reflectances (Huete et al. 2002,
/// Remote Sens. Environ. 83:195). A zero denominator or a result outside [-1, 1] is missing.
float spectral_index(SpectralIndex kind, float red, float nir, float blue);

struct IndexRequest {
  std::string red, nir, blue;  // stacks (globs or files); blue only for EVI
  int red_band = 1, nir_band = 1, blue_band = 1;
  /// Where a role's band was not given, an input that is one file with a dated band per date (a
  /// NetCDF time axis) is read date by date; otherwise band 1 of each file.
  bool red_band_given = false, nir_band_given = false, blue_band_given = false;
  SpectralIndex kind = SpectralIndex::ndvi;
  ValueRules rules;       // scale, offset, nodata overrides for all bands
  /// An input's own rules where they differ (a job's inputs each carry theirs): "red", "nir", "blue".
  std::map<std::string, ValueRules> rules_of;
  std::string qa;         // QA stack to pass through to out_dir/qa/
  int qa_band = 1;        // its band in each file (a job input's qa_band)
  std::string out_dir;
  std::string name;       // default "ndvi" / "evi"
  int threads = 0;
  /// Only read the inputs' headers and pair their dates (red, near-infrared, blue, QA), then
  /// return an empty summary; nothing is made (a job run checks its index steps so before the
  /// first step, and --dry-run says which would fail).
  bool check_only = false;
  Compression compression = Compression::deflate;
  std::string command_line;
  bool keep_unchanged = false;
  /// Compute only this window of the input's pixel grid (a tile, a shard's strip): outputs
  /// cover the window and are georeferenced as it.
  std::optional<Window> region;
};

struct IndexSummary {
  int outputs_written = 0, outputs_unchanged = 0;
  std::vector<std::string> outputs;  // every raster this run wrote or left unchanged
  int dates = 0;
  std::int64_t pixels = 0, missing = 0;
  std::string out_dir;
  std::vector<std::string> notes;  // on the data (values that look like digital numbers)
};

/// The checks that need no file (an output folder, red and near-infrared, blue for EVI);
/// UsageError naming the option. run_index calls it first.
void check_index_options(const IndexRequest& request);

IndexSummary run_index(const IndexRequest& request);

}  // namespace kalends
