#pragma once
/// Errors that reach the user, and the documented exit codes of `skerry`.
///
/// main() catches these, prints one line `skerry: error: <message>` on stderr
/// and exits with the code. Messages name the file (or option) and what is wrong.
#include <stdexcept>
#include <string>

namespace skerry {

enum ExitCode : int {
  kExitOk = 0,            ///< success
  kExitInternal = 1,      ///< a bug or an unexpected system failure
  kExitUsage = 2,         ///< bad command line or configuration (unknown option, wrong type)
  kExitBadInput = 3,      ///< an input file is missing, unreadable or not valid
  kExitOutput = 4,        ///< an output could not be written (disk full, permissions)
  kExitNothingToDo = 5,   ///< survey: every tile was already up to date
  kExitSomeFailed = 6,    ///< survey: some tiles failed (the others were processed)
  kExitBusy = 7,          ///< survey: another run holds the lock
  kExitNoData = 8,        ///< input valid but holds nothing to measure (e.g. all pixels blank)
};

/// Bad command line or configuration.
struct UsageError : std::runtime_error {
  using std::runtime_error::runtime_error;
};

/// An input file that cannot be used. The message starts with the file name.
struct InputError : std::runtime_error {
  InputError(const std::string& file, const std::string& what)
      : std::runtime_error(file + ": " + what) {}
};

/// Input that is valid but holds no data to work on.
struct NoDataError : std::runtime_error {
  NoDataError(const std::string& file, const std::string& what)
      : std::runtime_error(file + ": " + what) {}
};

/// An output that could not be written. The message starts with the file name.
struct OutputError : std::runtime_error {
  OutputError(const std::string& file, const std::string& what)
      : std::runtime_error(file + ": " + what) {}
};

/// Error with an explicit exit code (for survey outcomes).
struct ExitError : std::runtime_error {
  ExitError(int code_, const std::string& what) : std::runtime_error(what), code(code_) {}
  int code;
};

}  // namespace skerry
