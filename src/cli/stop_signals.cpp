#include "cli/stop_signals.hpp"

#include <csignal>
#include <cstdio>
#include <cstring>
#include <unistd.h>

namespace kalends::cli {

namespace {

constexpr int stop_signals[] = {SIGTERM, SIGINT, SIGHUP};
constexpr const char* stop_names[] = {"SIGTERM", "SIGINT", "SIGHUP"};
// The lines, composed at install time: a handler may not format or allocate.
char stop_lines[3][200];
char stop_json[3][160];
volatile std::sig_atomic_t write_json = 0;

void write_all(int fd, const char* text) {
  std::size_t left = std::strlen(text);
  while (left > 0) {
    const ssize_t n = ::write(fd, text, left);
    if (n <= 0) return;
    text += n;
    left -= std::size_t(n);
  }
}

void on_stop(int signal) {
  int k = 0;
  while (k < 2 && stop_signals[k] != signal) ++k;
  write_all(STDERR_FILENO, stop_lines[k]);
  if (write_json) write_all(STDOUT_FILENO, stop_json[k]);
  std::signal(signal, SIG_DFL);  // then die of it, so the exit status says so (128 + signal)
  std::raise(signal);
}

}  // namespace

void install_stop_signals() {
  std::signal(SIGXFSZ, SIG_IGN);  // a write past the limit then fails with EFBIG, an error like a full disk
  for (int k = 0; k < 3; ++k) {
    std::snprintf(stop_lines[k], sizeof stop_lines[k],
                  "kalends: stopped by %s; no output is left half-written under its final name, but this run's "
                  "outputs may stand beside the last run's until the command or job is run again\n",
                  stop_names[k]);
    std::snprintf(stop_json[k], sizeof stop_json[k],
                  "{\"event\": \"finished\", \"exit_code\": %d, \"error\": \"stopped by %s\"}\n", 128 + stop_signals[k],
                  stop_names[k]);
    std::signal(stop_signals[k], on_stop);
  }
}

void stop_signals_write_json() { write_json = 1; }

}  // namespace kalends::cli
