#include <catch2/catch.hpp>

#include "engine/memory_budget.hpp"
#include "kalends/error.hpp"

using namespace kalends;
using namespace kalends::detail;

namespace {
constexpr std::int64_t MiB = std::int64_t(1) << 20;
}

TEST_CASE("the budget a refusal names is the smallest that holds the block", "[engine][memory]") {
  // Across the three regimes of the GDAL cache (its floor, budget / 16, its ceiling).
  for (std::int64_t pixels : {std::int64_t(1000), std::int64_t(100 * 100), std::int64_t(320 * 320),
                              std::int64_t(2048 * 2048)})
    for (int workers : {1, 3})
      for (std::int64_t bytes : {std::int64_t(64), std::int64_t(4000), std::int64_t(20000)})
        // 48 files, or so many that the fixed part alone pushes the cache above its floor.
        for (int files : {48, 3000}) {
          CAPTURE(pixels, workers, bytes, files);
          const std::int64_t budget = budget_for_read_pixels(pixels, workers, bytes, files, 3);
          CHECK(budget % MiB == 0);
          CHECK(share_memory(budget, workers, bytes, files, 3).max_read_pixels >= pixels);
          // One MiB less is too little (or does not even cover the fixed part).
          bool smaller_fits = false;
          try {
            smaller_fits = share_memory(budget - MiB, workers, bytes, files, 3).max_read_pixels >= pixels;
          } catch (const UsageError&) {
          }
          CHECK_FALSE(smaller_fits);
        }
}
