#pragma once
/// What a command prints besides its outputs, by verbosity (the global options
/// --quiet / -q and --verbose / -v, taken by main() wherever they stand before
/// a lone "--"):
///
///   quiet    errors and warnings only (stderr): a cron job mails only when
///            something needs attention;
///   normal   plus the one-line summary of each command (stdout), notes
///            (stderr), and on a terminal the running stage and progress bars;
///   verbose  plus a line per stage when it starts and when it ends, with its
///            wall time, and progress in steps of 10 % (stderr), also when
///            stderr is a file or pipe: for logs of long runs.
///
/// Errors are printed by main() and do not pass through here.
#include <string>

namespace skerry {

enum class Verbosity { Quiet, Normal, Verbose };

void set_verbosity(Verbosity v);
Verbosity verbosity();

/// The command's one-line summary (and other normal output) on stdout, unless quiet.
void say(const std::string& line);
/// A note on stderr ("skerry CMD: note: ..."), unless quiet.
void note(const std::string& line);

/// A stage of a command starts / ended after `seconds`: a line each when
/// verbose; on a terminal at normal verbosity the stage's name stands on a
/// line that is cleared when it ends (so a long read or write is not silent).
void stage_started(const std::string& stage);
void stage_ended(const std::string& stage, double seconds);

/// Clears a standing terminal stage line (before main() prints an error).
void end_stage_line();

/// "skerry NAME: " for the running sub-command (lines in logs start with it).
std::string console_prefix();

/// The name of the running sub-command, for the lines above ("skerry NAME: ...").
void set_console_command(const std::string& name);

}  // namespace skerry
