#include "io/gdal_session.hpp"

#include <cpl_conv.h>
#include <cpl_error.h>
#include <cpl_vsi.h>
#include <ogr_spatialref.h>
#include <fmt/format.h>

#include <fcntl.h>
#include <sys/resource.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <limits>
#include <cstdlib>
#include <mutex>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "io/file_glob.hpp"
#include "io/netcdf_header.hpp"
#include "kalends/error.hpp"

namespace kalends::detail {

namespace {
void quiet_handler(CPLErr type, CPLErrorNum, const char* message) {
  // GDAL aborts the program after a fatal error (an allocation CPLRealloc could not make):
  // one line first, as for every other failure, rather than a bare "Aborted".
  if (type != CE_Fatal) return;
  const std::string line = std::string("kalends: GDAL stopped the program: ") + (message ? message : "fatal error") +
                           " (out of memory? give a smaller --memory budget, or run where more memory is free); "
                           "this run's unfinished outputs stay hidden and the next run removes them\n";
  const ssize_t ignored = ::write(2, line.data(), line.size());
  (void)ignored;
}
}  // namespace

void start_gdal() {
  static std::once_flag once;
  std::call_once(once, [] {
    GDALAllRegister();
    // GRIB in the file's own units, labelled as such: GDAL 3.6 labels GRIB1 temperatures "[C]"
    // while still returning kelvin when it "normalises" them. A user's own setting wins.
    if (!CPLGetConfigOption("GRIB_NORMALIZE_UNITS", nullptr)) CPLSetConfigOption("GRIB_NORMALIZE_UNITS", "NO");
    // The last error is still recorded per thread (CPLGetLastErrorMsg) with a quiet handler.
    // A program using the library that set a handler of its own keeps it (it had been
    // replaced, and the program's own GDAL errors went unseen).
    const CPLErrorHandler previous = CPLSetErrorHandler(quiet_handler);
    if (previous != nullptr && previous != CPLDefaultErrorHandler) CPLSetErrorHandler(previous);
  });
}

GdalCacheScope::GdalCacheScope(std::int64_t bytes) : previous_(GDALGetCacheMax64()) { GDALSetCacheMax64(bytes); }

GdalCacheScope::~GdalCacheScope() { GDALSetCacheMax64(previous_); }

std::string gdal_message(const std::string& fallback) {
  const char* message = CPLGetLastErrorMsg();
  if (message == nullptr || *message == '\0') return fallback;
  std::string text(message);
  for (char& c : text)
    if (c == '\n' || c == '\r') c = ' ';
  return text;
}

namespace {

bool looks_like_grib(const std::string& path) {
  std::string extension = std::filesystem::path(path).extension().string();
  std::transform(extension.begin(), extension.end(), extension.begin(),
                 [](unsigned char c) { return char(std::tolower(c)); });
  if (extension == ".grib" || extension == ".grb" || extension == ".grib2" || extension == ".grb2") return true;
  // Any other name: GDAL's GRIB driver looks for the "GRIB" mark near the start, so do we
  // (through VSI, so that /vsizip/ and the like are read the same way).
  VSILFILE* file = VSIFOpenL(path.c_str(), "rb");
  if (file == nullptr) return false;
  char head[256] = {};
  const std::size_t read = VSIFReadL(head, 1, sizeof head, file);
  VSIFCloseL(file);
  return std::string_view(head, read).find("GRIB") != std::string_view::npos;
}

// degrib, GDAL's GRIB decoder, printf()s a warning to standard output when a file ends in
// trailing bytes (common in ERA5 downloads), which would mix into kalends' own output (the
// summaries, `kalends run --log json`). While a GRIB file opens, standard output points to
// /dev/null; one open at a time, since the descriptor is the process's. Nothing else writes to
// standard output while steps run (progress goes to standard error).
class QuietStandardOutput {
 public:
  QuietStandardOutput() : lock_(mutex()) {
    std::fflush(stdout);
    saved_ = ::dup(STDOUT_FILENO);
    const int null = ::open("/dev/null", O_WRONLY);
    if (saved_ >= 0 && null >= 0) ::dup2(null, STDOUT_FILENO);
    if (null >= 0) ::close(null);
  }
  ~QuietStandardOutput() {
    std::fflush(stdout);
    if (saved_ >= 0) {
      ::dup2(saved_, STDOUT_FILENO);
      ::close(saved_);
    }
  }
  QuietStandardOutput(const QuietStandardOutput&) = delete;
  QuietStandardOutput& operator=(const QuietStandardOutput&) = delete;

 private:
  static std::mutex& mutex() {
    static std::mutex m;
    return m;
  }
  std::lock_guard<std::mutex> lock_;
  int saved_ = -1;
};

}  // namespace

void require_not_cut_short(const std::string& file) {
  const auto promised = classic_netcdf_promised_size(file);
  if (!promised) return;
  VSIStatBufL status;
  if (VSIStatL(file.c_str(), &status) == 0 && std::uint64_t(status.st_size) < *promised)
    throw InputError(file, "is cut short: its header promises " + std::to_string(*promised) +
                               " bytes, the file has " + std::to_string(status.st_size) +
                               " (an incomplete download or copy?)");
}

bool memory_is_short() {
  void* probe = std::malloc(std::size_t(32) << 20);
  std::free(probe);
  return probe == nullptr;
}

void throw_unreadable(const std::string& path, const std::string& reason) {
  if (memory_is_short())
    throw Error(path, "cannot be read: out of memory (GDAL said: " + gdal_message("nothing") +
                          "); give a smaller --memory budget or run where more memory is free");
  // Out of file descriptors is the machine's limit, not a damaged file: it had been exit 2, and
  // --skip-bad left good composites out (or went on reopening them without end).
  if (reason.find("Too many open files") != std::string::npos) throw Error(path, "cannot be opened: " + open_files_limit_text());
  throw InputError(path, reason);
}

void throw_read_failed(const std::string& path) {
  std::string message = gdal_message("read failed");
  if (message.rfind(path + ", ", 0) == 0) message.erase(0, path.size() + 2);
  throw_unreadable(path, "cannot read pixels (" + message + "); the file may be truncated or corrupt");
}

std::string open_files_limit_text() {
  rlimit limit{};
  getrlimit(RLIMIT_NOFILE, &limit);
  // Said for every command (seasons, extract, report and validate reach it too), with what a
  // fill, the usual one, needs.
  return fmt::format("too many files open at once (the limit, ulimit -n, is {}); kalends keeps a stack's files open "
                     "while it reads them (a fill: each date's input and output, about twice as many as the stack "
                     "has dates): raise the limit (ulimit -n, or LimitNOFILE= in a systemd unit)",
                     static_cast<long long>(limit.rlim_cur));
}

void require_readable_pixel(const std::string& path, int band_index, int x, int y) {
  const GDALDatasetUniquePtr dataset = open_raster(path);
  GDALRasterBand* band = dataset->GetRasterBand(band_index);
  if (!band || x < 0 || y < 0 || x >= band->GetXSize() || y >= band->GetYSize()) return;
  double value = 0;
  CPLErrorReset();
  if (band->RasterIO(GF_Read, x, y, 1, 1, &value, 1, 1, GDT_Float64, 0, 0) != CE_None) throw_read_failed(path);
}

GDALDatasetUniquePtr open_raster(const std::string& path) {
  start_gdal();
  CPLErrorReset();
  std::optional<QuietStandardOutput> quiet;
  if (looks_like_grib(path)) quiet.emplace();
  GDALDatasetUniquePtr dataset(
      GDALDataset::Open(path.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY | GDAL_OF_VERBOSE_ERROR));
  quiet.reset();
  if (!dataset) {
    // An empty file (a download or copy that never wrote) had been "not recognized as a
    // supported file format".
    std::error_code ec;
    if (std::filesystem::is_regular_file(path, ec) && std::filesystem::file_size(path, ec) == 0 && !ec)
      throw InputError(path, "is empty (0 bytes): a download or copy that wrote nothing?");
    // A folder named like a raster had been "not recognized as a supported file format".
    if (std::filesystem::is_directory(path, ec)) throw InputError(path, "is a folder, not a raster");
    throw_unreadable(path, "cannot open as a raster (" + gdal_message("unknown format") + ")");
  }
  // A file GDAL opens with a warning that its structure is corrupt (a GeoTIFF cut short in its
  // tags: "GeoTIFF tags apparently corrupt") would be read without its georeferencing, and
  // then named as a grid or CRS that differs. The GeoTIFF driver reads those tags on first use.
  double transform[6];
  dataset->GetGeoTransform(transform);
  dataset->GetSpatialRef();
  if (CPLGetLastErrorType() != CE_None) {
    std::string last = CPLGetLastErrorMsg();
    std::string lower = last;
    for (char& c : lower) c = char(std::tolower(static_cast<unsigned char>(c)));
    if (lower.find("corrupt") != std::string::npos || lower.find("io error") != std::string::npos)
      throw_unreadable(path, "is damaged (GDAL: " + last + "); an incomplete download or copy?");
  }
  if (dataset->GetRasterCount() < 1) throw InputError(path, "has no raster band");
  require_not_cut_short(file_in_connection(path));
  return dataset;
}

bool holds_signed_bytes(GDALRasterBand& band) {
  if (band.GetRasterDataType() != GDT_Byte) return false;
  const char* pixel_type = band.GetMetadataItem("PIXELTYPE", "IMAGE_STRUCTURE");
  return pixel_type != nullptr && std::string_view(pixel_type) == "SIGNEDBYTE";
}

namespace {
// Another band of the dataset marked as alpha. GDAL takes one as the mask of Byte and UInt16
// bands only; `gdalwarp -dstalpha` writes one beside Float32 and Int16 data too.
GDALRasterBand* alpha_band_beside(GDALRasterBand& band) {
  GDALDataset* dataset = band.GetDataset();
  if (dataset == nullptr || band.GetColorInterpretation() == GCI_AlphaBand) return nullptr;
  for (int k = 1; k <= dataset->GetRasterCount(); ++k)
    if (GDALRasterBand* other = dataset->GetRasterBand(k);
        other != &band && other->GetColorInterpretation() == GCI_AlphaBand)
      return other;
  return nullptr;
}

// The band holding `band`'s validity (0 = no value), or null.
GDALRasterBand* own_mask_of(GDALRasterBand& band) {
  const int flags = band.GetMaskFlags();
  if (!(flags & GMF_ALL_VALID) && !(flags & GMF_NODATA)) return band.GetMaskBand();
  return alpha_band_beside(band);
}
}  // namespace

bool has_own_mask(GDALRasterBand& band) { return own_mask_of(band) != nullptr; }

std::string own_mask_name(GDALRasterBand& band) {
  GDALRasterBand* mask = own_mask_of(band);
  if (mask == nullptr) return "";
  return (band.GetMaskFlags() & GMF_ALPHA) || mask->GetColorInterpretation() == GCI_AlphaBand ? "alpha band" : "mask";
}

namespace {
template <typename Value>
void apply_signed_bytes_and_mask(GDALRasterBand& band, int x, int y, int width, int height, Value* values,
                                 bool& ok) {
  const std::size_t n = std::size_t(width) * std::size_t(height);
  if (holds_signed_bytes(band))
    for (std::size_t i = 0; i < n; ++i)
      if (values[i] > Value(127)) values[i] -= Value(256);
  GDALRasterBand* mask = own_mask_of(band);
  if (mask == nullptr) return;
  // As float: an alpha band of UInt16 or Float32 holds more than a byte's 0..255.
  std::vector<float> valid(n);
  if (mask->RasterIO(GF_Read, x, y, width, height, valid.data(), width, height, GDT_Float32, 0, 0, nullptr) != CE_None) {
    ok = false;
    return;
  }
  for (std::size_t i = 0; i < n; ++i)
    if (!(valid[i] > 0)) values[i] = std::numeric_limits<Value>::quiet_NaN();
}
}  // namespace

bool read_stored_values(GDALRasterBand& band, int x, int y, int width, int height, void* out,
                        GDALDataType type) {
  if (band.RasterIO(GF_Read, x, y, width, height, out, width, height, type, 0, 0, nullptr) != CE_None) return false;
  bool ok = true;
  if (type == GDT_Float32)
    apply_signed_bytes_and_mask(band, x, y, width, height, static_cast<float*>(out), ok);
  else
    apply_signed_bytes_and_mask(band, x, y, width, height, static_cast<double*>(out), ok);
  return ok;
}

bool is_fill_output(const std::string& path) {
  const GDALDatasetUniquePtr dataset = open_raster(path);
  return dataset->GetRasterCount() >= 3 && std::string(dataset->GetRasterBand(3)->GetDescription()) == "flag" &&
         dataset->GetMetadataItem("KALENDS_METHOD") != nullptr && dataset->GetMetadataItem("KALENDS_PERIOD") == nullptr;
}

bool is_flag_band(const std::string& path, int band) {
  const GDALDatasetUniquePtr dataset = open_raster(path);
  return band >= 1 && band <= dataset->GetRasterCount() &&
         std::string(dataset->GetRasterBand(band)->GetDescription()) == "flag" &&
         dataset->GetMetadataItem("KALENDS_METHOD") != nullptr;
}

std::string band_label(const std::string& path, int band) {
  std::string label;
  const GDALDatasetUniquePtr dataset = open_raster(path);
  if (band >= 1 && band <= dataset->GetRasterCount())
    for (char c : std::string(dataset->GetRasterBand(band)->GetDescription())) {
      const unsigned char u = static_cast<unsigned char>(c);
      if (std::isalnum(u)) label += char(std::tolower(u));
      else if (!label.empty() && label.back() != '_') label += '_';
    }
  while (!label.empty() && label.back() == '_') label.pop_back();
  return label.empty() ? "band" + std::to_string(band) : label;
}

std::string cell_size_text(const std::array<double, 6>& t, const std::string& crs_wkt) {
  std::string unit;
  OGRSpatialReference srs;
  if (!crs_wkt.empty() && srs.importFromWkt(crs_wkt.c_str()) == OGRERR_NONE) {
    if (srs.IsGeographic()) {
      unit = " degrees";
    } else {
      const char* name = nullptr;
      const double metres = srs.GetLinearUnits(&name);
      unit = metres == 1.0 ? std::string(" m") : name ? std::string(" ") + name : std::string();
    }
  }
  std::string text = fmt::format("{:.6g} x {:.6g}{}", std::hypot(t[1], t[4]), std::hypot(t[2], t[5]), unit);
  if (t[2] != 0 || t[4] != 0) return text + ", rotated";
  if (t[5] > 0) text += ", south-up";
  if (t[1] < 0) text += ", east to west";
  return text;
}

std::string crs_name_of(const std::string& wkt) {
  if (wkt.empty()) return "";
  OGRSpatialReference srs;
  if (srs.importFromWkt(wkt.c_str()) != OGRERR_NONE) return "(unreadable CRS)";
  std::string name = srs.GetName() ? srs.GetName() : "unnamed CRS";
  const char* authority = srs.GetAuthorityName(nullptr);
  const char* code = srs.GetAuthorityCode(nullptr);
  if (!authority || !code) {
    // A CRS read from WKT without an identifier may still be one the EPSG database knows.
    srs.AutoIdentifyEPSG();
    authority = srs.GetAuthorityName(nullptr);
    code = srs.GetAuthorityCode(nullptr);
  }
  if (authority && code) name += std::string(" (") + authority + ":" + code + ")";
  return name;
}

std::map<std::string, std::string> raster_metadata(const std::string& path) {
  std::map<std::string, std::string> items;
  CPLErrorReset();
  GDALDatasetUniquePtr ds(GDALDataset::Open(path.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  if (!ds) return items;
  CSLConstList list = ds->GetMetadata();
  for (int i = 0; list && list[i]; ++i) {
    const std::string item = list[i];
    if (const auto eq = item.find('='); eq != std::string::npos) items[item.substr(0, eq)] = item.substr(eq + 1);
  }
  return items;
}

void set_crs_from_user(OGRSpatialReference& srs, const std::string& text, const std::string& option) {
  start_gdal();  // PROJ's own message goes to GDAL's error slot, not to the terminal
  std::string upper;
  for (char c : text) upper += char(std::toupper(static_cast<unsigned char>(c)));
  const bool epsg = upper.rfind("EPSG:", 0) == 0;
  const bool digits = text.size() > 5 && std::all_of(text.begin() + 5, text.end(), [](char c) { return c >= '0' && c <= '9'; });
  if (epsg && !digits) throw UsageError(option + " '" + text + "'", "not a CRS PROJ knows");
  if (srs.SetFromUserInput(text.c_str()) != OGRERR_NONE) {
    // PROJ cannot open its database short of memory: not the user's CRS at fault.
    if (memory_is_short())
      throw Error(option + " '" + text + "'", "PROJ could not read it: out of memory; run where more memory is free");
    throw UsageError(option + " '" + text + "'", "not a CRS PROJ knows");
  }
}

}  // namespace kalends::detail
