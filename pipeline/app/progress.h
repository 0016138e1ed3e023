#pragma once
/// Progress of a long stage on stderr (app/console.h): on a terminal a single
/// rewritten line; with --verbose and stderr a file or pipe, a line at every
/// further 10 %; otherwise (cron, pipes, CI, --quiet) nothing. Thread-safe `advance()`.
#include <atomic>
#include <chrono>
#include <mutex>
#include <string>

namespace skerry {

bool stderr_is_terminal();

class Progress {
 public:
  Progress(std::string label, std::size_t total);
  ~Progress();
  void advance(std::size_t n = 1);
  void finish();

 private:
  void draw(bool final);
  std::string label_;
  std::size_t total_;
  std::atomic<std::size_t> done_{0};
  bool enabled_;
  bool log_lines_;            ///< verbose, not a terminal: a line per 10 %
  std::size_t logged_tenths_ = 0;
  bool finished_ = false;
  std::mutex mu_;
  std::chrono::steady_clock::time_point last_;
};

}  // namespace skerry
