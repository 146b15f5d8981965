// Expanding a file pattern, the one way every reader does it.
#pragma once

#include <string>
#include <vector>

namespace kalends::detail {

/// The files matching a shell pattern, sorted; InputError naming the pattern when none does.
std::vector<std::string> expand_glob(const std::string& pattern);

}  // namespace kalends::detail
