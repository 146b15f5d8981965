// A set of GeoTIFFs written block by block and published all at once: each is written under a
// hidden temporary name and renamed only when every one is complete.
#pragma once

#include "io/text_file.hpp"

#include <gdal_priv.h>

#include <map>
#include <set>
#include <memory>
#include <mutex>
#include <span>
#include <string>
#include <vector>

#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/stack.hpp"

namespace kalends::detail {

/// The error for a failed write of `path`: says the device is full when it has (almost) no
/// space left, the likeliest reason, which GDAL's own message ("TIFFRewriteDirectory: Error
/// fetching directory count") does not say; `what` follows.
OutputError write_failure(const std::string& path, const std::string& what);

/// Throws write_failure(target) where GDAL, closing the raster `written`, put part of its header
/// (the CRS) in a side file `written`.aux.xml because it did not fit (a memory limit): a rename
/// would leave that file behind and publish the raster without it. The side file is removed.
void require_header_in_file(const std::string& written, const std::string& target);

/// Refuses an output name (`--name`, a job step's `name`) that is not a plain file-name part:
/// with '/' or '\\', or a leading '.', a name of '../x' had written outside the output folder.
void require_plain_name(const std::string& name, const std::string& option = "--name");

struct BandSpec {
  std::string description;
  std::string unit;
  std::map<std::string, std::string> metadata;
};

/// The bands `kalends fill` writes: value, sd, flag; a calendar period's flags mean other things.
std::vector<BandSpec> fill_bands(const std::string& unit, bool calendar_period = false);

struct OutputSpec {
  std::string path;  // final name
  std::map<std::string, std::string> metadata;
  std::vector<BandSpec> bands;  // float32, nodata NaN
};

/// A run's output folder: created, with any missing parents, at once, and held for this run
/// alone (an exclusive lock on the folder itself, released on destruction): a second command
/// writing into the same folder is refused (OutputError), since both would publish the same
/// names. On destruction the folders it created are removed again if the run left them empty
/// (a run that failed before writing), so that a failed run leaves the disk as it found it.
/// The lock file of an output folder on a file system where the folder itself cannot be
/// locked (NFS), hidden in it.
inline constexpr const char* folder_lock_file = ".kalends-lock";

class OutputFolder {
 public:
  explicit OutputFolder(const std::string& path);
  ~OutputFolder();
  OutputFolder(const OutputFolder&) = delete;
  OutputFolder& operator=(const OutputFolder&) = delete;

 private:
  std::vector<std::string> created_;  // outermost first
  int lock_ = -1;                     // the folder, open and locked
};

/// UsageError naming --out when `out_dir` is the folder of `stack`'s own files (`option`: what
/// they are, "input" or "QA"): the outputs would replace them, or a later run would remove
/// them as outputs it no longer makes.
void require_out_apart_from(const Stack& stack, const std::string& out_dir, const std::string& option);

/// After a run that wrote the year-specific layers of [first_year, last_year] into `folder`:
/// removes the rasters `<name>_<kind>_YYYY.tif` there whose KALENDS_YEAR lies outside that span, an
/// earlier run's years that are no longer in the input (or in --years). Later steps would read
/// them with the new layers as one set. Only kalends outputs carry KALENDS_YEAR. Returns the
/// years removed; `files_removed`, where given, counts the files.
std::vector<int> remove_year_layers_outside(const std::string& folder, const std::string& name,
                                            const std::vector<std::string>& kinds, int first_year, int last_year,
                                            int* files_removed = nullptr);

/// The side of an output's tiles: `tile`, or for a grid that fits in one tile, its larger side
/// rounded up to 16 px (TIFF tiles are multiples of 16). A 6 x 6 px grid of 1826 daily dates
/// had written 256 x 256 px tiles of 3 bands: its fill took 26.0 s and 1.14 GB against 19.9 s
/// and 0.98 GB now (2 threads; most of the rest is GDAL's objects of 5 000 open files).
int output_tile(const Grid& grid, int tile);

class OutputSet {
 public:
  /// Creates every file (under its temporary name) with its float32 bands (nodata NaN):
  /// tiled output_tile(grid, tile) px, band-interleaved, compressed, georeferenced as `grid`.
  OutputSet(std::vector<OutputSpec> specs, const Grid& grid, Compression compression, int tile);
  ~OutputSet();  // removes the temporaries unless commit() succeeded
  OutputSet(const OutputSet&) = delete;
  OutputSet& operator=(const OutputSet&) = delete;

  std::size_t size() const noexcept { return files_.size(); }
  /// The final names of every file, in order.
  std::vector<std::string> paths() const {
    std::vector<std::string> names;
    for (const auto& file : files_) names.push_back(file->spec.path);
    return names;
  }

  /// Where the outputs' corner lies in the pixel grid that write() is given windows of (a
  /// region of a larger input raster); 0,0 by default.
  void set_origin(int x, int y) {
    origin_x_ = x;
    origin_y_ = y;
  }

  /// Writes the three bands of `core` (tile-aligned) of output `index`. Thread-safe; tiles are
  /// written whole, past GDAL's block cache, so no dirty block is ever shared between threads.
  /// `scratch` is the caller's tile buffer.
  void write(std::size_t index, const Window& core, std::span<const float* const> planes,
             std::vector<float>& scratch);
  void write(std::size_t index, const Window& core, const float* value, const float* sd,
             const float* flag, std::vector<float>& scratch) {
    const float* planes[3] = {value, sd, flag};
    write(index, core, planes, scratch);
  }

  /// Writes `core` of every output from `bands`: the bands of all files, file after file, each
  /// a plane of core.pixels() values.
  void write_all(const Window& core, const std::vector<std::vector<float>>& bands, std::vector<float>& scratch);

  /// Closes, syncs and renames every file to its final name. With keep_unchanged, a file whose
  /// final name already holds the same pixels, band descriptions and metadata is left as it
  /// is (same bytes, same modification time) and the new copy is dropped.
  void commit();
  void set_keep_unchanged(bool keep) { keep_unchanged_ = keep; }
  /// After commit: how many files were written and how many were left unchanged.
  int written() const { return written_; }
  int unchanged() const { return unchanged_; }

 private:
  struct File {
    OutputSpec spec;
    std::string temporary;
    GDALDatasetUniquePtr dataset;
    std::mutex mutex;
  };
  std::vector<std::unique_ptr<File>> files_;
  int tile_ = 256;
  int origin_x_ = 0, origin_y_ = 0;
  bool committed_ = false;
  bool keep_unchanged_ = false;
  bool has_geotransform_ = false, has_crs_ = false;  // what every file must read back with
  int written_ = 0, unchanged_ = 0;
};

/// True when two rasters hold the same size, bands (pixels bit for bit, descriptions, band
/// metadata, unit, scale and offset) and dataset metadata.
bool same_raster_content(const std::string& a, const std::string& b);

/// Writes `window` of raster `source` (all bands, or band `band` alone when it is above 0;
/// types kept) to GeoTIFF `path`, which the caller then renames into place.
void crop_raster(const std::string& source, const Window& window, const std::string& path, int band = 0);

/// Publishes a finished temporary file under its final name (fsync, rename, fsync the folder).
void publish_file(const std::string& temporary, const std::string& final_path);

/// Marks `folders` as being published into (half_published_marker) until unmark_publishing: renames
/// are one at a time, so a run killed among them leaves some outputs new and some old under their
/// final names, and readers refuse a folder with the mark (require_not_half_published).
void mark_publishing(const std::set<std::string>& folders);
void unmark_publishing(const std::set<std::string>& folders);

/// The hidden name a file is written under before it is published.
std::string temporary_name(const std::string& final_path, const std::string& tag = "");

/// True when two files hold the same bytes.
bool file_checksum_equal(const std::string& a, const std::string& b);

}  // namespace kalends::detail
