#include "io/gdal_session.hpp"

#include <cpl_conv.h>
#include <cpl_error.h>

#include <mutex>

#include "kalends/error.hpp"

namespace kalends::detail {

namespace {
void quiet_handler(CPLErr, CPLErrorNum, const char*) {}
}  // namespace

void start_gdal() {
  static std::once_flag once;
  std::call_once(once, [] {
    GDALAllRegister();
    // GRIB in the file's own units, labelled as such: GDAL 3.6 labels GRIB1 temperatures "[C]"
    // while still returning kelvin when it "normalises" them. A user's own setting wins.
    if (!CPLGetConfigOption("GRIB_NORMALIZE_UNITS", nullptr)) CPLSetConfigOption("GRIB_NORMALIZE_UNITS", "NO");
    // The last error is still recorded per thread (CPLGetLastErrorMsg) with a quiet handler.
    CPLSetErrorHandler(quiet_handler);
  });
}

void set_gdal_cache(std::int64_t bytes) { GDALSetCacheMax64(bytes); }

std::string gdal_message(const std::string& fallback) {
  const char* message = CPLGetLastErrorMsg();
  if (message == nullptr || *message == '\0') return fallback;
  std::string text(message);
  for (char& c : text)
    if (c == '\n' || c == '\r') c = ' ';
  return text;
}

GDALDatasetUniquePtr open_raster(const std::string& path) {
  start_gdal();
  CPLErrorReset();
  GDALDatasetUniquePtr dataset(
      GDALDataset::Open(path.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY | GDAL_OF_VERBOSE_ERROR));
  if (!dataset) throw InputError(path, "cannot open as a raster (" + gdal_message("unknown format") + ")");
  if (dataset->GetRasterCount() < 1) throw InputError(path, "has no raster band");
  return dataset;
}

}  // namespace kalends::detail
