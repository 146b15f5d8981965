// A time-ordered set of rasters on one grid, read window by window.
#pragma once

#include <array>
#include <cstdint>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "kalends/block_plan.hpp"
#include "kalends/time.hpp"

namespace kalends {

/// How raw numbers become physical values. Unset fields come from each file.
struct ValueRules {
  std::optional<double> scale, offset, nodata;
  std::optional<double> valid_min, valid_max;  // in physical units; outside -> missing
  int band = 1;                                // for stacks of single-date files
  bool one_date_per_file = false;  // a single multi-band file is one date, not a time series
  std::optional<TimePoint> date;   // the date of files whose names carry none
  std::vector<std::string> exclude;  // files of a pattern to leave out (skipped bad inputs)
};

/// Why a scale factor (`is_scale`) or an offset cannot be a value rule, or "" where it can: not
/// finite, beyond float32's range, or a scale of 0 or below float32's smallest normal number
/// (every value 0). The command line and the job file name the option or key around it.
std::string scale_or_offset_problem(bool is_scale, double value);

struct Grid {
  int width = 0, height = 0;
  std::array<double, 6> geotransform{0, 1, 0, 0, 0, 1};
  bool has_geotransform = false;
  // Empty where the source has none; WGS 84 (EPSG:4326) for a NetCDF grid whose axes CF declares
  // longitude and latitude but that names no grid mapping.
  std::string crs_wkt;
  // AREA_OR_POINT=Point: the values are samples at the cells' centres. GDAL already reports the
  // geotransform of the cells' corners either way; the outputs keep the statement.
  bool pixel_is_point = false;
};

/// The grid of a window of `grid`: its size, and the geotransform moved to its corner.
Grid window_grid(const Grid& grid, const Window& window);

/// One date of a stack: a band of a file.
struct Layer {
  std::string path;  // as given to GDAL (a file name or a connection string)
  int band = 1;
  TimePoint time;
  double scale = 1.0, offset = 0.0;
  std::optional<double> nodata;
  std::string unit;
  // The band's own mask, read with its values: "alpha band" or "mask" (internal or .msk, per
  // band or per file); "" where it has none (or GDAL derives it from nodata).
  std::string own_mask;
  // As stored (GDALDataType); a keep rule is checked against every QA layer's width.
  int data_type = 0;
};

class StackReader;

class Stack {
 public:
  /// `input` is a glob of single-date files (dates from their names), or one multi-band
  /// raster (dates from band descriptions, CF time metadata or GRIB valid times).
  /// Every file is opened and checked here, before any work: unreadable files, mismatched
  /// grids, unparsable or duplicate dates raise InputError naming the file (UsageError naming
  /// the pattern where its files lie on grids none of which most of them share).
  static Stack open(const std::string& input, const ValueRules& rules = {});

  const std::string& input() const noexcept { return input_; }
  const Grid& grid() const noexcept { return grid_; }
  const std::vector<Layer>& layers() const noexcept { return layers_; }
  std::vector<TimePoint> times() const;
  /// The same stack with only the layers whose time is in `keep` (sorted).
  Stack only_times(const std::vector<TimePoint>& keep) const;
  /// A name for outputs: what file names share before their date ("ndvi"), or the variable.
  const std::string& name() const noexcept { return name_; }
  const ValueRules& rules() const noexcept { return rules_; }

  /// A reader owns its GDAL handles; use one per thread.
  std::unique_ptr<StackReader> reader() const;

  /// Dates whose sources disagree (a name's date and the band's CF time axis; a band
  /// description and its DATE item): how many, and the first, described for a note ("" for
  /// none). The name, else the first source in the order of docs/inputs.md, was used.
  int date_conflicts() const noexcept { return date_conflicts_; }
  const std::string& first_date_conflict() const noexcept { return first_date_conflict_; }

  /// InputError naming a file of the stack that was replaced or changed since open: another
  /// command wrote into its folder while this one read it, so what was read may be part old,
  /// part new. Call once everything is read, before the outputs are published.
  void require_unchanged() const;

 private:
  struct FileStamp {
    std::string path;
    std::uint64_t inode = 0;
    std::int64_t size = 0, modified_ns = 0, changed_ns = 0;
  };
  void stamp(const std::vector<std::string>& files);
  std::vector<FileStamp> stamps_;
  int date_conflicts_ = 0;
  std::string first_date_conflict_;
  std::string input_;
  Grid grid_;
  std::vector<Layer> layers_;
  std::string name_;
  ValueRules rules_;
};

class StackReader {
 public:
  explicit StackReader(const Stack& stack);
  ~StackReader();
  StackReader(const StackReader&) = delete;
  StackReader& operator=(const StackReader&) = delete;

  /// Physical values of one date in a window, row-major; NaN where missing (nodata, NaN,
  /// outside the valid range). Returns how many values the valid range removed.
  std::int64_t read_values(std::size_t layer, const Window& window, float* out);
  /// Raw integer values (for QA layers).
  void read_integers(std::size_t layer, const Window& window, std::uint32_t* out);

 private:
  struct Handles;
  const Stack& stack_;
  std::unique_ptr<Handles> handles_;
};

/// Fails with InputError unless both grids are the same (size, geotransform, CRS).
void require_same_grid(const Grid& expected, const Grid& actual, const std::string& where,
                       const std::string& expected_from = "the rest of the stack");

/// The median of the first date's physical values over a central window of at most side x side
/// pixels; NaN where none is finite. A cheap look at what a stack holds (its unit, its scale).
double first_date_median(const Stack& stack, int side);
/// As first_date_median, for the date (layer) `index`.
double date_median(const Stack& stack, std::size_t index, int side);

/// For each layer of `base`, the index of the layer of `other` (a QA stack, a band partner) with
/// the same time. InputError when the grids differ, or naming the base layer's file when it
/// has no partner ("no QA layer for 2004-05-24 in 'qa/*.tif'"; `what` is "QA").
std::vector<std::size_t> partners_by_date(const Stack& base, const Stack& other, const std::string& what);

/// Whether the partner that `reason` (partners_by_date's error) found missing has come since: a
/// file of its pattern whose name holds the date, or, where no name holds a date, a band of the
/// partner stack dated so. A run that left the file out as bad reads it again then, although the
/// file itself is unchanged.
bool partner_now_present(const std::string& reason);

/// "scale_factor=10000, add_offset=0" where the stack's first file states a scaling in its
/// metadata that GDAL leaves unapplied (HDF-EOS grids, for one) and no --scale or --offset is
/// given; "" otherwise. Conventions differ (CF multiplies, MODIS HDF divides), so it is only named.
std::string unapplied_scaling(const Stack& stack);

/// Where the files' own scale, offset or nodata differ between dates (each file is read by its
/// own, which is right for a product whose encoding changed, and wrong where one file's
/// metadata is a slip): the first date that differs from the first date, described for a
/// note; "" where all agree or the rules override them.
std::string mixed_value_rules(const Stack& stack);

/// "dates disagree in 3 bands (first: f.nc band 1: its name says 2020-01-01, its CF time axis
/// 2020-01-02); the name's date, else the first source, was used (docs/inputs.md)", or "".
std::string date_conflict_note(const Stack& stack);

/// "its files have 2 names before their dates (evi: 6 files, ndvi: 12): read as one stack named
/// 'evi', after the first ...", or "" where they share one. A pattern such as 'm/*.tif' over
/// two products had merged them unsaid, and named every output after the first.
std::string mixed_names_note(const Stack& stack);

/// The hidden file a run keeps in each folder while it renames its outputs into place.
inline constexpr const char* half_published_marker = ".kalends-publishing";

/// InputError naming `folder` when a kalends run was killed while renaming its outputs into it
/// (the marker it keeps meanwhile is there): the folder holds some new and some old outputs,
/// which no step should read as one set until the run is done again.
void require_not_half_published(const std::string& folder);

/// Reads the pixel (x, y) of each file's first band once, before a command begins its outputs:
/// InputError naming a file GDAL opens but cannot read (a tiny damaged file declaring 200,000 px
/// a side had made a refused fill write gigabytes of empty tiles as it gave up).
void require_readable(const Stack& stack, int x, int y);

/// UsageError naming `option` ("--qa-band 0") unless `band` is 1 or more (GDAL counts from 1).
void check_band(int band, const std::string& option);

}  // namespace kalends
