// Looking at the locks kalends commands hold, for the commands that only look: whether a command
// writes into a folder now, which run works on a job's output folder. One place, so that
// readers, `status` and the half-published check agree: three copies had drifted apart (on NFS a
// reader was told that a writer at work had been stopped; on a file system without locks
// `status` showed a refused run as running).
#pragma once

#include <optional>
#include <string>

namespace kalends::detail {

/// Whether another kalends command writes into `folder` now: holds the folder's own lock, or,
/// where the folder cannot be locked (NFS), its hidden lock file (OutputFolder). False where no
/// command does, and on a file system without locks (nothing can be known there).
bool folder_being_written(const std::string& folder);

/// The pid of the job run that holds the lock of `state_folder` (OUT/.kalends, or a shard's)
/// now: "?" where it wrote none yet; nothing where no run holds it or the file system has no
/// locks (a refused run leaves the lock file behind there).
std::optional<std::string> job_run_holding(const std::string& state_folder);

/// The pid a run wrote into the lock file open as `fd`, or "?".
std::string pid_in_lock(int fd);

}  // namespace kalends::detail
