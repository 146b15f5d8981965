#include "pipeline/shard_stitch.hpp"

#include "engine/block_runner.hpp"

#include <gdal_priv.h>
#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <algorithm>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>
#include <iterator>
#include <set>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"

namespace kalends::detail {

namespace fs = std::filesystem;

namespace {

std::set<std::string> files_in(const std::string& folder) {
  std::set<std::string> files;
  for (const std::string& path : files_below(folder)) files.insert(fs::relative(path, folder).string());
  return files;
}

std::string replaced(std::string text, const std::string& from, const std::string& to) {
  for (std::size_t at = text.find(from); at != std::string::npos; at = text.find(from, at + to.size()))
    text.replace(at, from.size(), to);
  return text;
}

std::string read_all(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw InputError(path, "cannot read");
  return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
}

GDALDatasetUniquePtr open_part(const std::string& path) {
  GDALDatasetUniquePtr ds(GDALDataset::Open(path.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  if (!ds) throw InputError(path, "cannot open (" + gdal_message("unknown reason") + ")");
  return ds;
}

std::map<std::string, std::string> metadata_of(GDALMajorObject& object, const ShardPart& part, const std::string& out,
                                               const char* domain = nullptr) {
  std::map<std::string, std::string> m;
  CSLConstList list = object.GetMetadata(domain);
  for (int i = 0; list && list[i]; ++i) {
    const std::string item = list[i];
    const auto eq = item.find('=');
    if (eq == std::string::npos) continue;
    m[item.substr(0, eq)] = replaced(item.substr(eq + 1), part.base + "/", out + "/");
  }
  return m;
}

Compression compression_of(GDALDataset& ds) {
  const char* c = ds.GetMetadataItem("COMPRESSION", "IMAGE_STRUCTURE");
  const std::string name = c ? c : "";
  if (name == "DEFLATE") return Compression::deflate;
  if (name == "ZSTD") return Compression::zstd;
  if (name == "LZW") return Compression::lzw;
  return Compression::none;
}

struct Layout {
  Grid grid;
  Compression compression = Compression::deflate;
  int tile = 256;
  OutputSpec spec;
};

// What the stitched raster holds, from the first shard's part; every other part must agree.
Layout layout_of(const std::string& name, const std::vector<ShardPart>& parts, int width, int height,
                 const std::string& folder, const std::string& out) {
  Layout layout;
  std::map<std::string, std::string> first_metadata;
  for (std::size_t p = 0; p < parts.size(); ++p) {
    const std::string path = (fs::path(parts[p].folder) / name).string();
    GDALDatasetUniquePtr ds = open_part(path);
    const Window& w = parts[p].window;
    if (ds->GetRasterXSize() != w.width || ds->GetRasterYSize() != w.height)
      throw InputError(path, fmt::format("covers {} x {} pixels, not its shard's {} x {} (rows {}-{})",
                                         ds->GetRasterXSize(), ds->GetRasterYSize(), w.width, w.height, w.y,
                                         w.y + w.height));
    const auto metadata = metadata_of(*ds, parts[p], out);
    if (p == 0) {
      first_metadata = metadata;
      layout.spec.path = (fs::path(folder) / name).string();
      layout.spec.metadata = metadata;
      layout.compression = compression_of(*ds);
      int bx = 0, by = 0;
      ds->GetRasterBand(1)->GetBlockSize(&bx, &by);
      layout.tile = bx;
      if (bx != by || bx % 16 != 0) throw InputError(path, "is not tiled in square tiles as kalends writes");
      layout.grid.width = width;
      layout.grid.height = height;
      // The first shard starts at row 0: its corner is the whole grid's.
      layout.grid.has_geotransform = ds->GetGeoTransform(layout.grid.geotransform.data()) == CE_None;
      layout.grid.crs_wkt = ds->GetProjectionRef() ? ds->GetProjectionRef() : "";
      for (int b = 1; b <= ds->GetRasterCount(); ++b) {
        GDALRasterBand* band = ds->GetRasterBand(b);
        if (band->GetRasterDataType() != GDT_Float32) throw InputError(path, "band is not float32");
        BandSpec spec{band->GetDescription(), band->GetUnitType() ? band->GetUnitType() : "",
                      metadata_of(*band, parts[p], out)};
        layout.spec.bands.push_back(spec);
      }
    } else {
      if (ds->GetRasterCount() != int(layout.spec.bands.size()))
        throw InputError(path, "has another number of bands than the first shard's");
      for (const auto& [key, value] : metadata) {
        const auto it = first_metadata.find(key);
        if (it == first_metadata.end() || it->second != value)
          throw InputError(path, "metadata " + key + " differs from the first shard's");
      }
      if (metadata.size() != first_metadata.size())
        throw InputError(path, "has other metadata than the first shard's");
    }
  }
  return layout;
}

}  // namespace

StitchOutcome stitch_parts(const std::vector<ShardPart>& parts, int width, int height, const std::string& folder,
                           const std::string& out, const StepKind& kind, int threads,
                           std::int64_t memory_bytes) {
  start_gdal();
  // Every strip is read once, a row of tiles at a time: the cache needs little, and GDAL's
  // default (a share of the machine's memory) would let it grow with the area.
  const GdalCacheScope cache(std::clamp<std::int64_t>(memory_bytes / 16, std::int64_t(8) << 20, std::int64_t(128) << 20));
  const std::set<std::string> names = files_in(parts.front().folder);
  for (std::size_t p = 1; p < parts.size(); ++p) {
    const std::set<std::string> other = files_in(parts[p].folder);
    for (const std::string& n : names)
      if (!other.count(n)) throw InputError((fs::path(parts[p].folder) / n).string(), "missing: the first shard has it");
    for (const std::string& n : other)
      if (!names.count(n)) throw InputError((fs::path(parts[p].folder) / n).string(), "not in the first shard");
  }
  std::vector<std::string> rasters;
  for (const std::string& n : names)
    if (fs::path(n).extension() == ".tif") rasters.push_back(n);
  std::error_code ec;
  fs::create_directories(folder, ec);
  for (const std::string& n : names) fs::create_directories((fs::path(folder) / n).parent_path(), ec);

  // One output set for all rasters, published together as the engines publish theirs.
  std::vector<Layout> layouts;
  std::vector<OutputSpec> specs;
  for (const std::string& n : rasters) {
    layouts.push_back(layout_of(n, parts, width, height, folder, out));
    const Layout& l = layouts.back();
    const Layout& f = layouts.front();
    if (l.tile != f.tile || l.compression != f.compression || l.grid.geotransform != f.grid.geotransform ||
        l.grid.crs_wkt != f.grid.crs_wkt)
      throw InputError((fs::path(parts.front().folder) / n).string(), "has another layout or grid than " + rasters.front());
    specs.push_back(l.spec);
  }
  StitchOutcome outcome;
  if (!rasters.empty()) {
    OutputSet set(std::move(specs), layouts.front().grid, layouts.front().compression, layouts.front().tile);
    set.set_keep_unchanged(true);
    tbb::task_arena arena(threads > 0 ? arena_threads(threads) : tbb::task_arena::automatic);
    arena.execute([&] {
      tbb::parallel_for(std::size_t(0), rasters.size(), [&](std::size_t i) {
        const int tile = layouts[i].tile;
        const std::size_t bands = layouts[i].spec.bands.size();
        std::vector<float> buffer, scratch;
        for (const ShardPart& part : parts) {
          const std::string path = (fs::path(part.folder) / rasters[i]).string();
          GDALDatasetUniquePtr ds = open_part(path);
          for (int row = 0; row < part.window.height; row += tile) {
            const int rows = std::min(tile, part.window.height - row);
            const std::size_t plane = std::size_t(width) * rows;
            buffer.resize(plane * bands);
            std::vector<const float*> planes;
            for (std::size_t b = 0; b < bands; ++b) {
              CPLErrorReset();
              if (ds->GetRasterBand(int(b) + 1)->RasterIO(GF_Read, 0, row, width, rows, buffer.data() + b * plane, width,
                                                          rows, GDT_Float32, 0, 0, nullptr) != CE_None)
                throw InputError(path, "read failed (" + gdal_message("unknown reason") + ")");
              planes.push_back(buffer.data() + b * plane);
            }
            set.write(i, Window{0, part.window.y + row, width, rows}, planes, scratch);
          }
        }
      });
    });
    set.commit();
    outcome.written += set.written();
    outcome.unchanged += set.unchanged();
  }
  for (const std::string& n : names) {
    if (fs::path(n).extension() == ".tif") continue;
    const std::string path = (fs::path(folder) / n).string();
    std::vector<std::string> copies;
    for (const ShardPart& part : parts) copies.push_back((fs::path(part.folder) / n).string());
    if (kind.merge_file && kind.merge_file(fs::path(n).filename().string(), copies, path, width, height)) {
      ++outcome.written;
      continue;
    }
    const std::string first = replaced(read_all(copies.front()), parts.front().base + "/", out + "/");
    for (std::size_t p = 1; p < parts.size(); ++p)
      if (replaced(read_all(copies[p]), parts[p].base + "/", out + "/") != first)
        throw InputError(copies[p], "differs from the first shard's, and a '" + kind.name + "' step has no rule to merge it");
    write_text_atomically(path, first);
    ++outcome.written;
  }
  // What the shards no longer make (outputs of a date gone from the input, a calendar of
  // another period) goes from the stitched folder too, as a run on one machine removes it:
  // later steps would read it as current. Only kalends rasters and the fill's own text files.
  for (const std::string& n : files_in(folder)) {
    if (names.count(n)) continue;
    const fs::path path = fs::path(folder) / n;
    bool ours = n.ends_with("fill-summary.json") || n.ends_with("fill-years.tsv");
    if (path.extension() == ".tif") ours = raster_metadata(path.string()).count("KALENDS_VERSION") > 0;
    if (ours && fs::remove(path, ec)) {
      ++outcome.removed;
      const fs::path parent = path.parent_path();
      if (parent != fs::path(folder) && fs::is_empty(parent, ec)) fs::remove(parent, ec);
    }
  }
  return outcome;
}

}  // namespace kalends::detail
