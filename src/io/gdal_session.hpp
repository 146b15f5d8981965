// GDAL set-up and small helpers shared by the readers and writers.
#pragma once

#include <gdal_priv.h>

#include <cstdint>
#include <string>

namespace kalends::detail {

/// Registers drivers once and routes GDAL's messages into its per-thread last-error slot
/// instead of stderr, so errors reach the user once, as kalends errors.
void start_gdal();

/// Sets GDAL's block cache size (bytes); part of the memory budget.
void set_gdal_cache(std::int64_t bytes);

/// The last GDAL error message of this thread, or `fallback`.
std::string gdal_message(const std::string& fallback);

/// A CRS as people name it, with its EPSG code where the database knows it ("SIRGAS 2000 / UTM
/// zone 25S (EPSG:31985)"); "" without a CRS.
std::string crs_name_of(const std::string& wkt);

/// InputError naming `file` if it is a classic NetCDF file shorter than its header says.
void require_not_cut_short(const std::string& file);

/// Opens a raster read-only; InputError naming `path` if it cannot.
GDALDatasetUniquePtr open_raster(const std::string& path);

}  // namespace kalends::detail
