#include "io/lock_probe.hpp"

#include <fcntl.h>
#include <sys/file.h>
#include <unistd.h>

#include <cerrno>
#include <filesystem>

#include "io/output_set.hpp"

namespace kalends::detail {

namespace fs = std::filesystem;

namespace {

// Whether another process holds `path` (open read-only) exclusively. A shared probe taken here
// is released at once; only "would block" means held: other failures (no such file, a file
// system without locks, a folder NFS cannot lock) tell nothing.
std::optional<bool> held_exclusively(const std::string& path, int* fd_out = nullptr) {
  const int fd = ::open(path.c_str(), O_RDONLY | O_CLOEXEC);
  if (fd < 0) return std::nullopt;
  std::optional<bool> held;
  if (::flock(fd, LOCK_SH | LOCK_NB) == 0) held = false;
  else if (errno == EWOULDBLOCK) held = true;
  if (fd_out && held == true) *fd_out = fd;
  else ::close(fd);
  return held;
}

}  // namespace

std::string pid_in_lock(int fd) {
  char text[32] = {0};
  (void)!::pread(fd, text, sizeof text - 1, 0);
  return std::string(text).empty() ? "?" : std::string(text);
}

bool folder_being_written(const std::string& folder) {
  const std::string where = folder.empty() ? "." : folder;
  // As OutputFolder takes it: the folder where it can be locked, else its lock file.
  if (const auto held = held_exclusively(where)) return *held;
  return held_exclusively((fs::path(where) / folder_lock_file).string()).value_or(false);
}

std::optional<std::string> job_run_holding(const std::string& state_folder) {
  int fd = -1;
  if (held_exclusively((fs::path(state_folder) / "lock").string(), &fd).value_or(false)) {
    const std::string pid = pid_in_lock(fd);
    ::close(fd);
    return pid;
  }
  return std::nullopt;
}

}  // namespace kalends::detail
