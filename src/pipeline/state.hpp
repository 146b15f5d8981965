// The state database of a job's output folder (SQLite): what every input was when last seen,
// and what every step made from what.
#pragma once

#include <sqlite3.h>

#include <cstdint>
#include <map>
#include <optional>
#include <string>
#include <vector>

namespace kalends::detail {

struct InputRecord {
  std::string path;
  std::int64_t size = 0, mtime_ns = 0;
  std::string checksum;
};

struct StepRecord {
  std::string id, kind, fingerprint, status, finished, message;
  double seconds = 0;
  std::vector<std::string> outputs{};
  std::map<std::string, std::string> inputs{};  // input files read directly -> checksum
  /// What the parameters were ("key<TAB>value" lines: the program version, the step's keys and
  /// its job inputs' rules), to name what changed; empty in databases of earlier versions.
  std::string parameters{};
};

class StateDatabase {
 public:
  /// Opens (creating) `path`. Every change is a transaction: a run killed at any moment leaves
  /// the database as it was before the change.
  /// A writable one is refused (OutputError) where a newer kalends wrote it, and records this
  /// program's version as the newest unless `record_program` is false (a dry run).
  explicit StateDatabase(const std::string& path, bool read_only = false, bool record_program = true);
  ~StateDatabase();
  StateDatabase(const StateDatabase&) = delete;
  StateDatabase& operator=(const StateDatabase&) = delete;

  std::optional<InputRecord> input(const std::string& path) const;
  void remember_inputs(const std::vector<InputRecord>& records);
  std::optional<StepRecord> step(const std::string& id) const;
  /// Marks a step done with its outputs, or failed with a message (outputs kept from before).
  void step_done(const StepRecord& record);
  void step_failed(const std::string& id, const std::string& kind, const std::string& message);
  /// Marks a step as being run (its last record kept otherwise): a run stopped inside it leaves
  /// it so, and status then says the step was interrupted.
  void step_running(const std::string& id, const std::string& kind);
  void remember_skipped(const std::vector<std::string>& skipped);
  /// The inputs the last run left out as bad (--skip-bad): path and reason.
  std::vector<std::pair<std::string, std::string>> skipped() const;
  /// The newest kalends version that has written this state ("" where none says).
  std::string newest_program() const;
  /// The job file (absolute path) of the last run that recorded one, "" where none did.
  std::string last_job_file() const;
  void remember_job_file(const std::string& path);

 private:
  /// The `program` table's value of `key`, "" where it has none (or there is no such table yet).
  std::string program_value(const char* key) const;
  void set_program_value(const char* key, const std::string& value) const;
  void exec(const std::string& sql) const;
  void rollback() const;
  void require_not_newer_program(bool record) const;

  sqlite3* db_ = nullptr;
  std::string path_;
};

/// Whether `version` ("0.3.23") is newer than this program's.
bool newer_than_this_program(const std::string& version);
/// OutputError where the state at `state_path` (if there is one) was written by a newer kalends:
/// an older one must not run on it (a shard's or a plan's run checks the main folder's).
void require_state_not_newer(const std::string& state_path);

/// FNV-1a 64-bit over a file's bytes, as 16 hex digits (a change detector, not a security hash).
std::string file_checksum(const std::string& path);
/// FNV-1a 64-bit of a text, as 16 hex digits.
std::string text_checksum(const std::string& text);

}  // namespace kalends::detail
