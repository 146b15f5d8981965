#include "io/folder_read_lock.hpp"

#include <fcntl.h>
#include <sys/file.h>
#include <unistd.h>

#include <cerrno>
#include <filesystem>

#include "io/file_glob.hpp"
#include "io/lock_probe.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"

namespace kalends::detail {

namespace fs = std::filesystem;

FolderReadLocks::~FolderReadLocks() {
  for (const int fd : descriptors_) ::close(fd);
}

void FolderReadLocks::hold(const std::string& input) {
  std::error_code ec;
  fs::path path(file_in_connection(input));
  bool recursive = fs::is_directory(path, ec);
  if (!recursive) {
    // The folder above the first wildcard: a pattern may reach into its subfolders.
    fs::path plain;
    bool wildcard = false;
    for (const fs::path& part : path.parent_path()) {
      if (has_glob_characters(part.string())) {
        wildcard = true;
        break;
      }
      plain /= part;
    }
    recursive = wildcard;
    path = plain.empty() ? fs::path(".") : plain;
  }
  if (!fs::is_directory(path, ec)) return;  // the command says what is missing
  hold_folder(path.string());
  if (!recursive) return;
  for (auto it = fs::recursive_directory_iterator(path, ec); !ec && it != fs::recursive_directory_iterator();
       walk_on(it)) {
    std::error_code entry;
    if (!it->is_directory(entry)) continue;
    const std::string name = it->path().filename().string();
    if (!name.empty() && name.front() == '.') {
      it.disable_recursion_pending();  // .kalends and temporaries: no outputs of ours
      continue;
    }
    hold_folder(it->path().string());
  }
}

void FolderReadLocks::hold_folder(const std::string& folder) {
  std::error_code ec;
  const std::string key = fs::weakly_canonical(folder, ec).string();
  if (!held_.insert(ec ? folder : key).second) return;
  // A job run holds OUT/.kalends/lock through all its steps: between them no folder is locked.
  // Its own report and extract steps read while it holds it. A step's folder lies inside OUT,
  // so the folders above are looked at too (a step folder read between two steps had mixed
  // the new fill with the old seasons, exit 0).
  for (fs::path at = fs::absolute(folder, ec).lexically_normal(); !at.empty(); at = at.parent_path()) {
    if (const auto pid = job_run_holding((at / ".kalends").string()); pid && *pid != std::to_string(::getpid()))
      throw InputError(folder, "a kalends run" + (*pid == "?" ? std::string() : " (pid " + *pid + ")") +
                                   " is working on the output folder " + at.string() + " now; run again when it ends");
    if (at == at.parent_path()) break;
  }
  // As writers lock (OutputFolder): the folder, else its lock file where there is one.
  for (const std::string& what : {folder, (fs::path(folder) / folder_lock_file).string()}) {
    const int fd = ::open(what.c_str(), O_RDONLY | O_CLOEXEC);
    if (fd < 0) return;
    if (::flock(fd, LOCK_SH | LOCK_NB) == 0) {
      descriptors_.push_back(fd);
      return;
    }
    const bool writing = errno == EWOULDBLOCK;
    ::close(fd);
    if (writing) throw InputError(folder, "another kalends command is writing into this folder now; run again when it ends");
  }
}

}  // namespace kalends::detail
