// Splitting a raster into blocks that fit a memory budget.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <vector>

namespace kalends {

struct Window {
  int x = 0, y = 0, width = 0, height = 0;
  std::int64_t pixels() const { return std::int64_t(width) * height; }
  bool operator==(const Window&) const = default;
};

/// A block: the `core` it is responsible for, and the `read` window (core plus halo, clipped to
/// the raster) a method sees.
struct Block {
  int index = 0;
  Window core;
  Window read;
};

struct BlockPlan {
  int tile = 256;
  int block_width = 0, block_height = 0;
  std::vector<Block> blocks;

  /// Blocks are whole tiles (so writes never share a tile) and as large as `max_read_pixels`
  /// allows, preferring full-width strips (cheap to read from strip-organised files).
  /// Throws UsageError when not even one tile plus halo fits.
  /// With a `region`, blocks cover only that window of the raster (tiles counted from its
  /// corner), while their read windows still reach into the rest of the raster for the halo.
  /// `max_tile_rows` > 0 caps a block's height at that many tile rows, so that a strip of
  /// whole tile rows is planned as the same blocks as the whole raster.
  static BlockPlan make(int width, int height, int halo, std::int64_t max_read_pixels,
                        int tile = 256, const std::optional<Window>& region = std::nullopt,
                        int max_tile_rows = 0);

  /// The read window of the smallest block `make` can plan: one tile plus halo, clipped to the
  /// raster (its size; x and y 0). Of a `region` narrower or lower than a tile, its width or
  /// height plus halo: a subset's blocks are no larger than the subset.
  static Window smallest_read_window(int width, int height, int halo, int tile = 256,
                                     const std::optional<Window>& region = std::nullopt);
  /// Its pixels.
  static std::int64_t smallest_read_pixels(int width, int height, int halo, int tile = 256) {
    return smallest_read_window(width, height, halo, tile).pixels();
  }
};

/// The window `region` of a raster of `width` x `height`, or the whole raster when there is no
/// region; UsageError when the region is empty or reaches outside the raster.
Window area_of(int width, int height, const std::optional<Window>& region, const std::string& where);

}  // namespace kalends
