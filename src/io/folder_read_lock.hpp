// Shared locks held by the commands that read kalends outputs (extract, report) on the folders
// they read. Writers hold an exclusive lock on their output folder (OutputFolder) and a job run
// one on OUT/.kalends/lock: a table or a page had mixed two fills' files, exit 0, when a fill
// replaced the folder while they read it.
#pragma once

#include <set>
#include <string>
#include <vector>

namespace kalends::detail {

class FolderReadLocks {
 public:
  FolderReadLocks() = default;
  ~FolderReadLocks();
  FolderReadLocks(const FolderReadLocks&) = delete;
  FolderReadLocks& operator=(const FolderReadLocks&) = delete;

  /// Locks what `input` reads: a folder with its visible subfolders; a file, a pattern or a
  /// connection string its folder (the folders under a pattern's first wildcard with them).
  /// InputError naming the folder where a kalends command writes into it now, or a kalends run
  /// other than this process holds it. A file system without locks is read unguarded.
  void hold(const std::string& input);

 private:
  void hold_folder(const std::string& folder);
  std::vector<int> descriptors_;
  std::set<std::string> held_;
};

}  // namespace kalends::detail
