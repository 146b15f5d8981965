#include "pipeline/state.hpp"

#include <fcntl.h>
#include <sys/resource.h>

#include <cerrno>
#include <cstring>
#include <filesystem>
#include <unistd.h>

#include <fmt/format.h>

#include "kalends/error.hpp"

namespace kalends::detail {

namespace {

// FNV-1a, 64-bit (Fowler, Noll & Vo; offset basis and prime as published by its authors).
constexpr std::uint64_t fnv_offset = 14695981039346656037ull;
constexpr std::uint64_t fnv_prime = 1099511628211ull;

std::uint64_t fnv(std::uint64_t h, const unsigned char* data, std::size_t n) {
  for (std::size_t i = 0; i < n; ++i) {
    h ^= data[i];
    h *= fnv_prime;
  }
  return h;
}

// A database error under a file-size limit (ulimit -f) says so: SQLite's "disk I/O error" had
// sent the user looking at the disk.
std::string database_error(const std::string& message) {
  rlimit limit{};
  const bool written_short = message.find("I/O error") != std::string::npos || message.find("full") != std::string::npos;
  if (!written_short || getrlimit(RLIMIT_FSIZE, &limit) != 0 || limit.rlim_cur == RLIM_INFINITY)
    return "state database: " + message;
  return fmt::format("state database: {} (a file-size limit, ulimit -f, of {} KiB is set: raise it)", message,
                     std::uintmax_t(limit.rlim_cur) >> 10);
}

class Statement {
 public:
  Statement(sqlite3* db, const char* sql, const std::string& where) : where_(where) {
    if (sqlite3_prepare_v2(db, sql, -1, &stmt_, nullptr) != SQLITE_OK)
      throw OutputError(where, database_error(sqlite3_errmsg(db)));
  }
  ~Statement() { sqlite3_finalize(stmt_); }
  Statement& bind(int i, const std::string& v) {
    sqlite3_bind_text(stmt_, i, v.c_str(), int(v.size()), SQLITE_TRANSIENT);
    return *this;
  }
  Statement& bind(int i, std::int64_t v) {
    sqlite3_bind_int64(stmt_, i, v);
    return *this;
  }
  Statement& bind(int i, double v) {
    sqlite3_bind_double(stmt_, i, v);
    return *this;
  }
  bool step() {
    const int rc = sqlite3_step(stmt_);
    if (rc == SQLITE_ROW) return true;
    if (rc == SQLITE_DONE) return false;
    throw OutputError(where_, database_error(sqlite3_errmsg(sqlite3_db_handle(stmt_))));
  }
  std::string text(int c) const {
    const unsigned char* t = sqlite3_column_text(stmt_, c);
    return t ? reinterpret_cast<const char*>(t) : "";
  }
  std::int64_t integer(int c) const { return sqlite3_column_int64(stmt_, c); }
  double real(int c) const { return sqlite3_column_double(stmt_, c); }

 private:
  sqlite3_stmt* stmt_ = nullptr;
  std::string where_;
};

}  // namespace

std::string text_checksum(const std::string& text) {
  return fmt::format("{:016x}", fnv(fnv_offset, reinterpret_cast<const unsigned char*>(text.data()), text.size()));
}

std::string file_checksum(const std::string& path) {
  const int fd = ::open(path.c_str(), O_RDONLY);
  if (fd < 0) throw InputError(path, std::string("cannot read the file: ") + std::strerror(errno));
  std::uint64_t h = fnv_offset;
  std::vector<unsigned char> buffer(1 << 20);
  for (;;) {
    const ssize_t n = ::read(fd, buffer.data(), buffer.size());
    if (n < 0) {
      const int error = errno;
      ::close(fd);
      throw InputError(path, std::string("read failed while computing its checksum: ") + std::strerror(error));
    }
    if (n == 0) break;
    h = fnv(h, buffer.data(), std::size_t(n));
  }
  ::close(fd);
  return fmt::format("{:016x}", h);
}

StateDatabase::StateDatabase(const std::string& path, bool read_only, bool record_program) : path_(path) {
  const int flags = read_only ? SQLITE_OPEN_READONLY : SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE;
  if (sqlite3_open_v2(path.c_str(), &db_, flags, nullptr) != SQLITE_OK) {
    const std::string message = db_ ? sqlite3_errmsg(db_) : "cannot open";
    sqlite3_close(db_);
    db_ = nullptr;
    throw OutputError(path, database_error(message));
  }
  sqlite3_busy_timeout(db_, 10000);
  // SQLite opens a write-protected file read-only without a word; the run would then replace
  // outputs and fail only when it records them.
  if (!read_only && sqlite3_db_readonly(db_, "main") == 1) {
    sqlite3_close(db_);
    db_ = nullptr;
    throw OutputError(path, "the state database cannot be written (permissions?); nothing was run");
  }
  if (!read_only) {
    // Rollback journal with full sync: a kill or power cut leaves the last committed state.
    exec("PRAGMA synchronous = FULL");
    exec("CREATE TABLE IF NOT EXISTS inputs (path TEXT PRIMARY KEY, size INTEGER, mtime_ns INTEGER, checksum TEXT)");
    exec("CREATE TABLE IF NOT EXISTS steps (id TEXT PRIMARY KEY, kind TEXT, fingerprint TEXT, status TEXT,"
         " finished TEXT, seconds REAL, message TEXT)");
    exec("CREATE TABLE IF NOT EXISTS outputs (path TEXT PRIMARY KEY, step TEXT)");
    exec("CREATE TABLE IF NOT EXISTS skipped (path TEXT PRIMARY KEY, reason TEXT, seen TEXT)");
    exec("CREATE TABLE IF NOT EXISTS step_inputs (step TEXT, path TEXT, checksum TEXT, PRIMARY KEY (step, path))");
    exec("CREATE TABLE IF NOT EXISTS step_parameters (step TEXT PRIMARY KEY, fingerprint TEXT, parameters TEXT)");
    require_not_newer_program(record_program);
  }
}

namespace {

// "0.3.23" -> {0, 3, 23}; what is not a number counts as 0.
std::vector<int> version_numbers(const std::string& text) {
  std::vector<int> numbers;
  std::size_t at = 0;
  while (at <= text.size()) {
    const std::size_t dot = text.find('.', at);
    const std::string part = text.substr(at, dot == std::string::npos ? std::string::npos : dot - at);
    // The leading digits: "23-rc1" is 23.
    const std::size_t digits = std::min<std::size_t>(part.find_first_not_of("0123456789"), part.size());
    numbers.push_back(digits > 0 && digits < 9 ? std::stoi(part.substr(0, digits)) : 0);
    if (dot == std::string::npos) break;
    at = dot + 1;
  }
  return numbers;
}

}  // namespace

// The newest kalends that has written this state. An older one would take every step for
// changed ("program version changed"), rewrite the outputs with its older formulas and leave
// the newer one's extra files beside them: refused, with the way out.
std::string StateDatabase::program_value(const char* key) const {
  Statement table(db_, "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'program'", path_);
  if (!table.step()) return "";
  Statement read(db_, "SELECT value FROM program WHERE key = ?", path_);
  read.bind(1, std::string(key));
  return read.step() ? read.text(0) : "";
}

void StateDatabase::set_program_value(const char* key, const std::string& value) const {
  exec("CREATE TABLE IF NOT EXISTS program (key TEXT PRIMARY KEY, value TEXT)");
  Statement write(db_, "INSERT OR REPLACE INTO program (key, value) VALUES (?, ?)", path_);
  write.bind(1, std::string(key)).bind(2, value);
  write.step();
}

std::string StateDatabase::newest_program() const { return program_value("newest_version"); }

std::string StateDatabase::last_job_file() const { return program_value("job_file"); }

void StateDatabase::remember_job_file(const std::string& path) { set_program_value("job_file", path); }

bool newer_than_this_program(const std::string& version) {
  return !version.empty() && version_numbers(version) > version_numbers(KALENDS_VERSION);
}

void require_not_newer(const std::string& state_path, const std::string& newest) {
  if (newer_than_this_program(newest))
    throw OutputError(state_path, fmt::format("written by kalends {}, which is newer than this one ({}): an older "
                                              "kalends would redo every step with its older methods; run kalends {} or "
                                              "later, or give another output folder (to go back to {} here anyway, "
                                              "remove this file: every step then runs whole)",
                                              newest, KALENDS_VERSION, newest, KALENDS_VERSION));
}

void require_state_not_newer(const std::string& state_path) {
  std::error_code ec;
  if (!std::filesystem::exists(state_path, ec)) return;
  const StateDatabase db(state_path, true);
  require_not_newer(state_path, db.newest_program());
}

void StateDatabase::require_not_newer_program(bool record) const {
  const std::string newest = newest_program();
  require_not_newer(path_, newest);
  if (!record) return;
  if (newest != KALENDS_VERSION) set_program_value("newest_version", KALENDS_VERSION);
}

StateDatabase::~StateDatabase() { sqlite3_close(db_); }

void StateDatabase::rollback() const {
  // After a failed COMMIT (a full disk) SQLite may have rolled back already.
  sqlite3_exec(db_, "ROLLBACK", nullptr, nullptr, nullptr);
}

void StateDatabase::exec(const std::string& sql) const {
  char* error = nullptr;
  if (sqlite3_exec(db_, sql.c_str(), nullptr, nullptr, &error) != SQLITE_OK) {
    const std::string message = error ? error : "error";
    sqlite3_free(error);
    throw OutputError(path_, database_error(message));
  }
}

std::optional<InputRecord> StateDatabase::input(const std::string& path) const {
  Statement s(db_, "SELECT size, mtime_ns, checksum FROM inputs WHERE path = ?", path_);
  s.bind(1, path);
  if (!s.step()) return std::nullopt;
  return InputRecord{path, s.integer(0), s.integer(1), s.text(2)};
}

void StateDatabase::remember_inputs(const std::vector<InputRecord>& records) {
  exec("BEGIN IMMEDIATE");
  try {
    for (const InputRecord& r : records) {
      Statement one(db_, "INSERT OR REPLACE INTO inputs (path, size, mtime_ns, checksum) VALUES (?, ?, ?, ?)", path_);
      one.bind(1, r.path).bind(2, r.size).bind(3, r.mtime_ns).bind(4, r.checksum);
      one.step();
    }
    exec("COMMIT");
  } catch (...) {
    rollback();
    throw;
  }
}

std::optional<StepRecord> StateDatabase::step(const std::string& id) const {
  Statement s(db_, "SELECT kind, fingerprint, status, finished, seconds, message FROM steps WHERE id = ?", path_);
  s.bind(1, id);
  if (!s.step()) return std::nullopt;
  StepRecord r{id, s.text(0), s.text(1), s.text(2), s.text(3), s.text(5), s.real(4), {}};
  Statement o(db_, "SELECT path FROM outputs WHERE step = ? ORDER BY path", path_);
  o.bind(1, id);
  while (o.step()) r.outputs.push_back(o.text(0));
  // Databases written before this table existed have no rows: the step then reruns whole.
  if (sqlite3_exec(db_, "SELECT 1 FROM step_inputs LIMIT 0", nullptr, nullptr, nullptr) == SQLITE_OK) {
    Statement i(db_, "SELECT path, checksum FROM step_inputs WHERE step = ?", path_);
    i.bind(1, id);
    while (i.step()) r.inputs[i.text(0)] = i.text(1);
  }
  if (sqlite3_exec(db_, "SELECT 1 FROM step_parameters LIMIT 0", nullptr, nullptr, nullptr) == SQLITE_OK) {
    // Only those written with the fingerprint recorded now: an earlier version of kalends may
    // have run the step since, and left them behind.
    Statement p(db_, "SELECT fingerprint, parameters FROM step_parameters WHERE step = ?", path_);
    p.bind(1, id);
    if (p.step() && p.text(0) == r.fingerprint) r.parameters = p.text(1);
  }
  return r;
}

void StateDatabase::step_done(const StepRecord& record) {
  exec("BEGIN IMMEDIATE");
  try {
    Statement s(db_, "INSERT OR REPLACE INTO steps (id, kind, fingerprint, status, finished, seconds, message)"
                     " VALUES (?, ?, ?, 'done', datetime('now'), ?, '')", path_);
    s.bind(1, record.id).bind(2, record.kind).bind(3, record.fingerprint).bind(4, record.seconds);
    s.step();
    Statement d(db_, "DELETE FROM outputs WHERE step = ?", path_);
    d.bind(1, record.id);
    d.step();
    for (const std::string& out : record.outputs) {
      Statement o(db_, "INSERT OR REPLACE INTO outputs (path, step) VALUES (?, ?)", path_);
      o.bind(1, out).bind(2, record.id);
      o.step();
    }
    Statement di(db_, "DELETE FROM step_inputs WHERE step = ?", path_);
    di.bind(1, record.id);
    di.step();
    for (const auto& [file, checksum] : record.inputs) {
      Statement in(db_, "INSERT INTO step_inputs (step, path, checksum) VALUES (?, ?, ?)", path_);
      in.bind(1, record.id).bind(2, file).bind(3, checksum);
      in.step();
    }
    Statement p(db_, "INSERT OR REPLACE INTO step_parameters (step, fingerprint, parameters) VALUES (?, ?, ?)", path_);
    p.bind(1, record.id).bind(2, record.fingerprint).bind(3, record.parameters);
    p.step();
    exec("COMMIT");
  } catch (...) {
    rollback();
    throw;
  }
}

void StateDatabase::step_running(const std::string& id, const std::string& kind) {
  Statement s(db_, "INSERT INTO steps (id, kind, fingerprint, status, finished, seconds, message)"
                   " VALUES (?, ?, '', 'running', datetime('now'), 0, '')"
                   " ON CONFLICT(id) DO UPDATE SET status = 'running', finished = datetime('now')", path_);
  s.bind(1, id).bind(2, kind);
  s.step();
}

void StateDatabase::step_failed(const std::string& id, const std::string& kind, const std::string& message) {
  Statement s(db_, "INSERT INTO steps (id, kind, fingerprint, status, finished, seconds, message)"
                   " VALUES (?, ?, '', 'failed', datetime('now'), 0, ?)"
                   " ON CONFLICT(id) DO UPDATE SET status = 'failed', fingerprint = '', finished = datetime('now'),"
                   " message = excluded.message", path_);
  s.bind(1, id).bind(2, kind).bind(3, message);
  s.step();
}

std::vector<std::pair<std::string, std::string>> StateDatabase::skipped() const {
  std::vector<std::pair<std::string, std::string>> list;
  Statement s(db_, "SELECT path, reason FROM skipped ORDER BY path", path_);
  while (s.step()) list.emplace_back(s.text(0), s.text(1));
  return list;
}

void StateDatabase::remember_skipped(const std::vector<std::string>& skipped) {
  exec("BEGIN IMMEDIATE");
  try {
    exec("DELETE FROM skipped");
    for (const std::string& entry : skipped) {
      Statement s(db_, "INSERT OR REPLACE INTO skipped (path, reason, seen) VALUES (?, ?, datetime('now'))", path_);
      const auto colon = entry.find(": ");
      s.bind(1, entry.substr(0, colon)).bind(2, colon == std::string::npos ? "" : entry.substr(colon + 2));
      s.step();
    }
    exec("COMMIT");
  } catch (...) {
    rollback();
    throw;
  }
}

}  // namespace kalends::detail
