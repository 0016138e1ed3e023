#pragma once
// Shared helpers of the tests that run the `skerry` executable or read its
// outputs: one implementation of running a program (with or without a shell),
// capturing its output and exit code, reading and writing whole files, quoting
// for the shell, and temporary folders. Linked as skerry_test_support; every
// test linking it depends on the `skerry` target (cmake/Skerry.cmake).
#include <sys/types.h>

#include <filesystem>
#include <string>
#include <vector>

namespace skerry::test {

namespace fs = std::filesystem;

/// The `skerry` executable of this build.
std::string skerry_binary();
/// tests/data of the source tree.
std::string data_dir();
/// Debian's python3 (with numpy/scipy/astropy) when present, else "python3" from PATH.
std::string python3();

/// Whole file as bytes; empty when it cannot be read.
std::string slurp(const fs::path& path);
/// Replaces the file's content with `content`.
void write_file(const fs::path& path, const std::string& content);
/// Single-quoted for /bin/sh.
std::string shell_quote(const std::string& s);

/// Exit code of a wait status: the exit status, or -1 when the process did not exit.
int exit_code(int wait_status);
/// Runs `cmd` with /bin/sh (std::system); returns its exit code (exit_code()).
int shell(const std::string& cmd);
/// Same, with stdin, stdout and stderr on /dev/null.
int shell_quiet(const std::string& cmd);
/// Runs `cmd` with /bin/sh, stdout and stderr merged into *out (when given).
int shell_capture(const std::string& cmd, std::string* out = nullptr);

struct RunResult {
  int code = -1;          ///< exit status; 128 + signal when killed by a signal
  std::string out, err;   ///< captured stdout and stderr
  double seconds = 0.0;   ///< wall-clock time
};

/// Starts argv[0] (found on PATH when it has no slash) without a shell, stdin on
/// /dev/null, stdout and stderr into the named files; returns its PID.
pid_t spawn(const std::vector<std::string>& argv, const std::string& out_file, const std::string& err_file);
/// Waits for a PID from spawn(); its exit status, 128 + signal, or -1.
int wait_exit(pid_t pid);
/// Runs argv without a shell and captures stdout and stderr (in capture_dir when
/// given, else in a private temporary folder; the capture files are removed).
RunResult run(const std::vector<std::string>& argv, const std::string& capture_dir = "");
/// run() of skerry_binary() with `args`.
RunResult run_skerry(std::vector<std::string> args, const std::string& capture_dir = "");

/// Names of the entries of a folder, sorted; empty when it does not exist.
std::vector<std::string> list_files(const std::string& dir);

/// A fresh temporary folder (system temporary folder, name skerry-TAG-XXXXXX),
/// removed with everything in it at the end of its scope.
class TempDir {
 public:
  explicit TempDir(const std::string& tag);
  ~TempDir();
  TempDir(const TempDir&) = delete;
  TempDir& operator=(const TempDir&) = delete;
  const std::string& path() const { return path_; }
  std::string operator/(const std::string& f) const { return path_ + "/" + f; }

 private:
  std::string path_;
};

}  // namespace skerry::test
