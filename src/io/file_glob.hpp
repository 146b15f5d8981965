// Expanding a file pattern, the one way every reader does it; listing a folder's files.
#pragma once

#include <filesystem>
#include <optional>
#include <string>
#include <vector>

namespace kalends::detail {

/// Whether `text` holds a shell pattern's wildcards (*, ?, [).
bool has_glob_characters(const std::string& text);

/// `literal` as a pattern that matches only itself: each *, ?, [ and \ escaped with a backslash
/// (POSIX glob and fnmatch). For a folder kalends adds a pattern to: 'run[1]/' + '*.tif' had
/// matched the files of 'run1/'.
std::string glob_escape(const std::string& literal);

/// The files matching a shell pattern, sorted; InputError naming the pattern when none does.
std::vector<std::string> expand_glob(const std::string& pattern);

/// A GDAL connection string whose file part is a pattern, one variable of many files:
/// NETCDF:"daily/*.nc":tas, HDF4_EOS:EOS_GRID:"MOD13A1/*.hdf":MODIS_Grid_16DAY_500m_VI:"500m 16
/// days NDVI". `prefix` ends with the opening quote, `suffix` starts with the closing one.
struct ConnectionPattern {
  std::string prefix, files, suffix;
  std::string connection(const std::string& file) const { return prefix + file + suffix; }
  /// The variable's name, fit for file names: "tas", "500m_16_days_NDVI".
  std::string variable() const;
};
/// A GDAL connection string split around its (first) quoted file name, or nothing.
std::optional<ConnectionPattern> connection_parts(const std::string& input);

/// The file a GDAL connection string reads (NETCDF:"f.nc":tas -> f.nc; HDF5:"f.h5"://ndvi ->
/// f.h5), or `path` itself.
std::string file_in_connection(const std::string& path);

/// The pattern inside `input`, or nothing when `input` is not a connection string or names one
/// existing file.
std::optional<ConnectionPattern> connection_pattern(const std::string& input);

/// Every regular file below `folder` whose name does not start with '.' (partial writes and
/// state files), sorted; empty when the folder does not exist.
std::vector<std::string> files_below(const std::string& folder);

/// A folder walk's next step. InputError naming a folder below that cannot be read: the
/// iterator's own error names no path (the message had been "a path: Permission denied").
void walk_on(std::filesystem::recursive_directory_iterator& it);

}  // namespace kalends::detail
