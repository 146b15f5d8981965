#include "kalends/block_plan.hpp"

#include <algorithm>

#include <fmt/format.h>

#include "kalends/error.hpp"

namespace kalends {

Window area_of(int width, int height, const std::optional<Window>& region, const std::string& where) {
  if (!region) return Window{0, 0, width, height};
  const Window& r = *region;
  if (r.width <= 0 || r.height <= 0)
    throw UsageError(where, "region " + std::to_string(r.x) + "," + std::to_string(r.y) + " " + std::to_string(r.width) +
                                "x" + std::to_string(r.height) + ": its width and height must be at least 1 px");
  if (r.x < 0 || r.y < 0 || r.x + r.width > width || r.y + r.height > height) {
    // Entirely outside, or starting inside and reaching past an edge: say which.
    const bool starts_inside = r.x >= 0 && r.y >= 0 && r.x < width && r.y < height && r.width > 0 && r.height > 0;
    throw UsageError(where, "region " + std::to_string(r.x) + "," + std::to_string(r.y) + " " +
                                std::to_string(r.width) + "x" + std::to_string(r.height) +
                                (starts_inside ? " reaches beyond" : " lies outside") + " the raster of " +
                                std::to_string(width) + "x" + std::to_string(height) + " px");
  }
  return r;
}

namespace {

// The window a block of bw x bh px reads with its halo, clipped to the raster (its size).
Window clipped_read_window(int raster_width, int raster_height, int halo, int bw, int bh) {
  return Window{0, 0, std::min(raster_width, bw + 2 * halo), std::min(raster_height, bh + 2 * halo)};
}

}  // namespace

Window BlockPlan::smallest_read_window(int width, int height, int halo, int tile, const std::optional<Window>& region) {
  if (!region) return clipped_read_window(width, height, halo, tile, tile);
  return clipped_read_window(width, height, halo, std::min(tile, std::max(region->width, 1)),
                             std::min(tile, std::max(region->height, 1)));
}

BlockPlan BlockPlan::make(int raster_width, int raster_height, int halo, std::int64_t max_read_pixels, int tile,
                          const std::optional<Window>& region, int max_tile_rows) {
  if (tile <= 0) throw UsageError("tile", fmt::format("{} px: a block's side must be at least 1 px", tile));
  if (halo < 0) throw UsageError("--halo", fmt::format("{} px: a halo cannot be negative", halo));
  BlockPlan plan;
  plan.tile = tile;
  if (raster_width <= 0 || raster_height <= 0) return plan;
  const Window area = area_of(raster_width, raster_height, region, "region");
  const int width = area.width, height = area.height;
  // A block is never larger than the area it covers: a region of 44 rows (a cluster shard's
  // last strip) had been judged as if its blocks were a whole tile high, and cut into tile-wide
  // columns where the whole raster's run takes one full-width strip, so that a shard's values
  // differed from one machine's (spacetime sd by up to 0.02).
  auto read_pixels = [&](int bw, int bh) {
    return clipped_read_window(raster_width, raster_height, halo, std::min(bw, width), std::min(bh, height)).pixels();
  };
  const int tiles_x = (width + tile - 1) / tile, tiles_y = (height + tile - 1) / tile;
  const Window smallest = smallest_read_window(raster_width, raster_height, halo, tile, area);
  if (smallest.pixels() > max_read_pixels)
    throw UsageError("--memory", "too small for one block: it reads " + std::to_string(smallest.width) +
                                     " x " + std::to_string(smallest.height) + " px (a " +
                                     std::to_string(tile) + " px tile and its " + std::to_string(halo) +
                                     " px halo, within the raster); give more memory");
  // Full-width strips of as many tile rows as fit; otherwise as many tile columns as fit.
  int bw = tiles_x * tile, bh = tile;
  if (read_pixels(bw, bh) <= max_read_pixels) {
    int rows = 1;
    const int most_rows = max_tile_rows > 0 ? std::min(tiles_y, max_tile_rows) : tiles_y;
    while (rows < most_rows && read_pixels(bw, (rows + 1) * tile) <= max_read_pixels) ++rows;
    bh = rows * tile;
  } else {
    int cols = 1;
    while (cols < tiles_x && read_pixels((cols + 1) * tile, tile) <= max_read_pixels) ++cols;
    bw = cols * tile;
  }
  plan.block_width = std::min(bw, width);
  plan.block_height = std::min(bh, height);
  int index = 0;
  for (int y = 0; y < height; y += bh)
    for (int x = 0; x < width; x += bw) {
      Block b;
      b.index = index++;
      b.core = {area.x + x, area.y + y, std::min(bw, width - x), std::min(bh, height - y)};
      const int rx = std::max(0, b.core.x - halo), ry = std::max(0, b.core.y - halo);
      b.read = {rx, ry, std::min(raster_width, b.core.x + b.core.width + halo) - rx,
                std::min(raster_height, b.core.y + b.core.height + halo) - ry};
      plan.blocks.push_back(b);
    }
  return plan;
}

}  // namespace kalends
