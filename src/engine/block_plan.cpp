#include "kalends/block_plan.hpp"

#include <algorithm>

#include "kalends/error.hpp"

namespace kalends {

BlockPlan BlockPlan::make(int width, int height, int halo, std::int64_t max_read_pixels, int tile) {
  BlockPlan plan;
  plan.tile = tile;
  if (width <= 0 || height <= 0) return plan;
  auto read_pixels = [&](int bw, int bh) {
    return std::int64_t(std::min(width, bw + 2 * halo)) * std::min(height, bh + 2 * halo);
  };
  const int tiles_x = (width + tile - 1) / tile, tiles_y = (height + tile - 1) / tile;
  if (read_pixels(tile, tile) > max_read_pixels)
    throw UsageError("--memory", "too small for one block of " + std::to_string(tile) + " x " +
                                     std::to_string(tile) + " px; give more memory");
  // Full-width strips of as many tile rows as fit; otherwise as many tile columns as fit.
  int bw = tiles_x * tile, bh = tile;
  if (read_pixels(bw, bh) <= max_read_pixels) {
    int rows = 1;
    while (rows < tiles_y && read_pixels(bw, (rows + 1) * tile) <= max_read_pixels) ++rows;
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
      b.core = {x, y, std::min(bw, width - x), std::min(bh, height - y)};
      const int rx = std::max(0, x - halo), ry = std::max(0, y - halo);
      b.read = {rx, ry, std::min(width, x + b.core.width + halo) - rx,
                std::min(height, y + b.core.height + halo) - ry};
      plan.blocks.push_back(b);
    }
  return plan;
}

}  // namespace kalends
