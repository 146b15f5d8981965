// Writing small text files (summaries, reports, caches) so that readers never see half a file.
#pragma once

#include <string>

namespace kalends::detail {

/// Writes `text` to `path` atomically (a temporary of this process, fsync, rename); leaves
/// `path` untouched when it already holds exactly `text`. OutputError when it cannot.
void write_text_atomically(const std::string& path, const std::string& text);

}  // namespace kalends::detail
