#pragma once
/// Progress on a terminal only: a single rewritten line on stderr when stderr is a
/// TTY; nothing at all otherwise (cron, pipes, CI). Thread-safe `advance()`.
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
  bool finished_ = false;
  std::mutex mu_;
  std::chrono::steady_clock::time_point last_;
};

}  // namespace skerry
