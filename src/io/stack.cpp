#include "kalends/stack.hpp"

#include <fnmatch.h>
#include <glob.h>
#include <fcntl.h>
#include <sys/file.h>
#include <sys/stat.h>
#include <unistd.h>
#include <cpl_string.h>
#include <cpl_vsi.h>
#include <ogr_spatialref.h>

#include <algorithm>
#include <cmath>
#include <cstring>
#include <limits>
#include <filesystem>
#include <fmt/format.h>
#include <fmt/ranges.h>
#include <map>
#include <set>
#include <optional>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/lock_probe.hpp"
#include "io/majority.hpp"
#include "kalends/error.hpp"
#include "kalends/tiles.hpp"

namespace kalends {

namespace detail {

bool has_glob_characters(const std::string& text) { return text.find_first_of("*?[") != std::string::npos; }

std::string glob_escape(const std::string& literal) {
  std::string out;
  for (char c : literal) {
    if (c == '*' || c == '?' || c == '[' || c == '\\') out += '\\';
    out += c;
  }
  return out;
}

namespace {
thread_local std::string glob_failure;  // the folder glob could not read, and why
int note_glob_failure(const char* path, int error) {
  glob_failure = std::string(path) + ": " + std::strerror(error);
  return 1;  // stop, as GLOB_ERR does
}
}  // namespace

// A pattern inside GDAL's virtual file systems (/vsizip/z.zip/ndvi_*.tif, /vsitar/...): its
// last part matched against the entries GDAL lists there (the shell's glob sees no such folder
// and had said it did not exist). The folder part must be a plain path.
std::optional<std::vector<std::string>> expand_virtual_glob(const std::string& pattern) {
  if (pattern.rfind("/vsi", 0) != 0) return std::nullopt;
  // /vsigzip/ wraps one local file: the pattern is the local files'.
  if (pattern.rfind("/vsigzip/", 0) == 0) {
    std::vector<std::string> paths = expand_glob(pattern.substr(9));
    for (std::string& path : paths) path = "/vsigzip/" + path;
    return paths;
  }
  const auto slash = pattern.find_last_of('/');
  const std::string folder = pattern.substr(0, slash), name = pattern.substr(slash + 1);
  if (has_glob_characters(folder))
    throw InputError(pattern, "inside " + folder.substr(0, folder.find('/', 1) + 1) +
                                  " only the file name may hold a pattern; give the folder without wildcards");
  start_gdal();
  VSIStatBufL status;
  if (VSIStatL(folder.c_str(), &status) != 0)
    throw InputError(pattern, "no file matches this pattern: " + folder + " cannot be read (no such archive, or not one "
                              "GDAL opens?)");
  char** entries = VSIReadDir(folder.c_str());
  std::vector<std::string> paths;
  for (int i = 0; entries && entries[i]; ++i)
    if (::fnmatch(name.c_str(), entries[i], FNM_PERIOD) == 0) paths.push_back(folder + "/" + entries[i]);
  CSLDestroy(entries);
  if (paths.empty()) throw InputError(pattern, "no file matches this pattern (listed inside " + folder + ")");
  std::sort(paths.begin(), paths.end());
  return paths;
}

std::vector<std::string> expand_glob(const std::string& pattern) {
  if (auto virtual_paths = expand_virtual_glob(pattern)) return *virtual_paths;
  glob_t result{};
  glob_failure.clear();
  const int status = ::glob(pattern.c_str(), GLOB_ERR, note_glob_failure, &result);
  std::vector<std::string> paths;
  if (status == 0)
    for (std::size_t i = 0; i < result.gl_pathc; ++i) paths.emplace_back(result.gl_pathv[i]);
  globfree(&result);
  // The pattern's folder where it is a plain path (no glob characters), for the messages below.
  std::filesystem::path folder = std::filesystem::path(pattern).parent_path();
  if (has_glob_characters(folder.string())) folder.clear();
  std::error_code ec;
  if (status == GLOB_NOMATCH || (status == 0 && paths.empty())) {
    // "survey[2021]/*.tif": the brackets are a glob's character class, matching one character.
    if (pattern.find('[') != std::string::npos && pattern.find(']') != std::string::npos)
      throw InputError(pattern, "no file matches this pattern ([...] matches one character of a set; a folder "
                                "or file name with brackets needs each written as [[] and []])");
    // "ndvi.tif/*.tif": the folder part is a file.
    if (!folder.empty() && std::filesystem::is_regular_file(folder, ec))
      throw InputError(pattern, "no file matches this pattern: " + folder.string() + " is a file, not a folder");
    throw InputError(pattern, "no file matches this pattern");
  }
  if (status != 0) {
    // GLOB_ERR stops at a folder it cannot read: say which, when the pattern's folder is missing.
    if (!folder.empty() && !std::filesystem::exists(folder, ec))
      throw InputError(pattern, "no file matches this pattern: the folder " + folder.string() + " does not exist");
    throw InputError(pattern, "cannot list the files of this pattern" +
                                  (glob_failure.empty() ? std::string() : " (" + glob_failure + ")"));
  }
  std::sort(paths.begin(), paths.end());
  return paths;
}

std::optional<ConnectionPattern> connection_parts(const std::string& input) {
  const auto open = input.find('"');
  if (open == std::string::npos || open == 0 || input[open - 1] != ':') return std::nullopt;
  const auto close = input.find('"', open + 1);
  if (close == std::string::npos) return std::nullopt;
  return ConnectionPattern{input.substr(0, open + 1), input.substr(open + 1, close - open - 1), input.substr(close)};
}

std::string file_in_connection(const std::string& path) {
  const auto parts = connection_parts(path);
  return parts ? parts->files : path;
}

std::optional<ConnectionPattern> connection_pattern(const std::string& input) {
  auto parts = connection_parts(input);
  if (!parts || !has_glob_characters(parts->files) || std::filesystem::exists(parts->files))
    return std::nullopt;
  return parts;
}

std::string ConnectionPattern::variable() const {
  std::string last = suffix.substr(suffix.rfind(':') == std::string::npos ? suffix.size() : suffix.rfind(':') + 1);
  std::string name;
  for (char c : last) {
    if (std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '.')
      name += c;
    else if (c != '"' && !name.empty() && name.back() != '_')
      name += '_';
  }
  while (!name.empty() && name.back() == '_') name.pop_back();
  return name;
}

void walk_on(std::filesystem::recursive_directory_iterator& it) {
  const std::filesystem::path at = it->path();
  std::error_code ec;
  const bool into = it->is_directory(ec) && it.recursion_pending();
  it.increment(ec);
  if (ec) throw InputError((into ? at : at.parent_path()).string(), "cannot read this folder: " + ec.message());
}

std::vector<std::string> files_below(const std::string& folder) {
  std::vector<std::string> files;
  std::error_code ec;
  if (!std::filesystem::exists(folder)) return files;
  for (auto it = std::filesystem::recursive_directory_iterator(folder, ec); it != std::filesystem::recursive_directory_iterator();
       walk_on(it))
    if (it->is_regular_file() && it->path().filename().string().front() != '.') files.push_back(it->path().string());
  std::sort(files.begin(), files.end());
  return files;
}

}  // namespace detail

namespace {

namespace fs = std::filesystem;

std::string wkt_of(const OGRSpatialReference& srs) {
  std::string out;
  char* wkt = nullptr;
  const char* options[] = {"FORMAT=WKT2_2018", nullptr};
  if (srs.exportToWkt(&wkt, options) == OGRERR_NONE && wkt) out = wkt;
  CPLFree(wkt);
  return out;
}

// CF conventions (section 4.1 and 4.2; section 5.6: a grid whose coordinate variables are
// longitude and latitude needs no grid mapping) declare such axes by standard_name or by units.
// GDAL's netCDF driver reads them into a geotransform but, without a grid_mapping variable,
// gives no CRS. The datum is then unstated; WGS 84 is the usual reading (common practice).
bool has_cf_longitude_latitude_axes(GDALDataset& dataset, const Grid& grid) {
  if (!grid.has_geotransform || grid.geotransform[2] != 0 || grid.geotransform[4] != 0)
    return false;
  static const char* longitude_units[] = {"degrees_east", "degree_east", "degrees_E", "degree_E",
                                          "degreesE", "degreeE"};
  static const char* latitude_units[] = {"degrees_north", "degree_north", "degrees_N", "degree_N",
                                         "degreesN", "degreeN"};
  bool longitude = false, latitude = false;
  if (char** items = dataset.GetMetadata())
    for (int i = 0; items[i]; ++i) {
      const std::string item = items[i];
      const auto hash = item.find('#'), equals = item.find('=');
      if (hash == std::string::npos || equals == std::string::npos || equals < hash) continue;
      const std::string key = item.substr(hash + 1, equals - hash - 1), value = item.substr(equals + 1);
      if (key == "standard_name") {
        longitude = longitude || value == "longitude";
        latitude = latitude || value == "latitude";
      } else if (key == "units") {
        for (const char* u : longitude_units) longitude = longitude || value == u;
        for (const char* u : latitude_units) latitude = latitude || value == u;
      }
    }
  if (!longitude || !latitude) return false;
  // Projected x, y in metres would lie outside these ranges; 2-D auxiliary lat/lon variables
  // beside such axes must not make the grid geographic.
  const auto& g = grid.geotransform;
  const double x0 = g[0], x1 = g[0] + g[1] * grid.width, y0 = g[3], y1 = g[3] + g[5] * grid.height;
  const auto within = [](double v, double low, double high) { return v >= low && v <= high; };
  return within(x0, -360, 360) && within(x1, -360, 360) && within(y0, -90.5, 90.5) &&
         within(y1, -90.5, 90.5);
}

// A raster placed by ground control points alone: a fill or seasons would write its outputs as
// a bare pixel grid (outputs carry a geotransform, not GCPs) and would not see dates whose points
// differ. `kalends grid` warps such a file itself.
void require_no_control_points(GDALDataset& dataset, const std::string& where) {
  double unused[6];
  if (dataset.GetGCPCount() > 0 && dataset.GetGeoTransform(unused) != CE_None)
    throw InputError(where, "is placed by ground control points (GCPs), not a geotransform: kalends would write its "
                            "outputs without georeferencing; put it on a grid first (kalends grid, or gdalwarp)");
}

Grid grid_of(GDALDataset& dataset) {
  Grid grid;
  grid.width = dataset.GetRasterXSize();
  grid.height = dataset.GetRasterYSize();
  grid.has_geotransform = dataset.GetGeoTransform(grid.geotransform.data()) == CE_None;
  if (!grid.has_geotransform) grid.geotransform = {0, 1, 0, 0, 0, 1};
  // Found by fuzzing the inputs: a pixel size of 0 or a NaN origin had been written into the
  // outputs, and extract then put every point outside the layer with a hint of swapped axes.
  const auto& g = grid.geotransform;
  if (grid.has_geotransform &&
      (!std::all_of(g.begin(), g.end(), [](double v) { return std::isfinite(v); }) || g[1] * g[5] - g[2] * g[4] == 0))
    throw InputError(dataset.GetDescription(),
                     fmt::format("has a geotransform that places no pixel ({:g}, {:g}, {:g}, {:g}, {:g}, {:g}): a "
                                 "damaged header? Mend it (gdal_edit.py -a_ullr) or remove the file",
                                 g[0], g[1], g[2], g[3], g[4], g[5]));
  if (const char* area_or_point = dataset.GetMetadataItem(GDALMD_AREA_OR_POINT))
    grid.pixel_is_point = EQUAL(area_or_point, GDALMD_AOP_POINT);
  if (const OGRSpatialReference* srs = dataset.GetSpatialRef()) {
    grid.crs_wkt = wkt_of(*srs);
  } else if (has_cf_longitude_latitude_axes(dataset, grid)) {
    OGRSpatialReference wgs84;
    if (wgs84.importFromEPSG(4326) == OGRERR_NONE) grid.crs_wkt = wkt_of(wgs84);
  }
  return grid;
}

std::string band_where(const std::string& path, int band);

Layer layer_of(GDALDataset& dataset, const std::string& path, int band_index, TimePoint time,
               const ValueRules& rules) {
  GDALRasterBand* band = dataset.GetRasterBand(band_index);
  Layer layer;
  layer.path = path;
  layer.band = band_index;
  layer.time = time;
  int has = 0;
  const double scale = band->GetScale(&has);
  layer.scale = rules.scale.value_or(has ? scale : 1.0);
  const double offset = band->GetOffset(&has);
  layer.offset = rules.offset.value_or(has ? offset : 0.0);
  // Found by fuzzing the inputs: a stored scale of NaN or inf, or 0, had made the date wholly
  // missing (or wholly 0) with exit 0 and only a note that the files' rules differ.
  if (!rules.scale && !(std::isfinite(layer.scale) && layer.scale != 0))
    throw InputError(band_where(path, band_index),
                     fmt::format("stores a scale factor of {:g}, which gives no values; give --scale to override it",
                                 layer.scale));
  if (!rules.offset && !std::isfinite(layer.offset))
    throw InputError(band_where(path, band_index),
                     fmt::format("stores an offset of {:g}, which gives no values; give --offset to override it",
                                 layer.offset));
  // Complex pixels had been read as their real part, without a word: no index or temperature
  // has an imaginary part, so the file is not what it was taken for.
  if (GDALDataTypeIsComplex(band->GetRasterDataType()))
    throw InputError(band_where(path, band_index),
                     fmt::format("holds complex numbers ({}); kalends reads real values only",
                                 GDALGetDataTypeName(band->GetRasterDataType())));
  const double nodata = band->GetNoDataValue(&has);
  // A --nodata no stored value can equal (-3000 on bytes, 0.5 on integers) marks nothing.
  if (const GDALDataType type = band->GetRasterDataType();
      rules.nodata && GDALDataTypeIsInteger(type) && !GDALDataTypeIsComplex(type)) {
    const int bits = GDALGetDataTypeSizeBits(type);
    const bool is_signed = GDALDataTypeIsSigned(type) || detail::holds_signed_bytes(*band);
    const double low = is_signed ? -std::ldexp(1.0, bits - 1) : 0.0;
    const double high = is_signed ? std::ldexp(1.0, bits - 1) - 1 : std::ldexp(1.0, bits) - 1;
    if (std::isnan(*rules.nodata) || *rules.nodata < low || *rules.nodata > high ||
        *rules.nodata != std::floor(*rules.nodata))
      throw UsageError(fmt::format("--nodata {:g}", *rules.nodata),
                       fmt::format("{} stores {} values ({:g} to {:g}, whole numbers): no value can equal it",
                                   path, detail::holds_signed_bytes(*band) ? "signed Byte" : GDALGetDataTypeName(type),
                                   low, high));
  }
  if (rules.nodata && band->GetRasterDataType() == GDT_Float32 && std::isfinite(*rules.nodata) &&
      std::abs(*rules.nodata) > double(std::numeric_limits<float>::max()))
    throw UsageError(fmt::format("--nodata {:g}", *rules.nodata),
                     fmt::format("{} stores Float32 values (at most {:g} in size): no value can equal it", path,
                                 double(std::numeric_limits<float>::max())));
  if (rules.nodata)
    layer.nodata = rules.nodata;
  else if (has)
    layer.nodata = nodata;
  if (const char* unit = band->GetUnitType()) layer.unit = unit;
  // GRIB states its unit in metadata ("[K]"), not as the band's unit type: a fill of an ERA5
  // GRIB had written kelvin with no unit, and `suitability` then could not read its own input.
  if (const char* grib = band->GetMetadataItem("GRIB_UNIT"); layer.unit.empty() && grib != nullptr) {
    std::string text = grib;
    if (text.size() >= 2 && text.front() == '[' && text.back() == ']') text = text.substr(1, text.size() - 2);
    layer.unit = text;
  }
  layer.own_mask = detail::own_mask_name(*band);
  layer.data_type = int(band->GetRasterDataType());
  return layer;
}


std::string band_where(const std::string& path, int band) {
  return path + " band " + std::to_string(band);
}

std::optional<TimePoint> time_from_text(const char* text) {
  if (text == nullptr || *text == '\0') return std::nullopt;
  if (auto t = parse_iso_time(text)) return t;
  return date_from_name(text);
}

// A band's GRIB valid time, if it has one.
std::optional<TimePoint> grib_band_time(GDALRasterBand& band) {
  if (const char* valid = band.GetMetadataItem("GRIB_VALID_TIME")) {
    char* end = nullptr;
    const long long seconds = std::strtoll(valid, &end, 10);
    if (end != valid) return TimePoint{seconds};
  }
  return std::nullopt;
}

// A CF time read on an origin with a zone: its offset, and whether the time was kept on the
// zone's clock (an axis of dates at local midnight) rather than moved to UTC.
struct CfZone {
  int offset = 0;
  bool kept_local = false;
};

// Whether a CF time axis holds a time of day on its zone's clock in any of its values
// (NETCDF_DIM_<dim>_VALUES): hourly records, not dates at local midnight.
bool axis_has_times_of_day(GDALDataset& dataset, const std::string& dim, const char* units, const char* calendar) {
  const char* values = dataset.GetMetadataItem(("NETCDF_DIM_" + dim + "_VALUES").c_str());
  for (const char* at = values; at && *at;) {
    while (*at == '{' || *at == ',' || *at == ' ') ++at;
    char* end = nullptr;
    const double value = std::strtod(at, &end);
    if (end == at) break;
    if (!cf_time(value, units, calendar).is_midnight()) return true;
    at = end;
  }
  return false;
}

// A band's time on a CF time axis (NETCDF_DIM_<dim> with "<dim>#units" of the form "... since
// ..."), if it has one; InputError naming the band where the axis cannot be read. `axes` keeps
// what axis_has_times_of_day found for each axis of the dataset, so that the bands of one file
// read it once (each band had read the whole axis: 3000 daily bands took 4.7 s, not 0.16).
std::optional<TimePoint> cf_band_time(GDALDataset& dataset, const std::string& path, int band_index,
                                      CfZone* zone = nullptr, std::map<std::string, bool>* axes = nullptr) {
  char** items = dataset.GetRasterBand(band_index)->GetMetadata();
  for (int i = 0; items && items[i]; ++i) {
    const std::string item = items[i];
    if (item.rfind("NETCDF_DIM_", 0) != 0) continue;
    const auto eq = item.find('=');
    if (eq == std::string::npos) continue;
    const std::string dim = item.substr(11, eq - 11);
    const char* units = dataset.GetMetadataItem((dim + "#units").c_str());
    if (units == nullptr || strcasestr(units, " since ") == nullptr) continue;
    const char* calendar = dataset.GetMetadataItem((dim + "#calendar").c_str());
    try {
      const TimePoint local = cf_time(std::stod(item.substr(eq + 1)), units, calendar ? calendar : "standard");
      // An origin with a zone: dates on it keep their local day (a month stamped at local
      // midnight stays in its month), but an axis with times of day is moved to UTC, as every
      // time kalends writes is (hourly records had kept the zone's clock, labelled UTC).
      const int offset = cf_zone_offset_seconds(units);
      if (offset == 0) return local;
      bool times_of_day = !local.is_midnight();
      if (!times_of_day) {
        std::map<std::string, bool> once;
        auto& known = axes ? *axes : once;
        const auto [it, added] = known.try_emplace(dim, false);
        if (added) it->second = axis_has_times_of_day(dataset, dim, units, calendar ? calendar : "standard");
        times_of_day = it->second;
      }
      if (zone) *zone = {offset, !times_of_day};
      return times_of_day ? TimePoint{local.seconds - offset} : local;
    } catch (const std::invalid_argument& e) {
      throw InputError(band_where(path, band_index), std::string("time axis: ") + e.what());
    }
  }
  return std::nullopt;
}

// The date of one band of a multi-band raster: GRIB valid time, CF time axis, band
// description, or a date item in the band's metadata.
TimePoint band_time(GDALDataset& dataset, const std::string& path, int band_index, CfZone* zone = nullptr,
                    std::map<std::string, bool>* axes = nullptr) {
  GDALRasterBand* band = dataset.GetRasterBand(band_index);
  if (const auto t = grib_band_time(*band)) return *t;
  if (const auto t = cf_band_time(dataset, path, band_index, zone, axes)) return *t;
  if (auto t = time_from_text(band->GetDescription())) return *t;
  std::string unreadable;  // a date item that is there but is no date: named, not "none found"
  for (const char* key : {"DATE", "ACQUISITION_DATE", "TIME", "date", "time", "acquisition_date"}) {
    const char* text = band->GetMetadataItem(key);
    if (auto t = time_from_text(text)) return *t;
    if (text && *text && unreadable.empty()) unreadable = fmt::format("{} '{}'", key, text);
  }
  if (!unreadable.empty())
    throw InputError(band_where(path, band_index),
                     "metadata " + unreadable + " is not a date (expected YYYY-MM-DD, YYYYMMDD or YYYYDDD)");
  throw InputError(band_where(path, band_index),
                   "no date found (looked for a GRIB valid time, a CF time axis, a date in the "
                   "band description or in DATE/TIME metadata)");
}

// Every band of a multi-band raster with the date its own metadata gives (band_time's errors).
// An alpha band is no date: it is the others' mask (gdal_session.hpp, has_own_mask).
std::vector<std::pair<int, TimePoint>> band_dates(GDALDataset& dataset, const std::string& path,
                                                  std::vector<CfZone>* zones = nullptr,
                                                  std::map<std::string, bool>* axes = nullptr) {
  // A NetCDF variable with a dimension besides time and the grid (depth, ensemble member):
  // GDAL gives a band per combination, and their dates repeat ("duplicate date" had been all
  // that was said).
  if (const char* extra = dataset.GetMetadataItem("NETCDF_DIM_EXTRA"); extra && std::strchr(extra, ',')) {
    std::string dims;
    for (const char* c = extra; *c; ++c)
      if (*c == ',') dims += ", ";
      else if (*c != '{' && *c != '}') dims += *c;
    throw InputError(path, "has the dimensions " + dims + " besides its grid: kalends reads one (time); take one "
                           "value of the others first (gdal_translate with -b, or a NetCDF subset)");
  }
  std::vector<std::pair<int, TimePoint>> dates;
  std::map<std::string, bool> own_axes;  // where the caller keeps none
  for (int b = 1; b <= dataset.GetRasterCount(); ++b)
    if (dataset.GetRasterBand(b)->GetColorInterpretation() != GCI_AlphaBand) {
      CfZone zone;
      dates.emplace_back(b, band_time(dataset, path, b, &zone, axes ? axes : &own_axes));
      if (zones) zones->push_back(zone);
    }
  return dates;
}

// The bands that hold values: all but an alpha band.
int value_bands(GDALDataset& dataset) {
  int count = 0;
  for (int b = 1; b <= dataset.GetRasterCount(); ++b)
    count += dataset.GetRasterBand(b)->GetColorInterpretation() != GCI_AlphaBand;
  return count;
}

// Every date a band's metadata states, in the order band_time takes them, with where it was
// found; what cannot be read is left out (band_time names it).
std::vector<std::pair<std::string, TimePoint>> band_date_sources(GDALDataset& dataset, int band_index,
                                                                std::map<std::string, bool>* axes = nullptr) {
  std::vector<std::pair<std::string, TimePoint>> found;
  GDALRasterBand* band = dataset.GetRasterBand(band_index);
  if (const auto t = grib_band_time(*band)) found.emplace_back("GRIB valid time", *t);
  try {
    if (const auto t = cf_band_time(dataset, "", band_index, nullptr, axes)) found.emplace_back("CF time axis", *t);
  } catch (const InputError&) {
  }
  if (auto t = time_from_text(band->GetDescription())) found.emplace_back("band description", *t);
  for (const char* key : {"DATE", "ACQUISITION_DATE", "TIME", "date", "time", "acquisition_date"})
    if (auto t = time_from_text(band->GetMetadataItem(key))) found.emplace_back(std::string(key) + " item", *t);
  return found;
}

// "its name says 2020-01-01, its CF time axis 2020-01-02", or "" where every source of the band's
// date gives the day of `name_date` (a date in the file's name), else of its first source.
// `axes` as for cf_band_time: one per dataset.
std::string date_conflict(GDALDataset& dataset, int band_index, std::optional<TimePoint> name_date,
                          std::map<std::string, bool>* axes = nullptr) {
  const auto sources = band_date_sources(dataset, band_index, axes);
  if (sources.empty() || (!name_date && sources.size() < 2)) return "";
  const TimePoint used = name_date ? *name_date : sources.front().second;
  const std::string used_from = name_date ? "its name" : "its " + sources.front().first;
  for (const auto& [from, t] : sources) {
    const CivilDate a = used.date(), b = t.date();
    if (a.year != b.year || a.month != b.month || a.day != b.day)
      return fmt::format("{} says {}, its {} {}", used_from, used.label(), from, t.label());
  }
  return "";
}

// "tmax_2019" -> "tmax": a file of several dates is named by the period it holds.
std::string without_trailing_number(const std::string& name) {
  std::string stem = name;
  while (!stem.empty() && (std::isdigit(static_cast<unsigned char>(stem.back())) || std::strchr("_-. ", stem.back())))
    stem.pop_back();
  return stem.empty() ? name : stem;
}

bool same_crs(const std::string& a, const std::string& b) {
  if (a == b) return true;
  if (a.empty() || b.empty()) return false;
  OGRSpatialReference sa, sb;
  if (sa.importFromWkt(a.c_str()) != OGRERR_NONE || sb.importFromWkt(b.c_str()) != OGRERR_NONE)
    return false;
  return sa.IsSame(&sb) != 0;
}


}  // namespace

namespace detail {
Grid raster_grid(GDALDataset& dataset) { return grid_of(dataset); }

// What the file names share before their date: "ndvi_2004-05-24.tif" -> "ndvi",
// "MOD13A1.A2004145.h12v04.hdf" -> "MOD13A1".
std::string name_from_file(const std::string& path) {
  const std::string base = fs::path(path).filename().string();
  const auto date = find_date_in_name(base);
  std::string prefix = date ? base.substr(0, date->position) : fs::path(base).stem().string();
  if (date && prefix.size() >= 2 && std::isalpha(static_cast<unsigned char>(prefix.back())) &&
      std::strchr("_-. ", prefix[prefix.size() - 2]))
    prefix.pop_back();  // the "A" of "A2004145"
  while (!prefix.empty() && std::strchr("_-. ", prefix.back())) prefix.pop_back();
  return prefix.empty() ? "filled" : prefix;
}

// The subdatasets of a container file with several variables (NetCDF, HDF4, HDF5), which opens
// with no band of its own; none for any other file.
std::vector<std::string> subdatasets_of(const std::string& path) {
  detail::start_gdal();
  std::vector<std::string> names;
  GDALDatasetUniquePtr any(GDALDataset::Open(path.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  if (char** items = any ? any->GetMetadata("SUBDATASETS") : nullptr)
    for (int i = 0; items[i]; ++i) {
      const std::string item = items[i];
      if (item.find("_NAME=") != std::string::npos) names.push_back(item.substr(item.find('=') + 1));
    }
  return names;
}

}  // namespace detail

Grid window_grid(const Grid& grid, const Window& window) {
  Grid g = grid;
  g.width = window.width;
  g.height = window.height;
  const auto& t = grid.geotransform;
  g.geotransform[0] = t[0] + window.x * t[1] + window.y * t[2];
  g.geotransform[3] = t[3] + window.x * t[4] + window.y * t[5];
  return g;
}

void require_same_grid(const Grid& expected, const Grid& actual, const std::string& where,
                       const std::string& expected_from) {
  if (expected.width != actual.width || expected.height != actual.height)
    throw InputError(where, "grid is " + std::to_string(actual.width) + " x " + std::to_string(actual.height) +
                                " px, that of " + expected_from + " is " + std::to_string(expected.width) + " x " +
                                std::to_string(expected.height));
  // Which side lacks a geotransform, or where the two differ and by how much in pixels: a
  // shift of 1e-5 px is refused, and the bare "differs" had not said why.
  if (expected.has_geotransform != actual.has_geotransform)
    throw InputError(where, actual.has_geotransform ? "has a geotransform, " + expected_from + " has none"
                                                    : "has no georeferencing, " + expected_from + " has");
  const double pixel = std::max(std::abs(expected.geotransform[1]), std::abs(expected.geotransform[5]));
  const auto& e = expected.geotransform;
  const auto& a = actual.geotransform;
  // A file stored bottom-up (or mirrored) had been reported as an origin some pixels away.
  if (expected.has_geotransform && ((a[5] > 0) != (e[5] > 0) || (a[1] > 0) != (e[1] > 0)))
    throw InputError(where, fmt::format("is stored {} while {} is stored {} (geotransform pixel sizes {:.10g}, {:.10g} "
                                        "against {:.10g}, {:.10g}): put it the same way up first (gdalwarp)",
                                        a[5] > 0 ? "south-up" : "north-up", expected_from,
                                        e[5] > 0 ? "south-up" : "north-up", a[1], a[5], e[1], e[5]));
  for (int i = 0; i < 6; ++i)
    if (std::abs(e[i] - a[i]) > 1e-6 * std::max(pixel, 1e-12)) {
      if (i == 0 || i == 3)
        throw InputError(where, fmt::format("origin ({:.10g}, {:.10g}) differs from that of {} ({:.10g}, {:.10g}) by "
                                            "{:.3g} px", a[0], a[3], expected_from, e[0], e[3],
                                            std::hypot(a[0] - e[0], a[3] - e[3]) / std::max(pixel, 1e-12)));
      throw InputError(where, fmt::format("pixel size or rotation ({:.10g}, {:.10g}, {:.10g}, {:.10g}) differs from that "
                                          "of {} ({:.10g}, {:.10g}, {:.10g}, {:.10g})",
                                          a[1], a[2], a[4], a[5], expected_from, e[1], e[2], e[4], e[5]));
    }
  // One side without a CRS had been reported as a CRS that differs.
  if (actual.crs_wkt.empty() != expected.crs_wkt.empty())
    throw InputError(where, actual.crs_wkt.empty() ? "states no coordinate reference system, " + expected_from + " does"
                                                   : "states a coordinate reference system, " + expected_from +
                                                         " states none");
  if (!same_crs(expected.crs_wkt, actual.crs_wkt))
    throw InputError(where, "coordinate reference system differs from that of " + expected_from);
}

double first_date_median(const Stack& stack, int side) { return date_median(stack, 0, side); }

double date_median(const Stack& stack, std::size_t index, int side) {
  const Grid& g = stack.grid();
  const int w = std::min(g.width, side), h = std::min(g.height, side);
  const Window window{(g.width - w) / 2, (g.height - h) / 2, w, h};
  std::vector<float> values(window.pixels());
  stack.reader()->read_values(int(index), window, values.data());
  values.erase(std::remove_if(values.begin(), values.end(), [](float v) { return !std::isfinite(v); }),
               values.end());
  if (values.empty()) return NAN;
  std::nth_element(values.begin(), values.begin() + values.size() / 2, values.end());
  return values[values.size() / 2];
}

// "no QA layer for 2004-05-24 in 'qa/*.tif'": made here, read back by partner_now_present.
constexpr std::string_view partner_for = " layer for ", partner_in = " in '";

bool partner_now_present(const std::string& reason) {
  if (tile_partner_now_present(reason)) return true;
  if (reason.rfind("no ", 0) != 0 || reason.back() != '\'') return false;
  const auto for_at = reason.find(partner_for);
  const auto in_at = for_at == std::string::npos ? std::string::npos : reason.find(partner_in, for_at);
  if (in_at == std::string::npos) return false;
  const std::string label = reason.substr(for_at + partner_for.size(), in_at - for_at - partner_for.size());
  const std::string pattern = reason.substr(in_at + partner_in.size(), reason.size() - 1 - in_at - partner_in.size());
  try {
    // Dates in the file names: found without opening a file, and where the names hold dates the
    // partner is one of them (opening every QA file's header for each file left out had made a
    // night with 100 such files and 800 QA files take 19 s).
    bool dated_by_name = false;
    for (const std::string& file : detail::expand_glob(pattern))
      if (const auto time = date_from_name(std::filesystem::path(file).filename().string())) {
        if (time->label() == label) return true;
        dated_by_name = true;
      }
    if (dated_by_name) return false;
  } catch (const Error&) {
    // Not a plain pattern (NETCDF:"qa.nc":qa), or one that matches nothing now.
  }
  try {
    // Dates in the bands (a NetCDF time axis, band descriptions): the stack's headers.
    const Stack partner = Stack::open(pattern);
    return std::any_of(partner.layers().begin(), partner.layers().end(),
                       [&](const Layer& layer) { return layer.time.label() == label; });
  } catch (const Error&) {
    return false;  // the partner stack does not open: the run says why
  }
}

std::vector<std::size_t> partners_by_date(const Stack& base, const Stack& other, const std::string& what) {
  // A file on each side (a stack's files share its grid): the glob alone had named none.
  require_same_grid(base.grid(), other.grid(), other.layers().front().path, base.layers().front().path);
  std::vector<std::size_t> index;
  const auto& layers = other.layers();
  for (const Layer& layer : base.layers()) {
    const auto it = std::find_if(layers.begin(), layers.end(), [&](const Layer& l) { return l.time == layer.time; });
    if (it == layers.end())
      throw InputError(layer.path, "no " + what + std::string(partner_for) + layer.time.label() +
                                       std::string(partner_in) + other.input() + "'");
    index.push_back(std::size_t(it - layers.begin()));
  }
  return index;
}

std::string unapplied_scaling(const Stack& stack) {
  const Layer& first = stack.layers().front();
  if (first.scale != 1 || first.offset != 0 || stack.rules().scale || stack.rules().offset) return "";
  GDALDatasetUniquePtr dataset = detail::open_raster(first.path);
  GDALRasterBand* band = dataset->GetRasterBand(first.band);
  std::string text;
  bool identity = true;  // scale_factor=1, add_offset=0 change nothing
  // As netCDF names them, or as GDAL's HDF5 driver prefixes them with the variable's name
  // (ndvi_scale_factor).
  auto stated = [&](const std::string& key) -> std::optional<std::string> {
    for (GDALMajorObject* object : {static_cast<GDALMajorObject*>(band), static_cast<GDALMajorObject*>(dataset.get())}) {
      if (!object) continue;
      CSLConstList items = object->GetMetadata();
      for (int i = 0; items && items[i]; ++i) {
        const std::string item = items[i];
        const auto eq = item.find('=');
        if (eq == std::string::npos) continue;
        const std::string name = item.substr(0, eq);
        if (name == key || name.ends_with("_" + key)) return item.substr(eq + 1);
      }
    }
    return std::nullopt;
  };
  for (const char* key : {"scale_factor", "add_offset"}) {
    const std::optional<std::string> found = stated(key);
    if (!found) continue;
    const char* value = found->c_str();
    text += (text.empty() ? "" : ", ") + std::string(key) + "=" + value;
    const double number = std::strtod(value, nullptr);
    identity = identity && number == (std::strcmp(key, "scale_factor") == 0 ? 1.0 : 0.0);
  }
  return identity ? "" : text;
}

// --date on a file whose bands are dated by their own metadata would read one band as that
// date and drop the others' dates without a word.
static void require_undated_bands(GDALDataset& dataset, const std::string& path, const std::string& file,
                           const ValueRules& rules) {
  if (!rules.date || dataset.GetRasterCount() < 2) return;
  std::size_t dated = 0;
  try {
    dated = band_dates(dataset, path).size();
  } catch (const InputError&) {
  }
  if (dated > 1)
    throw InputError(file, fmt::format("its {} bands carry their own dates; --date would read band {} alone as {} "
                                       "(leave --date out to read every band by its date)",
                                       dated, rules.band, rules.date->label()));
}

void require_readable(const Stack& stack, int x, int y) {
  // The first band of each file only: the header is the file's, and a container of thousands
  // of dated bands (GRIB decodes a whole field per band read) would pay a read per band.
  std::set<std::string> seen;
  for (const Layer& l : stack.layers())
    if (seen.insert(l.path).second) detail::require_readable_pixel(l.path, l.band, x, y);
}

void require_not_half_published(const std::string& folder) {
  std::error_code ec;
  const std::string where = folder.empty() ? "." : folder;
  if (!fs::exists(fs::path(where) / half_published_marker, ec)) return;
  // The writer holds the folder (OutputFolder's lock) while it publishes: then it is at work
  // now, not stopped (a reader had been told to run the writer again while it was running).
  const bool writing_now = detail::folder_being_written(where);
  if (writing_now)
    throw InputError(where, "another kalends command is replacing its outputs here now; run again when it ends");
  throw InputError(where, "a kalends run was stopped while replacing its outputs here, so they are part new and part "
                          "old; run the command (or the job) that writes this folder again");
}

std::string date_conflict_note(const Stack& stack) {
  if (stack.date_conflicts() == 0) return "";
  return fmt::format("dates disagree in {} band{} (first: {}); a file name's date is used, else the first of GRIB "
                     "valid time, CF time axis, band description, DATE/TIME items (docs/inputs.md)",
                     stack.date_conflicts(), stack.date_conflicts() == 1 ? "" : "s", stack.first_date_conflict());
}

std::string mixed_names_note(const Stack& stack) {
  // A variable of container files is named by the variable, whatever the files' names.
  if (const auto parts = detail::connection_parts(stack.input()); parts && !parts->variable().empty()) return "";
  std::map<std::string, std::set<std::string>> files_of;
  for (const Layer& layer : stack.layers()) {
    const std::string file = detail::file_in_connection(layer.path);
    files_of[detail::name_from_file(file)].insert(file);
  }
  if (files_of.size() < 2) return "";
  std::string counts;
  for (const auto& [name, files] : files_of)
    counts += fmt::format("{}{}: {} file{}", counts.empty() ? "" : ", ", name, files.size(), files.size() == 1 ? "" : "s");
  return fmt::format("its files have {} names before their dates ({}): read as one stack, named '{}' after the "
                     "first; give --name to name it, or a pattern of one name to read that one alone",
                     files_of.size(), counts, stack.name());
}

std::string mixed_value_rules(const Stack& stack) {
  const ValueRules& rules = stack.rules();
  const Layer& first = stack.layers().front();
  const auto nodata = [](const std::optional<double>& v) { return v ? fmt::format("{:g}", *v) : std::string("none"); };
  std::vector<std::string> dates;
  for (const Layer& layer : stack.layers()) {
    std::vector<std::string> differ;
    if (!rules.scale && layer.scale != first.scale)
      differ.push_back(fmt::format("scale {:g} (first date {:g})", layer.scale, first.scale));
    if (!rules.offset && layer.offset != first.offset)
      differ.push_back(fmt::format("offset {:g} (first date {:g})", layer.offset, first.offset));
    const bool same_nodata = layer.nodata.has_value() == first.nodata.has_value() &&
                             (!layer.nodata || *layer.nodata == *first.nodata ||
                              (std::isnan(*layer.nodata) && std::isnan(*first.nodata)));
    if (!rules.nodata && !same_nodata)
      differ.push_back(fmt::format("nodata {} (first date {})", nodata(layer.nodata), nodata(first.nodata)));
    // Values are not converted between units: the outputs carry the first date's label.
    // A label on one side only counts too (a file of the series without its 'K').
    const auto label = [](const std::string& unit) { return unit.empty() ? std::string("none") : "'" + unit + "'"; };
    if (layer.unit != first.unit)
      differ.push_back(fmt::format("unit {} (first date {}, which the outputs carry)", label(layer.unit), label(first.unit)));
    // Unscaled Int16 counts (5000) among Float32 NDVI (0.5), the rules otherwise the same, had
    // been taken without a word, and the fill carried 3000s into the neighbouring dates.
    // Float32 beside Float64 holds the same values: only integers against floats, or integers
    // of another width or sign, are named.
    const auto integer = [](int type) { return GDALDataTypeIsInteger(GDALDataType(type)) != 0; };
    if (layer.data_type != first.data_type && (integer(layer.data_type) || integer(first.data_type)))
      differ.push_back(fmt::format("data type {} (first date {})", GDALGetDataTypeName(GDALDataType(layer.data_type)),
                                   GDALGetDataTypeName(GDALDataType(first.data_type))));
    if (!differ.empty()) dates.push_back(fmt::format("{} has {}", layer.time.label(), fmt::join(differ, ", ")));
  }
  if (dates.empty()) return "";
  // Every such date, up to a few (the first alone had hidden a second wrong scale).
  constexpr std::size_t shown = 4;
  std::string text = fmt::format("{}", fmt::join(dates.begin(), dates.begin() + std::min(dates.size(), shown), "; "));
  if (dates.size() > shown) text += fmt::format("; and {} more dates", dates.size() - shown);
  return text + "; each file was read with its own";
}

void check_band(int band, const std::string& option) {
  if (band < 1) throw UsageError(option + " " + std::to_string(band), "bands are numbered from 1");
}

std::string scale_or_offset_problem(bool is_scale, double value) {
  // NaN would empty every output, infinity fill them with inf: neither is a value rule.
  if (!std::isfinite(value)) return "must be a finite number";
  if (std::abs(value) > double(std::numeric_limits<float>::max()))
    return "is beyond the 32-bit floating-point values the outputs hold (3.4e38 at most in size)";
  if (is_scale && value == 0) return "a scale factor of 0 makes every value 0";
  // Below float32's smallest normal number, every value becomes 0 or nearly, as with 0.
  if (is_scale && std::abs(value) < double(std::numeric_limits<float>::min()))
    return "is below the 32-bit floating-point values the outputs hold (1.2e-38 at least in size)";
  return "";
}

Stack Stack::open(const std::string& input, const ValueRules& rules) {
  detail::start_gdal();
  check_band(rules.band, "--band");
  for (const bool is_scale : {true, false})
    if (const std::optional<double>& rule = is_scale ? rules.scale : rules.offset; rule)
      if (const std::string problem = scale_or_offset_problem(is_scale, *rule); !problem.empty())
        throw UsageError(fmt::format("{} {:g}", is_scale ? "--scale" : "--offset", *rule), problem);
  // (An infinite end of --valid-range is an open end; NaN compares false with everything.)
  for (const auto& [rule, name] : {std::pair{rules.valid_min, "--valid-range minimum"},
                                   std::pair{rules.valid_max, "--valid-range maximum"}})
    if (rule && std::isnan(*rule)) throw UsageError(fmt::format("{} nan", name), "must be a number");
  if (input.empty()) throw UsageError("the input", "is empty; give a quoted glob such as 'ndvi/*.tif' or a raster");
  Stack stack;
  stack.input_ = input;
  stack.rules_ = rules;
  if (rules.valid_min && rules.valid_max && *rules.valid_min > *rules.valid_max)
    throw UsageError("--valid-range", "minimum is above maximum");

  // 'ndvi/*.tif', or one variable of many container files: 'NETCDF:"daily/*.nc":tas'.
  const auto connection = detail::connection_pattern(input);
  const std::string variable = connection ? connection->variable() : "";
  // A connection string naming one existing file is no pattern, whatever its folder's name
  // holds ('NETCDF:"nc [1]/tas.nc":tas' had been globbed whole).
  const bool pattern = connection || (!detail::connection_parts(input) && detail::has_glob_characters(input) &&
                                      !fs::exists(input));
  if (pattern) {
    bool first = true;
    std::vector<std::pair<std::string, Grid>> file_grids;  // each file and its grid, checked at the end
    std::vector<CfZone> layer_zones;                       // with stack.layers_
    std::vector<std::string> files = detail::expand_glob(connection ? connection->files : input);
    std::erase_if(files, [&](const std::string& f) {
      return std::find(rules.exclude.begin(), rules.exclude.end(), f) != rules.exclude.end();
    });
    stack.stamp(files);  // before any is read: a file renamed in meanwhile differs
    for (const std::string& file : files) {
      auto time = date_from_name(file);
      // In a pattern the name's date wins: a --date that differs would be ignored without a word.
      if (time && rules.date && !(*time == *rules.date))
        throw UsageError("--date " + rules.date->label(),
                         fmt::format("{} carries its own date ({}) in its name; --date is for files whose names "
                                     "carry none",
                                     file, time->label()));
      if (!time) time = rules.date;
      const std::string path = connection ? connection->connection(file) : file;
      GDALDatasetUniquePtr dataset;
      try {
        dataset = detail::open_raster(path);
      } catch (const InputError& e) {
        detail::require_not_cut_short(file);  // a damaged file is named so, not explained below
        // Errors name the file itself, so that `kalends run --skip-bad` can leave it out.
        if (connection)
          throw InputError(file, (e.reason().find(path) != std::string::npos ? e.reason() : e.reason() + " as " + path) +
                                     "; the file may be damaged or lack this variable");
        const std::vector<std::string> variables = detail::subdatasets_of(file);
        if (variables.empty()) throw;
        std::string example = variables.front();
        if (const auto at = example.find(file); at != std::string::npos) example.replace(at, file.size(), input);
        throw InputError(file, "holds several variables; read one from every file with a pattern such as '" +
                                   example + "' (this file's: " + fmt::format("{}", fmt::join(variables, ", ")) + ")");
      }
      // A file without a date in its name may hold several dates, each band dated by its own
      // metadata (a year of daily bands in one NetCDF or GRIB file): all its bands are read.
      std::vector<std::pair<int, TimePoint>> bands;
      std::vector<CfZone> band_zones;
      std::map<std::string, bool> axes;  // this file's, read once for its dates and their conflicts
      if (time && !date_from_name(file)) require_undated_bands(*dataset, path, file, rules);
      if (time) {
        bands.emplace_back(rules.band, *time);
      } else {
        std::string metadata_problem;
        try {
          if (!rules.one_date_per_file) bands = band_dates(*dataset, path, &band_zones, &axes);
        } catch (const InputError& e) {
          bands.clear();
          band_zones.clear();
          if (e.reason().starts_with("has the dimensions")) throw;
          if (e.reason().starts_with("metadata ") || e.reason().starts_with("time axis")) metadata_problem = e.reason();
        }
        if (const auto impossible = impossible_date_in_name(file); bands.empty() && impossible)
          throw InputError(file, "'" + *impossible + "' in the file name is not a calendar date");
        if (bands.empty() && !metadata_problem.empty())
          throw InputError(file, "no date in the file name, and its bands' " + metadata_problem);
        if (bands.empty())
          throw InputError(file, "no date in the file name (expected YYYY-MM-DD, YYYYMMDD or YYYYDDD) nor in "
                                 "its bands' metadata; rename it to carry its date (or, for one file of one date, give --date to "
                                 "inspect or index)");
      }
      if (bands.front().first > dataset->GetRasterCount())
        throw InputError(file, "has no band " + std::to_string(rules.band));
      require_no_control_points(*dataset, file);
      const Grid grid = grid_of(*dataset);
      if (first) {
        stack.grid_ = grid;
        stack.name_ = !variable.empty() ? variable
                      : time            ? detail::name_from_file(file)
                                        : without_trailing_number(detail::name_from_file(file));
        first = false;
      }
      file_grids.emplace_back(file, grid);
      for (std::size_t k = 0; k < bands.size(); ++k) {
        const auto& [band, band_date] = bands[k];
        stack.layers_.push_back(layer_of(*dataset, path, band, band_date, rules));
        layer_zones.push_back(k < band_zones.size() ? band_zones[k] : CfZone{});
        // The name's date or the first source of the band's metadata wins (docs/inputs.md); a
        // second source that says another day is noted.
        const std::string conflict =
            date_conflict(*dataset, band, time && date_from_name(file) ? time : std::nullopt, &axes);
        if (!conflict.empty() && stack.date_conflicts_++ == 0)
          stack.first_date_conflict_ = band_where(file, band) + ": " + conflict;
      }
    }
    // One record per file on a zoned CF axis: each file judged alone keeps a record at local
    // midnight on the zone's clock while the other hours move to UTC (hour 24 had come before
    // hour 22). Where any of the stack's records moved, all of them do.
    const bool any_moved = std::any_of(layer_zones.begin(), layer_zones.end(),
                                       [](const CfZone& z) { return z.offset != 0 && !z.kept_local; });
    if (any_moved)
      for (std::size_t k = 0; k < layer_zones.size(); ++k)
        if (layer_zones[k].kept_local) stack.layers_[k].time.seconds -= layer_zones[k].offset;
    // Every file on the grid most of them share (the stack is refused where none has a majority):
    // judged by the first file, an oldest composite delivered on another grid had every good
    // file named as the odd one, and `kalends run --skip-bad` left out the good files.
    auto matches = [](const Grid& a, const Grid& b) {
      try {
        require_same_grid(a, b, "", "");
        return true;
      } catch (const InputError&) {
        return false;
      }
    };
    const auto [best, best_count] = detail::most_shared(
        file_grids, [&](const auto& a, const auto& b) { return matches(a.second, b.second); });
    if (!file_grids.empty()) {
      // Files on two or more grids, none shared by most of them: which is right cannot be told,
      // so none is left out as bad (run --skip-bad would drop half the stack).
      if (best_count * 2 <= file_grids.size() && best_count < file_grids.size()) {
        const auto other = std::find_if(file_grids.begin(), file_grids.end(),
                                        [&](const auto& fg) { return !matches(file_grids[best].second, fg.second); });
        throw UsageError(input, fmt::format("its files lie on different grids and none is shared by most of them "
                                            "({} of {} files on that of {}; {} on another): give the files of one grid",
                                            best_count, file_grids.size(), file_grids[best].first, other->first));
      }
      stack.grid_ = file_grids[best].second;
      const std::string rest =
          fmt::format("the rest of the stack ({} of its {} files)", best_count, file_grids.size());
      for (const auto& [f, g] : file_grids)
        if (f != file_grids[best].first) require_same_grid(stack.grid_, g, f, rest);
    }
  } else {
    if (fs::is_directory(input))
      throw InputError(input, "is a folder; give a pattern such as '" + input + "/*.tif'");
    GDALDatasetUniquePtr dataset;
    try {
      dataset = detail::open_raster(input);
    } catch (const InputError& opening) {
      // A damaged file is named so, not read as "no such variable" below.
      detail::require_not_cut_short(detail::file_in_connection(input));
      if (const std::vector<std::string> variables = detail::subdatasets_of(input); !variables.empty())
        throw InputError(input, "holds several variables; choose one of: " + fmt::format("{}", fmt::join(variables, ", ")));
      if (!fs::exists(input) && !detail::has_glob_characters(input) && input.find(':') == std::string::npos)
        throw InputError(input, "no such file");
      // NETCDF:"file.nc":var and the like: say which part is wrong, the file or the variable.
      if (const auto parts = detail::connection_parts(input)) {
        if (!fs::exists(parts->files)) throw InputError(parts->files, "no such file");
        const std::vector<std::string> variables = detail::subdatasets_of(parts->files);
        // The variable is there, but GDAL cannot read it as a raster (a Zarr array of three or
        // more dimensions): GDAL's reason, not "no such variable" above a list that names it.
        if (std::find(variables.begin(), variables.end(), input) != variables.end())
          throw InputError(input, "GDAL cannot read this variable as a raster (" + opening.reason() +
                                      "); write it out one date per file, or as NetCDF with a time axis");
        if (!variables.empty())
          throw InputError(input, "the file has no such variable; its variables: " +
                                      fmt::format("{}", fmt::join(variables, ", ")));
        GDALDatasetUniquePtr plain(GDALDataset::Open(parts->files.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
        if (plain)
          throw InputError(input, "the file has no such variable (GDAL reads it as '" + parts->files + "' alone)");
        throw InputError(parts->files, "cannot be read as " + parts->prefix.substr(0, parts->prefix.size() - 2) +
                                           " (damaged, or another format?)");
      }
      throw;
    }
    require_no_control_points(*dataset, input);
    stack.grid_ = grid_of(*dataset);
    const int bands = dataset->GetRasterCount();
    // One band of a multi-band raster where the user names it (--band) or gives the file one
    // date (--date); otherwise every band, each with its own date.
    // A value band and its alpha band (gdalwarp -dstalpha) are one date, as a single band is.
    if (bands == 1 || value_bands(*dataset) == 1 || rules.one_date_per_file || rules.date || rules.band != 1) {
      if (rules.band > bands)
        throw InputError(input, fmt::format("has no band {} (it has {})", rules.band, bands));
      if (rules.date && !rules.one_date_per_file) require_undated_bands(*dataset, input, input, rules);
      const std::string file = detail::file_in_connection(input);
      auto time = rules.date;
      if (!time) time = date_from_name(file);
      if (const auto impossible = impossible_date_in_name(file); !time && impossible)
        throw InputError(input, "'" + *impossible + "' in the file name is not a calendar date");
      TimePoint t;
      try {
        t = time ? *time : band_time(*dataset, input, rules.band);
      } catch (const InputError& e) {
        if (!e.reason().starts_with("no date found")) throw;
        throw InputError(input, "no date in the file name (expected YYYY-MM-DD, YYYYMMDD or YYYYDDD) nor in its "
                                "metadata; rename it to carry its date (or give --date to inspect or index)");
      }
      stack.layers_.push_back(layer_of(*dataset, input, rules.band, t, rules));
    } else {
      std::map<std::string, bool> axes;  // the file's, read once for its dates and their conflicts
      for (const auto& [band, date] : band_dates(*dataset, input, nullptr, &axes)) {
        stack.layers_.push_back(layer_of(*dataset, input, band, date, rules));
        const std::string conflict = date_conflict(*dataset, band, std::nullopt, &axes);
        if (!conflict.empty() && stack.date_conflicts_++ == 0)
          stack.first_date_conflict_ = band_where(input, band) + ": " + conflict;
      }
    }
    // NETCDF:"file.nc":tas -> "tas"; HDF5:"f.h5"://ndvi -> "ndvi"; file.grib -> "file".
    const auto parts = detail::connection_parts(input);
    stack.name_ = parts && !parts->variable().empty() ? parts->variable() : detail::name_from_file(input);
  }

  if (stack.layers_.empty()) throw InputError(input, "every file of this pattern was left out");
  {
    std::set<std::string> folders;
    for (const Layer& layer : stack.layers_)
      folders.insert(fs::path(detail::file_in_connection(layer.path)).parent_path().string());
    for (const std::string& folder : folders) require_not_half_published(folder);
  }
  std::stable_sort(stack.layers_.begin(), stack.layers_.end(),
                   [](const Layer& a, const Layer& b) { return a.time < b.time; });
  for (std::size_t i = 1; i < stack.layers_.size(); ++i)
    if (stack.layers_[i].time == stack.layers_[i - 1].time) {
      const Layer& a = stack.layers_[i - 1];
      const Layer& b = stack.layers_[i];
      const std::string where_b = b.path == a.path ? band_where(b.path, b.band) : b.path;
      const std::string where_a = b.path == a.path ? "band " + std::to_string(a.band) : a.path;
      throw InputError(where_b, "duplicate date " + b.time.label() + " (also " + where_a + ")");
    }
  if (!pattern) {
    std::set<std::string> files;
    for (const Layer& layer : stack.layers_) files.insert(detail::file_in_connection(layer.path));
    stack.stamp({files.begin(), files.end()});
  }
  // One file dated 9999-12-31 among 2021's had made a time grid of 180,000 steps (1.3 GB for
  // 20 x 20 px) and left pixels unfitted, without a word. No stack kalends reads has a real gap
  // of a century (a baseline and a projection decades apart, yes).
  constexpr double longest_gap_years = 100;
  for (std::size_t i = 1; i < stack.layers_.size(); ++i) {
    const Layer& a = stack.layers_[i - 1];
    const Layer& b = stack.layers_[i];
    const double years = double(b.time.seconds - a.time.seconds) / (365.25 * 86400.0);
    if (years > longest_gap_years)
      throw InputError(b.path == a.path ? band_where(b.path, b.band) : b.path,
                       fmt::format("is dated {}, {:.0f} years after the date before it ({}, {}): a gap of more than "
                                   "{:.0f} years in one stack is taken for a wrong date; check both dates "
                                   "(kalends inspect --dates)",
                                   b.time.label(), years, a.time.label(),
                                   b.path == a.path ? "band " + std::to_string(a.band) : a.path, longest_gap_years));
  }
  return stack;
}

namespace {
std::int64_t nanoseconds(const timespec& t) { return std::int64_t(t.tv_sec) * 1000000000 + t.tv_nsec; }
}  // namespace

void Stack::stamp(const std::vector<std::string>& files) {
  for (const std::string& file : files) {
    struct stat st {};
    if (::stat(file.c_str(), &st) == 0)
      stamps_.push_back({file, std::uint64_t(st.st_ino), std::int64_t(st.st_size), nanoseconds(st.st_mtim),
                         nanoseconds(st.st_ctim)});
  }
}

void Stack::require_unchanged() const {
  // A fill publishing into the folder while seasons read it had given seasons layers equal to
  // neither the old fill nor the new (exit 0): the publishing mark is looked for at the start.
  // Each file as it was before any was read (its inode, size and times: a rename or a rewrite
  // changes one; a file removed is gone). A file added meanwhile was not read, and is new to the
  // next run (a composite landing during a nightly run must not fail it).
  for (const FileStamp& stamp : stamps_) {
    struct stat st {};
    const bool same = ::stat(stamp.path.c_str(), &st) == 0 && std::uint64_t(st.st_ino) == stamp.inode &&
                      std::int64_t(st.st_size) == stamp.size && nanoseconds(st.st_mtim) == stamp.modified_ns &&
                      nanoseconds(st.st_ctim) == stamp.changed_ns;
    if (!same)
      throw InputError(stamp.path, "was replaced while kalends read it (another command writing into its folder?), so "
                                   "what was read may be part old, part new; nothing was written: run again when that "
                                   "command ends");
  }
}

Stack Stack::only_times(const std::vector<TimePoint>& keep) const {
  Stack kept = *this;
  std::erase_if(kept.layers_, [&](const Layer& l) { return !std::binary_search(keep.begin(), keep.end(), l.time); });
  return kept;
}

std::vector<TimePoint> Stack::times() const {
  std::vector<TimePoint> t;
  t.reserve(layers_.size());
  for (const Layer& layer : layers_) t.push_back(layer.time);
  return t;
}

std::unique_ptr<StackReader> Stack::reader() const { return std::make_unique<StackReader>(*this); }

struct StackReader::Handles {
  std::map<std::string, GDALDatasetUniquePtr> open;
  GDALRasterBand& band(const Layer& layer) {
    auto it = open.find(layer.path);
    if (it == open.end()) it = open.emplace(layer.path, detail::open_raster(layer.path)).first;
    return *it->second->GetRasterBand(layer.band);
  }
};

StackReader::StackReader(const Stack& stack) : stack_(stack), handles_(std::make_unique<Handles>()) {}
StackReader::~StackReader() = default;

[[noreturn]] static void throw_read_failed(const Layer& layer) { detail::throw_read_failed(layer.path); }

// QA bits, as stored.
static void read_window(GDALRasterBand& band, const Layer& layer, const Window& w, void* out,
                        GDALDataType type) {
  CPLErrorReset();
  if (band.RasterIO(GF_Read, w.x, w.y, w.width, w.height, out, w.width, w.height, type, 0, 0, nullptr) != CE_None)
    throw_read_failed(layer);
}

std::int64_t StackReader::read_values(std::size_t index, const Window& w, float* out) {
  if (index >= stack_.layers().size())
    throw UsageError("layer " + std::to_string(index), fmt::format("the stack has layers 0 to {}", stack_.layers().size() - 1));
  const Layer& layer = stack_.layers()[index];
  // Signed bytes as signed, and the cells the band's own mask marks invalid as NaN.
  CPLErrorReset();
  if (!detail::read_stored_values(handles_->band(layer), w.x, w.y, w.width, w.height, out, GDT_Float32))
    throw_read_failed(layer);
  const ValueRules& rules = stack_.rules();
  const bool has_nodata = layer.nodata.has_value();
  const float nodata = has_nodata ? float(*layer.nodata) : 0.0f;
  const bool nodata_is_nan = has_nodata && std::isnan(*layer.nodata);
  const double low = rules.valid_min.value_or(-INFINITY);
  const double high = rules.valid_max.value_or(INFINITY);
  const std::int64_t n = w.pixels();
  std::int64_t out_of_range = 0;
  for (std::int64_t i = 0; i < n; ++i) {
    const float raw = out[i];
    // In double, rounded once: float32 arithmetic would be one ulp off for a third of scaled
    // integers (raw * 0.0001f).
    const double v = double(raw) * layer.scale + layer.offset;
    const bool nodata_value = (has_nodata && !nodata_is_nan && raw == nodata) || !std::isfinite(v);
    // Beyond float32 after scale and offset (a scale of 1e37): outside, so that a date of only
    // such values is an error, not a date of inf flagged observed.
    const bool outside =
        !nodata_value && (!(v >= low && v <= high) || std::abs(v) > double(std::numeric_limits<float>::max()));
    out_of_range += outside;
    out[i] = nodata_value || outside ? NAN : float(v);
  }
  return out_of_range;
}

void StackReader::read_integers(std::size_t index, const Window& w, std::uint32_t* out) {
  const Layer& layer = stack_.layers()[index];
  GDALRasterBand& band = handles_->band(layer);
  const GDALDataType type = band.GetRasterDataType();
  const std::size_t n = std::size_t(w.pixels());
  if (GDALDataTypeIsFloating(type)) {
    // A QA value is a bit pattern: a NaN or a fraction (a QA layer resampled by averaging) has
    // none, and rounding it would invent one.
    std::vector<double> values(n);
    read_window(band, layer, w, values.data(), GDT_Float64);
    for (std::size_t i = 0; i < n; ++i) {
      const double v = values[i];
      if (!(v >= 0 && v <= 4294967295.0 && v == std::floor(v)))
        throw InputError(layer.path, fmt::format("QA value {} is not a whole number from 0 (a QA layer holds bit "
                                                 "patterns; was it resampled, or given NaN for nodata?)",
                                                 v));
      out[i] = std::uint32_t(v);
    }
  } else if (GDALDataTypeIsSigned(type)) {
    // Signed storage (a QA band beside int16 values): the bits as stored, so that bit 15 of
    // -32768 is set. GDAL would clamp a negative value to 0 on the way to an unsigned type.
    std::vector<std::int32_t> values(n);
    read_window(band, layer, w, values.data(), GDT_Int32);
    const int bits = GDALGetDataTypeSizeBits(type);
    const std::uint32_t mask = bits >= 32 ? 0xffffffffu : (1u << bits) - 1u;
    for (std::size_t i = 0; i < n; ++i) out[i] = std::uint32_t(values[i]) & mask;
  } else {
    read_window(band, layer, w, out, GDT_UInt32);
  }
}

}  // namespace kalends
