// Tile sets: several stacks on one sensor grid (same CRS and pixel size, adjacent extents),
// processed as one mosaic so that spatial methods see across tile edges.
#pragma once

#include <string>
#include <utility>
#include <vector>

#include "kalends/block_plan.hpp"
#include "kalends/fill.hpp"
#include "kalends/stack.hpp"

namespace kalends {

struct Tile {
  std::string name;                // what the {tile} field matched, e.g. "h10v05"
  std::vector<std::string> files;  // its single-date rasters
  Window window;                   // where it lies in the mosaic's pixel grid
};

struct TileSet {
  Grid mosaic;              // the grid that holds every tile
  std::vector<Tile> tiles;  // in name order
  std::string pattern;      // glob of the per-date mosaic VRTs
  /// "TILE DATE" for each date some tile has and this one lacks: the mosaic has no data there,
  /// so a fill treats that tile's date as a gap (a download that failed, say).
  std::vector<std::string> missing;

  /// Groups the files of `pattern` into tiles by the {tile} field of `tile_field` (e.g.
  /// "tiles/{tile}/": the text between the field's neighbours names the tile), checks that the
  /// tiles fit one grid (same CRS, pixel size, aligned pixels; overlaps only with equal values)
  /// and writes one VRT mosaic per date into `mosaic_dir`. InputError names the tile that does
  /// not fit.
  /// Files in `exclude` (inputs left out as bad, --skip-bad) are left out.
  static TileSet open(const std::string& pattern, const std::string& tile_field, const std::string& mosaic_dir,
                      const std::vector<std::string>& exclude = {});
};

/// The tile name a path holds according to `tile_field`, or "" when it does not match.
std::string tile_name_in(const std::string& path, const std::string& tile_field);

/// Why a tile's value file of date `label` is refused: no QA file of that date in the tile.
/// The reason names the QA pattern and the tile field, so that tile_partner_now_present can
/// look for the partner again on a later night.
std::string no_tile_partner(const std::string& label, const std::string& tile, const std::string& qa_pattern,
                            const std::string& tile_field);

/// For a reason made by no_tile_partner: whether the QA pattern now matches a file of that date
/// in that tile. False for any other reason.
bool tile_partner_now_present(const std::string& reason);

struct TiledFillSummary {
  std::vector<FillSummary> tiles;  // one per tile, in the tile set's order
  int tiles_skipped = 0;           // left as they were: nothing they depend on changed
  std::string mosaic_dir;          // VRT mosaics of the per-tile outputs, when asked for
  int mosaic_written = 0, mosaic_unchanged = 0;  // those views
  std::vector<std::string> missing;  // "TILE DATE" of the input (TileSet::missing)
};

/// The notes of a tiled fill: dates some tiles lack, then each tile's fill_notes.
std::vector<std::string> tiled_fill_notes(const FillRequest& request, const TiledFillSummary& summary);

/// Fills every tile of a tile set over the mosaic (halos cross tile edges), writing the
/// outputs of tile T into out_dir/T/; with `mosaic`, also out_dir/mosaic/ as one VRT per date.
/// `request.input` and `request.qa_input` are the tile patterns; `tile_field` as above.
/// With `only_tiles` (after an earlier run into the same folder, same parameters): only those
/// tiles, and the tiles within the method's halo of them, are filled; the others are left as
/// they are (counted in tiles_skipped).
TiledFillSummary run_tiled_fill(const FillRequest& request, const std::string& tile_field, bool mosaic,
                                const ProgressCallback& progress = {},
                                const std::optional<std::vector<std::string>>& only_tiles = std::nullopt);

/// Writes one VRT per output date in `mosaic_dir` over the same-named files in `folders`.
/// Returns the views {written, unchanged} (one whose text would not change is left as it is).
std::pair<int, int> write_mosaics(const std::vector<std::string>& folders, const std::string& mosaic_dir);

}  // namespace kalends
