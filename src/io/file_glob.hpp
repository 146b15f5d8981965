// Expanding a file pattern, the one way every reader does it; listing a folder's files.
#pragma once

#include <string>
#include <vector>

namespace kalends::detail {

/// The files matching a shell pattern, sorted; InputError naming the pattern when none does.
std::vector<std::string> expand_glob(const std::string& pattern);

/// Every regular file below `folder` whose name does not start with '.' (partial writes and
/// state files), sorted; empty when the folder does not exist.
std::vector<std::string> files_below(const std::string& folder);

}  // namespace kalends::detail
