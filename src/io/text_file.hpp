// Writing small text files (summaries, reports, caches) so that readers never see half a file.
#pragma once

#include <initializer_list>
#include <string>

namespace kalends::detail {

/// Writes `text` to `path` atomically (a temporary of this process, fsync, rename); leaves
/// `path` untouched when it already holds exactly `text`, and returns whether it wrote.
/// OutputError when it cannot.
bool write_text_atomically(const std::string& path, const std::string& text);

/// A text output replaces only an earlier one of kalends': UsageError naming `path` when a file
/// there does not hold `mark` (text every such output of kalends carries) in its first 4 KiB, as
/// for rasters without KALENDS_VERSION. Call before anything is written.
void require_own_text_file(const std::string& path, const std::string& mark);

/// The same for a raster output: UsageError naming `path` when a file there carries none of the
/// metadata items `marks` (KALENDS_VERSION; grid's outputs also KALENDS_GRID_SOURCE).
void require_own_raster(const std::string& path, std::initializer_list<const char*> marks);

/// A file a command will write where `option` named it: UsageError, before any work, when the
/// name is empty or lies in a folder that does not exist. `example` is a name to suggest
/// ("table.csv").
void require_file_destination(const std::string& path, const std::string& option, const std::string& example);

}  // namespace kalends::detail
