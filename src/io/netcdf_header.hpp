// The size a classic NetCDF file's header promises, to catch a file cut short.
#pragma once

#include <cstdint>
#include <optional>
#include <string>

namespace kalends::detail {

/// The number of bytes the header of a classic, 64-bit-offset or CDF-5 NetCDF file says its
/// variables end at; nothing for any other file, or a header that cannot be parsed. The netCDF
/// library reads the missing end of a truncated classic file as zeros without a word, so an
/// incomplete download would otherwise pass as a month of 0 °C dated on the time origin.
std::optional<std::uint64_t> classic_netcdf_promised_size(const std::string& file);

}  // namespace kalends::detail
