#include "engine/memory_budget.hpp"

#include <sys/resource.h>
#include <unistd.h>

#include <algorithm>
#include <fstream>

#include "kalends/error.hpp"
#include "kalends/fill.hpp"

namespace kalends::detail {

namespace {
constexpr std::int64_t MiB = 1 << 20;
// Resident size of the process before any block is read: `kalends run --dry-run` peaks at
// about 35 MiB on Debian 12 with GDAL 3.6 (getrusage); 48 MiB leaves room for drivers loaded
// on first use.
constexpr std::int64_t library_footprint = 48 * MiB;
// Per open file: libtiff keeps about a tile of raw buffer, GDAL's dataset objects add a
// little (estimates from the buffer sizes, not measured one by one).
constexpr std::int64_t per_read_file = 160 * 1024;
constexpr std::int64_t per_write_file = 3 * 256 * 1024;
}  // namespace

MemoryShare share_memory(std::int64_t budget, int workers, std::int64_t bytes_per_pixel,
                         int read_files_per_worker, int write_files) {
  MemoryShare share;
  share.gdal_cache = std::clamp<std::int64_t>(budget / 16, 8 * MiB, 128 * MiB);
  share.fixed = library_footprint + std::int64_t(workers) * read_files_per_worker * per_read_file +
                std::int64_t(write_files) * per_write_file;
  const std::int64_t left = budget - share.gdal_cache - share.fixed;
  if (left <= 0)
    throw UsageError("--memory", "budget of " + std::to_string(budget / MiB) +
                                     " MiB does not cover the fixed overheads (" +
                                     std::to_string((share.gdal_cache + share.fixed) / MiB) +
                                     " MiB for this stack); give more memory or fewer threads");
  share.per_worker = left / std::max(1, workers);
  share.max_read_pixels = share.per_worker / std::max<std::int64_t>(1, bytes_per_pixel);
  return share;
}

std::int64_t budget_for_read_pixels(std::int64_t read_pixels, int workers, std::int64_t bytes_per_pixel,
                                    int read_files_per_worker, int write_files) {
  // The fixed part, the blocks and the smallest GDAL cache are a lower bound; the cache grows
  // with the budget up to 128 MiB, so whole-MiB steps from there take about 120 at most.
  const MemoryShare probe = share_memory(std::int64_t(1) << 40, workers, bytes_per_pixel,
                                         read_files_per_worker, write_files);
  const std::int64_t needed = probe.fixed + 8 * MiB + std::int64_t(std::max(1, workers)) *
                                                          std::max<std::int64_t>(1, bytes_per_pixel) * read_pixels;
  auto holds = [&](std::int64_t budget) {
    try {
      return share_memory(budget, workers, bytes_per_pixel, read_files_per_worker, write_files)
                 .max_read_pixels >= read_pixels;
    } catch (const UsageError&) {  // a larger cache left nothing above the fixed part
      return false;
    }
  };
  std::int64_t budget = (needed + MiB - 1) / MiB * MiB;
  while (!holds(budget)) budget += MiB;
  return budget;
}

BlockShare share_for_blocks(std::int64_t budget, int threads, const Window& smallest, std::int64_t bytes_per_pixel,
                            int read_files_per_worker, int write_files) {
  const std::int64_t smallest_read = smallest.pixels();
  for (int at_once = std::max(1, threads); at_once >= 1; --at_once) {
    try {
      const MemoryShare share = share_memory(budget, at_once, bytes_per_pixel, read_files_per_worker, write_files);
      if (share.max_read_pixels >= smallest_read) return {share, at_once};
    } catch (const UsageError&) {
      // not even the fixed overheads of this many workers: try fewer
    }
  }
  const std::int64_t would_do =
      budget_for_read_pixels(smallest_read, 1, bytes_per_pixel, read_files_per_worker, write_files);
  throw UsageError("--memory", "budget of " + std::to_string(budget / MiB) + " MiB is too small for one block (" +
                                   std::to_string(smallest.width) + " x " + std::to_string(smallest.height) +
                                   " px of every date); " +
                                   std::to_string(would_do / MiB) + " MiB would do");
}

}  // namespace kalends::detail

namespace kalends {

std::int64_t parse_memory_size(const std::string& text) {
  std::size_t used = 0;
  double value = 0;
  try {
    value = std::stod(text, &used);
  } catch (const std::exception&) {
    throw UsageError("--memory '" + text + "'", "expected a size such as 512M or 2G");
  }
  std::string unit = text.substr(used);
  for (char& c : unit) c = char(std::toupper(static_cast<unsigned char>(c)));
  double factor;
  if (unit.empty() || unit == "B")
    factor = 1;
  else if (unit == "K" || unit == "KB" || unit == "KIB")
    factor = 1024.0;
  else if (unit == "M" || unit == "MB" || unit == "MIB")
    factor = 1024.0 * 1024;
  else if (unit == "G" || unit == "GB" || unit == "GIB")
    factor = 1024.0 * 1024 * 1024;
  else if (unit == "T" || unit == "TB" || unit == "TIB")
    factor = 1024.0 * 1024 * 1024 * 1024;
  else
    throw UsageError("--memory '" + text + "'", "unknown unit '" + unit + "' (use K, M, G or T)");
  if (!(value > 0)) throw UsageError("--memory '" + text + "'", "must be positive");
  // inf and 2^64 had been taken (a cast out of range: any number at all).
  if (!(value * factor <= 1024.0 * 1024 * 1024 * 1024 * 1024))
    throw UsageError("--memory '" + text + "'", "is more than any machine has (1 PiB at most); give a size such as 512M or 2G");
  if (value * factor < 1024.0 * 1024)
    throw UsageError("--memory '" + text + "'", "below 1 MiB, which holds no block; give a size such as 512M or 2G");
  return std::int64_t(value * factor);
}

}  // namespace kalends

namespace kalends::detail {

std::int64_t peak_resident_bytes() {
  rusage usage{};
  getrusage(RUSAGE_SELF, &usage);
  return std::int64_t(usage.ru_maxrss) * 1024;
}

std::int64_t usable_memory_bytes() {
  const long pages = sysconf(_SC_PHYS_PAGES), page = sysconf(_SC_PAGESIZE);
  std::int64_t usable = pages > 0 && page > 0 ? std::int64_t(pages) * page : 0;
  // A container's limit (cgroup v2, then v1) where it is lower: "max" or a huge v1 value
  // means none.
  for (const char* limit_file : {"/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory/memory.limit_in_bytes"}) {
    std::ifstream in(limit_file);
    long long limit = 0;
    if (in >> limit && limit > 0 && (usable == 0 || limit < usable)) usable = limit;
  }
  return usable;
}

}  // namespace kalends::detail
