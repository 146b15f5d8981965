#include "report/quicklook.hpp"

#include <cpl_string.h>
#include <cpl_vsi.h>
#include <gdal_priv.h>

#include <algorithm>
#include <cmath>

#include "io/gdal_session.hpp"
#include "kalends/error.hpp"
#include "report/colour_ramp.hpp"

namespace kalends::detail {

namespace {

struct Reduced {
  int width = 0, height = 0;
  std::vector<double> values;  // NaN where no value
};

Reduced read_reduced(const std::string& path, const std::vector<int>& bands, int max_size) {
  GDALDatasetUniquePtr ds = open_raster(path);
  const int w = ds->GetRasterXSize(), h = ds->GetRasterYSize();
  const double shrink = std::max(1.0, double(std::max(w, h)) / max_size);
  Reduced r;
  r.width = std::max(1, int(std::lround(w / shrink)));
  r.height = std::max(1, int(std::lround(h / shrink)));
  const std::size_t n = std::size_t(r.width) * r.height;
  std::vector<double> sum(n, 0.0), band_values(n);
  std::vector<int> count(n, 0);
  for (int b : bands) {
    GDALRasterBand* band = ds->GetRasterBand(b);
    if (!band) throw InputError(path, "has no band " + std::to_string(b));
    CPLErrorReset();
    if (band->RasterIO(GF_Read, 0, 0, w, h, band_values.data(), r.width, r.height, GDT_Float64, 0, 0) != CE_None)
      throw_read_failed(path);
    int has_nodata = 0;
    const double nodata = band->GetNoDataValue(&has_nodata);
    const double scale = band->GetScale(), offset = band->GetOffset();
    for (std::size_t i = 0; i < n; ++i) {
      const double v = band_values[i];
      if (std::isnan(v) || (has_nodata && v == nodata)) continue;
      sum[i] += v * scale + offset;
      ++count[i];
    }
  }
  r.values.resize(n);
  for (std::size_t i = 0; i < n; ++i) r.values[i] = count[i] ? sum[i] / count[i] : NAN;
  // North up and west left, as GIS tools draw a layer: a south-up raster (positive pixel
  // height, as GeoTIFFs from ascending-latitude NetCDF often are) had been drawn upside down.
  // A rotated grid is drawn as stored.
  double t[6];
  if (ds->GetGeoTransform(t) == CE_None && t[2] == 0 && t[4] == 0) {
    if (t[5] > 0)
      for (int row = 0; row < r.height / 2; ++row)
        std::swap_ranges(r.values.begin() + std::ptrdiff_t(row) * r.width, r.values.begin() + std::ptrdiff_t(row + 1) * r.width,
                         r.values.begin() + std::ptrdiff_t(r.height - 1 - row) * r.width);
    if (t[1] < 0)
      for (int row = 0; row < r.height; ++row)
        std::reverse(r.values.begin() + std::ptrdiff_t(row) * r.width, r.values.begin() + std::ptrdiff_t(row + 1) * r.width);
  }
  return r;
}

}  // namespace

std::string png_base64(const std::vector<unsigned char>& rgba, int width, int height) {
  start_gdal();
  GDALDriver* mem = GetGDALDriverManager()->GetDriverByName("MEM");
  GDALDriver* png = GetGDALDriverManager()->GetDriverByName("PNG");
  if (!mem || !png) throw OutputError("GDAL", "the MEM and PNG drivers are needed for the report's maps");
  GDALDatasetUniquePtr image(mem->Create("", width, height, 4, GDT_Byte, nullptr));
  for (int b = 0; b < 4; ++b) {
    // pixel spacing 4, line spacing 4 * width: the interleaved buffer, band by band
    auto* band = image->GetRasterBand(b + 1);
    if (band->RasterIO(GF_Write, 0, 0, width, height, const_cast<unsigned char*>(rgba.data()) + b, width, height,
                       GDT_Byte, 4, GSpacing(4) * width) != CE_None)
      throw OutputError("report", "cannot build a map image");
  }
  // /vsimem/ names are shared by the process: the buffer's address keeps concurrent calls apart,
  // and the file is gone (taken with its buffer) before this returns.
  const std::string name =
      "/vsimem/kalends_quicklook_" + std::to_string(reinterpret_cast<std::uintptr_t>(rgba.data())) + ".png";
  GDALDatasetUniquePtr written(png->CreateCopy(name.c_str(), image.get(), FALSE, nullptr, nullptr, nullptr));
  if (!written) throw OutputError("report", gdal_message("cannot encode a PNG"));
  written.reset();
  vsi_l_offset length = 0;
  GByte* bytes = VSIGetMemFileBuffer(name.c_str(), &length, TRUE);
  char* text = CPLBase64Encode(static_cast<int>(length), bytes);
  std::string encoded = text;
  CPLFree(text);
  CPLFree(bytes);
  VSIUnlink((name + ".aux.xml").c_str());
  return encoded;
}

Quicklook continuous_quicklook(const std::string& path, const std::vector<int>& bands, int max_size) {
  const Reduced r = read_reduced(path, bands, max_size);
  std::vector<double> finite;
  for (double v : r.values)
    if (std::isfinite(v)) finite.push_back(v);
  Quicklook q;
  q.width = r.width;
  q.height = r.height;
  q.cells_with_value = static_cast<long>(finite.size());
  if (!finite.empty()) {
    auto at = [&](double share) {
      const std::size_t k = static_cast<std::size_t>(share * (finite.size() - 1));
      std::nth_element(finite.begin(), finite.begin() + k, finite.end());
      return finite[k];
    };
    q.low = at(0.02);
    q.high = at(0.98);
    const auto [smallest, largest] = std::minmax_element(finite.begin(), finite.end());
    q.minimum = *smallest;
    q.maximum = *largest;
  }
  std::vector<unsigned char> rgba(r.values.size() * 4, 0);
  const double span = q.high > q.low ? q.high - q.low : 1.0;
  for (std::size_t i = 0; i < r.values.size(); ++i) {
    if (!std::isfinite(r.values[i])) continue;
    const Rgb c = viridis((r.values[i] - q.low) / span);
    rgba[4 * i] = c[0], rgba[4 * i + 1] = c[1], rgba[4 * i + 2] = c[2], rgba[4 * i + 3] = 255;
  }
  q.png_base64 = png_base64(rgba, r.width, r.height);
  return q;
}

Quicklook flag_quicklook(const std::string& path, int band, int max_size) {
  const Reduced r = read_reduced(path, {band}, max_size);
  Quicklook q;
  q.width = r.width;
  q.height = r.height;
  q.low = 0;
  q.high = 3;
  std::vector<unsigned char> rgba(r.values.size() * 4, 0);
  for (std::size_t i = 0; i < r.values.size(); ++i) {
    if (!std::isfinite(r.values[i])) continue;
    ++q.cells_with_value;
    const Rgb c = flag_colour(static_cast<int>(r.values[i]));
    rgba[4 * i] = c[0], rgba[4 * i + 1] = c[1], rgba[4 * i + 2] = c[2], rgba[4 * i + 3] = 255;
  }
  q.png_base64 = png_base64(rgba, r.width, r.height);
  return q;
}

std::array<unsigned char, 3> class_colour(int k, int n) {
  const Rgb c = viridis(n > 1 ? double(k) / (n - 1) : 0.5);
  return {c[0], c[1], c[2]};
}

Quicklook class_quicklook(const std::string& path, int band, int classes, int max_size) {
  const Reduced r = read_reduced(path, {band}, max_size);
  Quicklook q;
  q.width = r.width;
  q.height = r.height;
  q.low = 0;
  q.high = classes - 1;
  std::vector<unsigned char> rgba(r.values.size() * 4, 0);
  for (std::size_t i = 0; i < r.values.size(); ++i) {
    const double v = r.values[i];
    if (!std::isfinite(v) || v != std::floor(v) || v < 0 || v >= classes) continue;
    ++q.cells_with_value;
    const auto c = class_colour(int(v), classes);
    rgba[4 * i] = c[0], rgba[4 * i + 1] = c[1], rgba[4 * i + 2] = c[2], rgba[4 * i + 3] = 255;
  }
  q.png_base64 = png_base64(rgba, r.width, r.height);
  return q;
}

}  // namespace kalends::detail
