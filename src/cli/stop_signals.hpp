// What a stopped kalends says: a run ended by SIGTERM (a service stop, `timeout`), SIGINT
// (Ctrl-C) or SIGHUP leaves one line on stderr, and with `--log json` a `finished` event, before
// it dies of the signal. Writes past a file-size limit (SIGXFSZ) fail as errors instead of
// killing the process silently. A signal handler can only reach file-level state, so the
// messages are composed beforehand into fixed buffers here.
#pragma once

namespace kalends::cli {

/// Installs the handlers; call once, first thing in main.
void install_stop_signals();

/// From now on a stop also writes a JSON `finished` event on stdout (kalends run --log json).
void stop_signals_write_json();

}  // namespace kalends::cli
