// Filling a tile set: each tile is one region of the tiles' mosaic, so a block at a tile edge
// reads its halo from the neighbouring tile and the values equal those of a run on the mosaic.
#include <unistd.h>

#include <algorithm>
#include <filesystem>
#include <optional>
#include <set>
#include <tuple>

#include <fmt/format.h>
#include <fmt/ranges.h>

#include "io/file_glob.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/time.hpp"
#include "kalends/tiles.hpp"

namespace kalends {

namespace fs = std::filesystem;

std::vector<std::string> tiled_fill_notes(const FillRequest& request, const TiledFillSummary& summary) {
  std::vector<std::string> notes;
  if (!summary.missing.empty())
    notes.push_back(fmt::format("{} tile-date(s) have no input file, so the fill took them as gaps: {}{}",
                                summary.missing.size(),
                                fmt::join(summary.missing.begin(),
                                          summary.missing.begin() + std::min<std::size_t>(summary.missing.size(), 5), ", "),
                                summary.missing.size() > 5 ? ", ..." : ""));
  for (const FillSummary& s : summary.tiles)
    for (const std::string& note : fill_notes(request, s)) notes.push_back(s.out_dir + ": " + note);
  return notes;
}

TiledFillSummary run_tiled_fill(const FillRequest& request, const std::string& tile_field, bool mosaic,
                                const ProgressCallback& progress,
                                const std::optional<std::vector<std::string>>& only_tiles) {
  const fs::path out(request.out_dir);
  if (request.check_only) {
    // The memory check of a job: the largest tile's block, on mosaic views made in a
    // temporary folder (a check writes nothing beside the outputs), removed again.
    std::error_code ec;
    // Never a relative folder where the system names no usable one (TMPDIR gone): a check
    // writes nothing where it runs.
    fs::path temporary = fs::temp_directory_path(ec);
    if (ec || temporary.empty()) temporary = "/tmp";
    const fs::path views = temporary / fmt::format("kalends-tile-check-{}", ::getpid());
    struct Remove {
      fs::path path;
      ~Remove() {
        std::error_code ignored;
        fs::remove_all(path, ignored);
      }
    } remove{views};
    const TileSet data = TileSet::open(request.input, tile_field, (views / "input").string(), request.rules.exclude);
    FillRequest r = request;
    r.input = data.pattern;
    if (!request.qa_input.empty()) r.qa_input = TileSet::open(request.qa_input, tile_field, (views / "qa").string(), request.rules.exclude).pattern;
    TiledFillSummary summary;
    const auto largest = std::max_element(data.tiles.begin(), data.tiles.end(), [](const Tile& a, const Tile& b) {
      return a.window.pixels() < b.window.pixels();
    });
    if (largest == data.tiles.end()) return summary;
    r.region = largest->window;
    r.out_dir = (out / largest->name).string();
    if (r.name.empty()) r.name = "check";
    summary.tiles.push_back(run_fill(r));
    return summary;
  }
  // The whole set is one output, held from the start: a second tiled fill into OUT had
  // published a tile before it was refused at the one the first was writing, and readers of the
  // mosaic views, which point into every tile, were not refused while the tiles changed.
  const detail::OutputFolder whole_set(request.out_dir);
  std::optional<detail::OutputFolder> views_folder;
  if (std::error_code ec; mosaic || fs::is_directory(out / "mosaic", ec)) views_folder.emplace((out / "mosaic").string());
  // The per-date mosaics of the inputs live beside the outputs, hidden: they are only a view.
  const TileSet data = TileSet::open(request.input, tile_field, (out / ".mosaic" / "input").string(), request.rules.exclude);
  std::optional<TileSet> qa;
  if (!request.qa_input.empty()) {
    qa = TileSet::open(request.qa_input, tile_field, (out / ".mosaic" / "qa").string(), request.rules.exclude);
    if (qa->mosaic.width != data.mosaic.width || qa->mosaic.height != data.mosaic.height ||
        qa->mosaic.geotransform != data.mosaic.geotransform)
      throw InputError(request.qa_input, "the QA tiles do not cover the same grid as the data tiles");
    // Every date of a tile needs its QA partner in that tile. The QA mosaic of the date has no
    // source there otherwise, and its cells had read as QA 0: kept by most rules, so a tile's
    // clouds were filled in as observed values without a word.
    for (const Tile& tile : data.tiles) {
      const auto partner = std::find_if(qa->tiles.begin(), qa->tiles.end(),
                                        [&](const Tile& t) { return t.window == tile.window; });
      std::set<std::string> qa_dates;
      if (partner != qa->tiles.end())
        for (const std::string& f : partner->files)
          if (const auto time = date_from_name(fs::path(detail::file_in_connection(f)).filename().string()))
            qa_dates.insert(time->label());
      for (const std::string& f : tile.files)
        if (const auto time = date_from_name(fs::path(detail::file_in_connection(f)).filename().string());
            time && !qa_dates.count(time->label()))
          throw InputError(f, no_tile_partner(time->label(), tile.name, request.qa_input, tile_field));
    }
  }
  // Tiles to fill: all, or those with new data and those whose halo reaches one of them.
  const int halo = make_fill_method(request.method)->halo();
  auto touched = [&](const Tile& tile) {
    if (!only_tiles) return true;
    for (const Tile& other : data.tiles) {
      if (std::find(only_tiles->begin(), only_tiles->end(), other.name) == only_tiles->end()) continue;
      const Window& a = tile.window;
      const Window& b = other.window;
      if (a.x - halo < b.x + b.width && b.x < a.x + a.width + halo && a.y - halo < b.y + b.height &&
          b.y < a.y + a.height + halo)
        return true;
    }
    return false;
  };
  TiledFillSummary summary;
  summary.missing = data.missing;
  std::vector<std::string> folders;
  const int total = int(data.tiles.size());
  for (int t = 0; t < total; ++t) {
    const Tile& tile = data.tiles[std::size_t(t)];
    folders.push_back((out / tile.name).string());
    if (!touched(tile) && fs::exists(out / tile.name)) {
      ++summary.tiles_skipped;
      continue;
    }
    FillRequest r = request;
    r.input = data.pattern;
    if (qa) r.qa_input = qa->pattern;
    r.region = tile.window;
    r.out_dir = (out / tile.name).string();
    if (r.name.empty()) {
      // Named as a fill of the input would be: after the variable of container files.
      const auto connection = detail::connection_pattern(request.input);
      r.name = connection && !connection->variable().empty() ? connection->variable()
                                                              : Stack::open(data.pattern, request.rules).name();
    }
    ProgressCallback tile_progress;
    if (progress)
      tile_progress = [&, t](int done, int blocks) { progress(t * 1000 + done * 1000 / std::max(blocks, 1), total * 1000); };
    summary.tiles.push_back(run_fill(r, tile_progress));
  }
  if (mosaic) {
    summary.mosaic_dir = (out / "mosaic").string();
    std::tie(summary.mosaic_written, summary.mosaic_unchanged) = write_mosaics(folders, summary.mosaic_dir);
  } else if (!only_tiles) {
    // An earlier run's mosaic views, no longer made, would point at outputs this run removed:
    // they go, as outputs of dates no longer in the stack do.
    std::error_code ec;
    const fs::path views = out / "mosaic";
    if (fs::is_directory(views, ec)) {
      std::vector<fs::path> folders{views};
      for (auto it = fs::recursive_directory_iterator(views, ec); it != fs::recursive_directory_iterator(); ++it)
        if (it->is_directory()) folders.push_back(it->path());
        else if (it->path().extension() == ".vrt" && find_date_in_name(it->path().filename().string()))
          fs::remove(it->path(), ec);  // dated views only, not a user's VRT
      // The folders left empty, deepest first (a folder's path is longer than its parent's).
      std::sort(folders.begin(), folders.end(), [](const fs::path& a, const fs::path& b) {
        return a.native().size() > b.native().size();
      });
      for (const fs::path& folder : folders)
        if (fs::is_empty(folder, ec)) fs::remove(folder, ec);
    }
  }
  return summary;
}

}  // namespace kalends
