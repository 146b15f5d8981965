// GDAL set-up and small helpers shared by the readers and writers.
#pragma once

#include <ogr_spatialref.h>

#include <gdal_priv.h>

#include <cstdint>
#include <array>
#include <map>
#include <vector>
#include <string>

#include "kalends/stack.hpp"

namespace kalends::detail {

/// Registers drivers once and routes GDAL's messages into its per-thread last-error slot
/// instead of stderr, so errors reach the user once, as kalends errors.
void start_gdal();

/// Sets GDAL's block cache size (bytes); part of the memory budget.
/// GDAL's block cache for one run: set to `bytes` (a share of the memory budget) while it
/// lives, then back to what it was, so that a program using the library keeps its own setting.
class GdalCacheScope {
 public:
  explicit GdalCacheScope(std::int64_t bytes);
  ~GdalCacheScope();
  GdalCacheScope(const GdalCacheScope&) = delete;
  GdalCacheScope& operator=(const GdalCacheScope&) = delete;

 private:
  std::int64_t previous_;
};

/// The last GDAL error message of this thread, or `fallback`.
std::string gdal_message(const std::string& fallback);

/// Whether the process is short of memory (32 MiB cannot be had now): GDAL and libtiff report a
/// failed allocation as a corrupt or unreadable file, which must not make a good input "bad"
/// (--skip-bad would leave it out for good).
bool memory_is_short();

/// The error for a file that GDAL could not open or read, `reason` naming what it saw: a plain
/// Error (exit 1, not skipped as bad input) where memory is short, else InputError.
[[noreturn]] void throw_unreadable(const std::string& path, const std::string& reason);

/// throw_unreadable for pixels of `path` that GDAL failed to read (call right after the failed
/// read, with CPLErrorReset before it): "cannot read pixels (...); the file may be truncated or
/// corrupt", GDAL's message without the file name it repeats.
[[noreturn]] void throw_read_failed(const std::string& path);

/// What to say where a file cannot be opened or created for want of file descriptors (EMFILE):
/// the limit, and that a fill keeps every date's files open.
std::string open_files_limit_text();

/// A CRS as people name it, with its EPSG code where the database knows it ("SIRGAS 2000 / UTM
/// zone 25S (EPSG:31985)"); "" without a CRS.
std::string crs_name_of(const std::string& wkt);

/// A grid's cells as people read them: their size on the ground in the CRS's unit
/// ("250 x 250 m", "0.125 x 0.125 degrees"), and ", south-up" / ", east to west" / ", rotated"
/// where the geotransform is not north-up (inspect and the report had shown "250 x -250").
std::string cell_size_text(const std::array<double, 6>& geotransform, const std::string& crs_wkt);

/// The dataset-level metadata of the raster at `path`, key -> value; empty when GDAL cannot
/// open it as a raster. Tells kalends' own outputs (KALENDS_VERSION, KALENDS_METHOD,
/// KALENDS_YEAR) from files a user keeps beside them.
std::map<std::string, std::string> raster_metadata(const std::string& path);

/// `srs` set from what a user typed for `option` (EPSG:32736, WKT, a PROJ string); UsageError
/// when PROJ does not know it, or when an EPSG code has anything after its digits (PROJ reads
/// "EPSG:4326x" as EPSG:4326: a slip would go unseen).
void set_crs_from_user(OGRSpatialReference& srs, const std::string& text, const std::string& option);

/// InputError naming `file` if it is a classic NetCDF file shorter than its header says.
void require_not_cut_short(const std::string& file);

/// Opens a raster read-only; InputError naming `path` if it cannot.
GDALDatasetUniquePtr open_raster(const std::string& path);

/// Reads the one pixel (x, y) of `band` (require_readable, stack.hpp); throw_read_failed.
void require_readable_pixel(const std::string& path, int band, int x, int y);

/// Whether a Byte band holds signed bytes (PIXELTYPE=SIGNEDBYTE: GDAL before 3.7 has no Int8
/// type and stores int8 so). Read into a float buffer they come out as 0..255.
bool holds_signed_bytes(GDALRasterBand& band);

/// Whether the band has a mask GDAL does not derive from its nodata value: an internal or
/// sidecar mask (.msk), a mask of its own, or an alpha band (also beside Float32 and Int16
/// bands, which GDAL leaves unmasked). Cells it marks 0 hold no value.
bool has_own_mask(GDALRasterBand& band);
/// That mask as a user reads it: "alpha band" or "mask"; "" where the band has none.
std::string own_mask_name(GDALRasterBand& band);

/// Reads a window of `band` as stored values into `out` (`type` GDT_Float32 or GDT_Float64),
/// with what RasterIO into a float buffer leaves out: signed bytes read as signed, and the
/// cells the band's own mask marks invalid set to NaN (a nodata value is left to the caller,
/// which may replace it with --nodata). False where GDAL cannot read; its message is the
/// thread's last error.
bool read_stored_values(GDALRasterBand& band, int x, int y, int width, int height, void* out,
                        GDALDataType type);

/// A raster's grid as a stack reads it: size, geotransform (identity where it has none; see
/// has_geotransform) and CRS (WGS 84 for a NetCDF with CF longitude/latitude axes and no CRS).
Grid raster_grid(GDALDataset& dataset);

/// The subdatasets of a container file with several variables (NetCDF, HDF4, HDF5), which opens
/// with no band of its own (NETCDF:"f.nc":tas, ...); none for any other file.
std::vector<std::string> subdatasets_of(const std::string& path);

/// What a file's name shares with the rest of its stack: the part before its date, separators
/// trimmed ("ndvi_2004-05-24.tif" -> "ndvi", "MOD13A1.A2004145.h12v04.hdf" -> "MOD13A1"), the stem
/// where it has no date, "filled" where that is empty. A stack is named so.
std::string name_from_file(const std::string& path);

/// Whether `path` is one of `kalends fill`'s dated outputs (value, sd and flag bands; not a
/// calendar period mean, whose flag means something else).
bool is_fill_output(const std::string& path);

/// Whether band `band` of `path` is the flag band of a kalends fill output (its dated outputs and
/// its calendar means alike): codes, not values.
bool is_flag_band(const std::string& path, int band);

/// A band's description made fit for a file name ("sd", "flag"), else "band<N>".
std::string band_label(const std::string& path, int band);

}  // namespace kalends::detail
