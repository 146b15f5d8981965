// Quicklook maps: a raster band (or the mean of several) read at reduced size (nearest cell),
// coloured and encoded as a PNG through GDAL's MEM and PNG drivers.
#pragma once

#include <array>
#include <string>
#include <vector>

namespace kalends::detail {

struct Quicklook {
  std::string png_base64;
  int width = 0, height = 0;
  double low = 0, high = 0;  // the values at the ends of the ramp
  double minimum = 0, maximum = 0;  // of the cells drawn: beyond the ends, they take the end colours
  long cells_with_value = 0;
};

/// The mean over `bands` (1-based) of `path`, coloured with viridis from its 2nd to its 98th
/// percentile (common practice for a display stretch); cells without a value are transparent.
Quicklook continuous_quicklook(const std::string& path, const std::vector<int>& bands, int max_size);

/// A fill flag band coloured by category (colour_ramp.hpp).
Quicklook flag_quicklook(const std::string& path, int band, int max_size);

/// A band of classes 0 .. classes - 1 (a compare class raster), each its own colour
/// (class_colour); a value outside them is transparent.
Quicklook class_quicklook(const std::string& path, int band, int classes, int max_size);

/// The colour of class k of n: evenly along viridis.
std::array<unsigned char, 3> class_colour(int k, int n);

/// Base64 of a PNG of RGBA pixels (row-major, 4 bytes a pixel).
std::string png_base64(const std::vector<unsigned char>& rgba, int width, int height);

}  // namespace kalends::detail
