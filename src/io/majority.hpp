// The item most of a list share: how a stack or a tile judges its files' grids, so that one odd
// file (the oldest, say) is the one named rather than every good file.
#pragma once

#include <cstddef>
#include <utility>
#include <vector>

namespace kalends::detail {

/// The index of an item that the most items are `same` as, and how many are; the first such
/// item where several tie. Stops once one has a majority. (0, 0) for an empty list.
template <class Item, class Same>
std::pair<std::size_t, std::size_t> most_shared(const std::vector<Item>& items, Same same) {
  std::size_t best = 0, best_count = 0;
  for (std::size_t i = 0; i < items.size() && best_count * 2 <= items.size(); ++i) {
    if (i > 0 && same(items[i - 1], items[i])) continue;  // counted with its neighbour
    std::size_t count = 0;
    for (const Item& other : items) count += same(items[i], other);
    if (count > best_count) best = i, best_count = count;
  }
  return {best, best_count};
}

}  // namespace kalends::detail
