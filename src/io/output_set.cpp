#include "io/output_set.hpp"

#include <gdal_utils.h>

#include <fcntl.h>
#include <sys/file.h>
#include <sys/resource.h>
#include <sys/statvfs.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <regex>
#include <set>
#include <stdexcept>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "kalends/error.hpp"

namespace kalends::detail {

namespace fs = std::filesystem;

OutputError write_failure(const std::string& path, const std::string& what) {
  if (what.find("Too many open files") != std::string::npos) return OutputError(path, "cannot create: " + open_files_limit_text());
  struct statvfs device{};
  const std::string folder = fs::path(path).parent_path().string();
  // A file system of no blocks (/proc, /sys) is not full: it holds no files of ours at all.
  if (::statvfs(folder.empty() ? "." : folder.c_str(), &device) == 0 && device.f_blocks > 0) {
    const unsigned long long free_bytes = static_cast<unsigned long long>(device.f_bavail) * device.f_frsize;
    if (free_bytes < (4ull << 20))
      return OutputError(path, "no space left on the device (" + std::to_string(free_bytes >> 10) + " KiB free); " + what);
  }
  // GDAL's words for a write past a file-size limit (EFBIG) or an allocation that failed name
  // neither cause: the user had been left looking at the disk.
  std::string lower = what;
  std::transform(lower.begin(), lower.end(), lower.begin(), [](unsigned char c) { return char(std::tolower(c)); });
  rlimit limit{};
  if ((lower.find("write error") != std::string::npos || lower.find("too large") != std::string::npos ||
       lower.find("cannot write") != std::string::npos || lower.find("write failed") != std::string::npos) &&
      getrlimit(RLIMIT_FSIZE, &limit) == 0 && limit.rlim_cur != RLIM_INFINITY)
    return OutputError(path, what + " (a file-size limit, ulimit -f, of " +
                                 std::to_string(std::uintmax_t(limit.rlim_cur) >> 10) + " KiB is set: raise it)");
  if (lower.find("memory") != std::string::npos && lower.find("out of memory?") == std::string::npos)
    return OutputError(path, what + " (out of memory: give a smaller --memory budget or fewer --threads, or run where "
                                    "more memory is free)");
  return OutputError(path, what);
}

void require_plain_name(const std::string& name, const std::string& option) {
  const bool control = std::any_of(name.begin(), name.end(), [](char c) { return (unsigned char)c < 0x20; });
  // Wildcards and a blank name too (found by fuzzing): '*_2021-01-01.tif' reads back as a
  // pattern of every output, and ' _2021-01-01.tif' looks nameless in a listing.
  const bool blank = name.find_first_not_of(" ") == std::string::npos && !name.empty();
  if (name.find_first_of("/\\*?[]") != std::string::npos || (!name.empty() && name.front() == '.') || control || blank)
    throw UsageError(option + " '" + name + "'",
                     "must be a plain name (no '/', '\\', wildcards, control characters, leading '.' or only "
                     "spaces): the outputs are <name>_<layer>.tif inside the output folder");
}

void require_header_in_file(const std::string& written, const std::string& target) {
  const std::string side = written + ".aux.xml";
  std::error_code ec;
  if (!fs::exists(side, ec)) return;
  fs::remove(side, ec);
  throw write_failure(target, "GDAL could not write the whole header into the file (out of memory?)");
}

std::string temporary_name(const std::string& final_path, const std::string& tag) {
  const fs::path p(final_path);
  std::string name = ".";
  name += p.filename().string();
  if (!tag.empty()) name.append(".").append(tag);
  name += ".partial";
  return (p.parent_path() / name).string();
}

namespace {

void sync_path(const std::string& path, bool directory) {
  const int fd = ::open(path.c_str(), directory ? O_RDONLY | O_DIRECTORY : O_RDONLY);
  if (fd < 0) return;
  ::fsync(fd);
  ::close(fd);
}

void publish(const std::string& temporary, const std::string& final_path) {
  sync_path(temporary, false);
  std::error_code ec;
  fs::rename(temporary, final_path, ec);
  if (ec) throw OutputError(final_path, "cannot rename the finished file into place: " + ec.message());
}

const char* compression_name(Compression c) {
  switch (c) {
    case Compression::deflate: return "DEFLATE";
    case Compression::zstd: return "ZSTD";
    case Compression::lzw: return "LZW";
    case Compression::none: return "NONE";
  }
  return "NONE";
}

}  // namespace

std::vector<BandSpec> fill_bands(const std::string& unit, bool calendar_period) {
  // A calendar period's flag says whether an observation was kept inside it: the date's
  // meanings, which the calendar files had carried too, name a 1 that never occurs there.
  const char* meanings = calendar_period ? "0=an observation was kept inside the period, 2=none was (the period mean "
                                           "of the fitted curve), 3=no value"
                                         : "0=observed and kept, 1=observed but rejected as an outlier, "
                                           "2=filled, 3=could not be filled";
  return {{"value", unit, {}}, {"sd", unit, {}}, {"flag", "", {{"FLAG_MEANINGS", meanings}}}};
}

bool file_checksum_equal(const std::string& a, const std::string& b) {
  std::ifstream x(a, std::ios::binary), y(b, std::ios::binary);
  if (!x || !y) return false;
  std::vector<char> bx(1 << 16), by(1 << 16);
  while (true) {
    x.read(bx.data(), std::streamsize(bx.size()));
    y.read(by.data(), std::streamsize(by.size()));
    if (x.gcount() != y.gcount()) return false;
    if (std::memcmp(bx.data(), by.data(), std::size_t(x.gcount())) != 0) return false;
    if (x.gcount() == 0 || !x) return !y || y.peek() == EOF;
  }
}

void publish_file(const std::string& temporary, const std::string& final_path) {
  publish(temporary, final_path);
  sync_path(fs::path(final_path).parent_path().string(), true);
}

void mark_publishing(const std::set<std::string>& folders) {
  for (const std::string& folder : folders) {
    const std::string marker = (fs::path(folder) / half_published_marker).string();
    if (FILE* f = std::fopen(marker.c_str(), "w")) {
      std::fputs("kalends: outputs of this folder are being replaced; a run killed meanwhile left them mixed\n", f);
      std::fclose(f);
    }
    sync_path(folder, true);
  }
}

void unmark_publishing(const std::set<std::string>& folders) {
  for (const std::string& folder : folders) {
    std::error_code ec;
    fs::remove(fs::path(folder) / half_published_marker, ec);
    sync_path(folder, true);
  }
}

namespace {
// The user's choice of folder, as an --out naming a file is: exit 2, not a failed write.
[[noreturn]] void refuse_foreign_file(const std::string& path) {
  // A single output file (--save-parameters, --html) is chosen by name, not by folder.
  throw UsageError(path, "exists and was not written by kalends; move it away or write elsewhere (another name or "
                         "output folder; nothing was replaced)");
}
}  // namespace

void require_file_destination(const std::string& path, const std::string& option, const std::string& example) {
  if (path.empty()) throw UsageError(option, "needs a file name, e.g. " + example);
  std::error_code ec;
  if (fs::is_directory(path, ec))
    throw UsageError(option + " '" + path + "'", "is a folder; give a file name, e.g. " + example);
  const fs::path folder = fs::path(path).parent_path();
  if (!folder.empty() && !fs::is_directory(folder, ec))
    throw UsageError(option + " '" + path + "'", "the folder '" + folder.string() + "' does not exist");
}

void require_own_text_file(const std::string& path, const std::string& mark) {
  std::error_code ec;
  if (!fs::exists(path, ec)) return;
  std::ifstream in(path, std::ios::binary);
  std::string head(4096, '\0');
  in.read(head.data(), std::streamsize(head.size()));
  head.resize(std::size_t(in.gcount()));
  if (head.find(mark) == std::string::npos) refuse_foreign_file(path);
}

void require_own_raster(const std::string& path, std::initializer_list<const char*> marks) {
  std::error_code ec;
  if (!fs::exists(path, ec)) return;
  const std::map<std::string, std::string> metadata = raster_metadata(path);
  for (const char* mark : marks)
    if (metadata.count(mark)) return;
  refuse_foreign_file(path);
}

bool write_text_atomically(const std::string& path, const std::string& text) {
  {
    std::error_code ec;
    // Read as a file, a folder had given "basic_filebuf::underflow error reading the file".
    if (fs::is_directory(path, ec)) throw UsageError(path, "is a folder; give a file name");
    // Only a plain file is read for the comparison: a FIFO there had made the write wait for
    // ever (a wisdom cache, a table).
    std::ifstream existing;
    if (fs::is_regular_file(path, ec)) existing.open(path, std::ios::binary);
    if (existing.is_open() && existing) {
      const std::string old((std::istreambuf_iterator<char>(existing)), std::istreambuf_iterator<char>());
      if (old == text) return false;
    }
  }
  // One temporary per process: runs in parallel (a test suite, array jobs, caches shared
  // between runs) may write the same file at once, and the last rename wins with a whole file.
  const std::string temporary = temporary_name(path, std::to_string(::getpid()));
  {
    errno = 0;
    std::ofstream out(temporary, std::ios::binary | std::ios::trunc);
    out << text;
    out.flush();
    if (!out) {
      // The system's reason (a missing folder, a file-size limit): "cannot write" alone had
      // named none.
      const int error = errno;
      std::error_code ec;
      fs::remove(temporary, ec);
      throw write_failure(path, error ? std::string("cannot write (") + std::strerror(error) + ")" : "cannot write");
    }
  }
  try {
    publish(temporary, path);
  } catch (const Error&) {
    std::error_code ec;
    fs::remove(temporary, ec);  // left behind, it had stayed for good beside a table
    throw;
  }
  sync_path(fs::path(path).parent_path().string(), true);
  return true;
}

OutputFolder::OutputFolder(const std::string& path) {
  std::error_code ec;
  for (fs::path p = fs::absolute(path, ec); !p.empty() && !fs::exists(p, ec); p = p.parent_path()) {
    created_.insert(created_.begin(), p.string());
    if (p == p.parent_path()) break;
  }
  fs::create_directories(path, ec);
  if (ec) throw OutputError(path, "cannot create the output folder: " + ec.message());
  // flock on the folder itself leaves no lock file behind; it is released when the process
  // ends, however it ends.
  auto take = [&](const std::string& what, int flags) {
    lock_ = ::open(what.c_str(), flags | O_CLOEXEC, 0644);
    if (lock_ < 0) return false;
    if (::flock(lock_, LOCK_EX | LOCK_NB) == 0) return true;
    const bool held = errno == EWOULDBLOCK;
    ::close(lock_);
    lock_ = -1;
    if (held) throw OutputError(path, "another kalends command is writing into or reading this folder; try again when it ends");
    return false;
  };
  // Where a folder cannot be locked (NFS locks only files open for writing), a hidden lock
  // file in it is; a file system with no locks at all runs unguarded, as before.
  if (!take(path, O_RDONLY | O_DIRECTORY)) take((fs::path(path) / folder_lock_file).string(), O_RDWR | O_CREAT);
  // Holding the folder, the hidden temporaries a killed run left here are nobody's: removed, as
  // they would otherwise stay for good. Only names of the forms kalends writes (".<output>.partial"
  // and ".<output>.<tag>.partial" of its rasters, tables and summaries); a user's own stay.
  // (GDAL's ".<name>.partial.ovr.tmp" beside a Cloud Optimized GeoTIFF in the making too, and
  // the ".<name>.partial.aux.xml" it writes where the header did not fit, under a memory limit.)
  static const std::regex temporary(
      R"(^\..+\.(tif|vrt|json|md|csv|tsv|html)(\.[A-Za-z0-9_-]+)?\.partial(\.ovr\.tmp|\.aux\.xml)?$)");
  if (lock_ >= 0)
    for (const auto& entry : fs::directory_iterator(path, ec)) {
      const std::string name = entry.path().filename().string();
      if (std::regex_match(name, temporary) && entry.is_regular_file(ec)) fs::remove(entry.path(), ec);
    }
}

OutputFolder::~OutputFolder() {
  if (lock_ >= 0) ::close(lock_);
  std::error_code ec;
  for (auto it = created_.rbegin(); it != created_.rend(); ++it) {
    // A folder this run made and left with nothing but its lock file goes, lock file and all.
    const fs::path lock_file = fs::path(*it) / folder_lock_file;
    if (fs::exists(lock_file, ec) && std::distance(fs::directory_iterator(*it, ec), fs::directory_iterator()) == 1)
      fs::remove(lock_file, ec);
    if (!fs::is_empty(*it, ec) || ec || !fs::remove(*it, ec)) break;
  }
}

void require_out_apart_from(const Stack& stack, const std::string& out_dir, const std::string& option) {
  std::error_code ec;
  const fs::path out = fs::weakly_canonical(out_dir, ec);
  if (ec) return;
  for (const Layer& layer : stack.layers()) {
    const fs::path file(file_in_connection(layer.path));
    const fs::path folder = fs::weakly_canonical(fs::absolute(file, ec).parent_path(), ec);
    if (!ec && folder == out)
      throw UsageError("--out", "'" + out_dir + "' holds the " + option + " files themselves (" + file.filename().string() +
                                    "): the outputs would lie among them, or replace them; give another folder");
  }
}

std::vector<int> remove_year_layers_outside(const std::string& folder, const std::string& name,
                                            const std::vector<std::string>& kinds, int first_year, int last_year,
                                            int* files_removed) {
  std::set<int> removed;
  std::error_code ec;
  // "<name>_<kind>_YYYY.tif" exactly: another set whose name begins with this one's ("ndvi_sd",
  // a --band 2 run beside "ndvi") is not this set's.
  const auto ours = [&](const std::string& file) {
    for (const std::string& kind : kinds) {
      const std::string prefix = name + "_" + kind + "_";
      if (file.size() == prefix.size() + 8 && file.starts_with(prefix) && file.ends_with(".tif") &&
          std::all_of(file.begin() + std::ptrdiff_t(prefix.size()), file.end() - 4,
                      [](char c) { return std::isdigit(static_cast<unsigned char>(c)) != 0; }))
        return true;
    }
    return false;
  };
  for (const auto& entry : fs::directory_iterator(folder, ec)) {
    const std::string file = entry.path().filename().string();
    if (!entry.is_regular_file() || !ours(file)) continue;
    const std::map<std::string, std::string> metadata = raster_metadata(entry.path().string());
    const auto text = metadata.find("KALENDS_YEAR");
    if (text == metadata.end() || !metadata.count("KALENDS_VERSION")) continue;
    const int year = std::atoi(text->second.c_str());
    if (year >= first_year && year <= last_year) continue;
    if (fs::remove(entry.path(), ec)) {
      removed.insert(year);
      if (files_removed) ++*files_removed;
    }
  }
  return {removed.begin(), removed.end()};
}

int output_tile(const Grid& grid, int tile) {
  if (grid.width > tile || grid.height > tile) return tile;
  return std::min(tile, (std::max({grid.width, grid.height, 1}) + 15) / 16 * 16);
}

OutputSet::OutputSet(std::vector<OutputSpec> specs, const Grid& grid, Compression compression,
                     int tile)
    : tile_(output_tile(grid, tile)) {
  start_gdal();
  GDALDriver* driver = GetGDALDriverManager()->GetDriverByName("GTiff");
  if (!driver) throw OutputError("GTiff", "GDAL has no GeoTIFF driver");
  const std::string block = std::to_string(tile_);
  CPLStringList options;
  options.SetNameValue("TILED", "YES");
  options.SetNameValue("BLOCKXSIZE", block.c_str());
  options.SetNameValue("BLOCKYSIZE", block.c_str());
  options.SetNameValue("INTERLEAVE", "BAND");
  options.SetNameValue("COMPRESS", compression_name(compression));
  if (compression != Compression::none) options.SetNameValue("PREDICTOR", "3");
  // GDAL's default ZSTD level, 9, holds a compressor of about 12 MiB per open file (measured
  // 14.6 MiB against 2.3 at level 1 and 1.7 for DEFLATE, 600 x 600 px, 3 bands): a fill writing
  // 92 dates at once had peaked at 4.5 times its --memory. Level 1 files were 1-6 % larger than
  // level 9's and about 1 % smaller than DEFLATE's (the Alaska fill; a helper's release check).
  if (compression == Compression::zstd) options.SetNameValue("ZSTD_LEVEL", "1");
  options.SetNameValue("BIGTIFF", "IF_SAFER");

  // An output replaces only an earlier kalends output (all carry KALENDS_VERSION): a user's own
  // raster that happens to have an output's name would be lost.
  for (const OutputSpec& spec : specs) require_own_raster(spec.path, {"KALENDS_VERSION"});
  OGRSpatialReference srs;
  const bool has_crs = !grid.crs_wkt.empty() && srs.importFromWkt(grid.crs_wkt.c_str()) == OGRERR_NONE;
  has_crs_ = has_crs;
  has_geotransform_ = grid.has_geotransform;
  files_.reserve(specs.size());
  // A constructor that throws runs no destructor: the temporaries made before the one that
  // failed (the descriptor limit reached at the 27th date) had stayed, hidden, in the folder.
  auto discard_made = [this](const std::string& failed) {
    for (auto& made : files_) {
      made->dataset.reset();
      std::error_code ec;
      fs::remove(made->temporary, ec);
      fs::remove(made->temporary + ".aux.xml", ec);
    }
    std::error_code ec;
    fs::remove(failed, ec);
  };
  for (OutputSpec& spec : specs) {
    auto file = std::make_unique<File>();
    file->temporary = temporary_name(spec.path);
    CPLErrorReset();
    file->dataset.reset(driver->Create(file->temporary.c_str(), grid.width, grid.height,
                                       int(spec.bands.size()), GDT_Float32, options.List()));
    if (!file->dataset) {
      const auto failure = write_failure(spec.path, "cannot create (" + gdal_message("unknown reason") + ")");
      discard_made(file->temporary);
      throw failure;
    }
    GDALDataset& ds = *file->dataset;
    // Before the geotransform: GeoTIFF writes a point grid's tie point at the first cell's centre
    // (a fill had turned an input's Point into Area: half a cell apart for a reader that takes
    // the tie point literally).
    if (grid.pixel_is_point) ds.SetMetadataItem(GDALMD_AREA_OR_POINT, GDALMD_AOP_POINT);
    if (grid.has_geotransform) {
      std::array<double, 6> gt = grid.geotransform;
      ds.SetGeoTransform(gt.data());
    }
    if (has_crs) ds.SetSpatialRef(&srs);
    for (const auto& [key, value] : spec.metadata) ds.SetMetadataItem(key.c_str(), value.c_str());
    for (std::size_t b = 0; b < spec.bands.size(); ++b) {
      const BandSpec& band_spec = spec.bands[b];
      GDALRasterBand* band = ds.GetRasterBand(int(b) + 1);
      band->SetDescription(band_spec.description.c_str());
      band->SetNoDataValue(std::nan(""));
      if (!band_spec.unit.empty()) band->SetUnitType(band_spec.unit.c_str());
      for (const auto& [key, value] : band_spec.metadata)
        band->SetMetadataItem(key.c_str(), value.c_str());
    }
    file->spec = std::move(spec);
    files_.push_back(std::move(file));
  }
}

OutputSet::~OutputSet() {
  if (committed_) return;
  for (auto& file : files_) {
    file->dataset.reset();
    std::error_code ec;
    fs::remove(file->temporary, ec);
    fs::remove(file->temporary + ".aux.xml", ec);
  }
}

void OutputSet::write(std::size_t index, const Window& input_core, std::span<const float* const> planes,
                      std::vector<float>& scratch) {
  const Window core{input_core.x - origin_x_, input_core.y - origin_y_, input_core.width, input_core.height};
  File& file = *files_.at(index);
  if (planes.size() != file.spec.bands.size())
    throw std::logic_error("output " + file.spec.path + ": wrong number of bands");
  const std::size_t tile_pixels = std::size_t(tile_) * tile_;
  scratch.resize(tile_pixels);
  std::lock_guard lock(file.mutex);
  for (int ty = core.y; ty < core.y + core.height; ty += tile_)
    for (int tx = core.x; tx < core.x + core.width; tx += tile_) {
      const int w = std::min(tile_, core.x + core.width - tx);
      const int h = std::min(tile_, core.y + core.height - ty);
      for (std::size_t b = 0; b < planes.size(); ++b) {
        // Padding past the raster's edge is never read back; NaN keeps it honest.
        if (w < tile_ || h < tile_) std::fill(scratch.begin(), scratch.end(), NAN);
        for (int row = 0; row < h; ++row) {
          const float* src = planes[b] + std::size_t(ty - core.y + row) * core.width + (tx - core.x);
          std::copy(src, src + w, scratch.data() + std::size_t(row) * tile_);
        }
        CPLErrorReset();
        if (file.dataset->GetRasterBand(int(b) + 1)->WriteBlock(tx / tile_, ty / tile_, scratch.data()) !=
            CE_None)
          throw write_failure(file.spec.path, "write failed (" + gdal_message("unknown reason") + ")");
      }
    }
}

void OutputSet::write_all(const Window& core, const std::vector<std::vector<float>>& bands,
                          std::vector<float>& scratch) {
  std::vector<const float*> planes;
  std::size_t next = 0;
  for (std::size_t f = 0; f < files_.size(); ++f) {
    planes.clear();
    for (std::size_t b = 0; b < files_[f]->spec.bands.size(); ++b) planes.push_back(bands.at(next++).data());
    write(f, core, planes, scratch);
  }
}

void crop_raster(const std::string& source, const Window& window, const std::string& path, int band) {
  start_gdal();
  GDALDatasetUniquePtr in(GDALDataset::Open(source.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  if (!in) throw InputError(source, "cannot open (" + gdal_message("unknown reason") + ")");
  CPLStringList args;
  for (const std::string& a :
       {std::string("-srcwin"), std::to_string(window.x), std::to_string(window.y), std::to_string(window.width),
        std::to_string(window.height), std::string("-of"), std::string("GTiff"), std::string("-co"),
        std::string("COMPRESS=DEFLATE"), std::string("-co"), std::string("TILED=YES")})
    args.AddString(a.c_str());
  if (band > 0) {
    args.AddString("-b");
    args.AddString(std::to_string(band).c_str());
  }
  GDALTranslateOptions* options = GDALTranslateOptionsNew(args.List(), nullptr);
  int failed = 0;
  CPLErrorReset();
  GDALDatasetH out = GDALTranslate(path.c_str(), GDALDataset::ToHandle(in.get()), options, &failed);
  GDALTranslateOptionsFree(options);
  if (!out || failed) {
    if (out) GDALClose(out);
    throw write_failure(path, "cannot write the window of " + source + " (" + gdal_message("unknown reason") + ")");
  }
  CPLErrorReset();
  GDALClose(out);
  if (CPLGetLastErrorType() >= CE_Failure) throw write_failure(path, "write failed (" + gdal_message("unknown reason") + ")");
}

bool same_raster_content(const std::string& a, const std::string& b) {
  start_gdal();
  GDALDatasetUniquePtr x(GDALDataset::Open(a.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  GDALDatasetUniquePtr y(GDALDataset::Open(b.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  if (!x || !y) return false;
  const int w = x->GetRasterXSize(), h = x->GetRasterYSize(), n = x->GetRasterCount();
  if (w != y->GetRasterXSize() || h != y->GetRasterYSize() || n != y->GetRasterCount()) return false;
  auto same_metadata = [](char** a, char** b) {
    // Copies: CPLStringList takes ownership of what it is given.
    CPLStringList ma(CSLDuplicate(a)), mb(CSLDuplicate(b));
    ma.Sort();
    mb.Sort();
    if (ma.size() != mb.size()) return false;
    for (int i = 0; i < ma.size(); ++i)
      if (std::string(ma[i]) != mb[i]) return false;
    return true;
  };
  if (!same_metadata(x->GetMetadata(), y->GetMetadata())) return false;
  std::vector<float> row_x(std::size_t(w) * 64), row_y(std::size_t(w) * 64);
  for (int b = 1; b <= n; ++b) {
    GDALRasterBand* bx = x->GetRasterBand(b);
    GDALRasterBand* by = y->GetRasterBand(b);
    if (std::string(bx->GetDescription()) != by->GetDescription()) return false;
    // A band's own items (a period's KALENDS_DAYS_COVERED) and how its numbers read: a file
    // whose pixels stayed while its band metadata moved had been kept with the old items.
    if (!same_metadata(bx->GetMetadata(), by->GetMetadata())) return false;
    if (std::string(bx->GetUnitType()) != by->GetUnitType() || bx->GetScale() != by->GetScale() ||
        bx->GetOffset() != by->GetOffset())
      return false;
    for (int r = 0; r < h; r += 64) {
      const int rows = std::min(64, h - r);
      if (bx->RasterIO(GF_Read, 0, r, w, rows, row_x.data(), w, rows, GDT_Float32, 0, 0, nullptr) != CE_None ||
          by->RasterIO(GF_Read, 0, r, w, rows, row_y.data(), w, rows, GDT_Float32, 0, 0, nullptr) != CE_None)
        return false;
      if (std::memcmp(row_x.data(), row_y.data(), std::size_t(w) * rows * sizeof(float)) != 0) return false;
    }
  }
  return true;
}

void OutputSet::commit() {
  for (auto& file : files_) {
    CPLErrorReset();
    file->dataset.reset();  // closing writes the remaining directory entries
    if (CPLGetLastErrorType() == CE_Failure)
      throw write_failure(file->spec.path, "closing failed (" + gdal_message("unknown reason") + ")");
    // The GeoTIFF keys are written at the close; under a memory limit they had gone to a side
    // file the rename left behind, and the outputs were published without their CRS, exit 0.
    require_header_in_file(file->temporary, file->spec.path);
    if (has_crs_ || has_geotransform_) {
      CPLErrorReset();
      GDALDatasetUniquePtr check(GDALDataset::Open(file->temporary.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
      double gt[6];
      const char* lost = !check                                                  ? "it cannot be read back"
                         : has_geotransform_ && check->GetGeoTransform(gt) != CE_None ? "its georeferencing was not written"
                         : has_crs_ && !check->GetSpatialRef()                   ? "its CRS was not written"
                                                                                 : nullptr;
      if (lost)
        throw write_failure(file->spec.path, std::string(lost) + " (" +
                                                 gdal_message("out of memory, or the disk failed?") + ")");
    }
  }
  // The renames below are one at a time: a run killed among them would leave some outputs new
  // and some old under their final names (mark_publishing).
  std::set<std::string> marked;
  for (auto& file : files_) marked.insert(fs::path(file->spec.path).parent_path().string());
  mark_publishing(marked);
  std::set<std::string> folders;
  for (auto& file : files_) {
    if (keep_unchanged_ && fs::exists(file->spec.path) &&
        same_raster_content(file->temporary, file->spec.path)) {
      std::error_code ec;
      fs::remove(file->temporary, ec);
      ++unchanged_;
      continue;
    }
    publish(file->temporary, file->spec.path);
    ++written_;
    folders.insert(fs::path(file->spec.path).parent_path().string());
  }
  for (const std::string& folder : folders) sync_path(folder, true);
  unmark_publishing(marked);
  committed_ = true;
}

}  // namespace kalends::detail
