#include "app/progress.h"

#include <unistd.h>

#include <cstdio>

#include "app/console.h"

namespace skerry {

bool stderr_is_terminal() { return ::isatty(STDERR_FILENO) == 1; }

Progress::Progress(std::string label, std::size_t total)
    : label_(std::move(label)), total_(total),
      enabled_(verbosity() != Verbosity::Quiet && (stderr_is_terminal() || verbosity() == Verbosity::Verbose)),
      log_lines_(enabled_ && !stderr_is_terminal()), last_(std::chrono::steady_clock::now()) {}

Progress::~Progress() { finish(); }

void Progress::advance(std::size_t n) {
  done_ += n;
  if (!enabled_) return;
  auto now = std::chrono::steady_clock::now();
  std::unique_lock lock(mu_, std::try_to_lock);
  if (!lock.owns_lock()) return;
  if (log_lines_) {
    const std::size_t tenths = total_ ? 10 * done_.load() / total_ : 10;
    if (tenths > logged_tenths_ && tenths < 10) {
      logged_tenths_ = tenths;
      draw(false);
    }
    return;
  }
  if (now - last_ < std::chrono::milliseconds(100)) return;
  last_ = now;
  draw(false);
}

void Progress::finish() {
  if (!enabled_ || finished_) return;
  std::lock_guard lock(mu_);
  finished_ = true;
  draw(true);
}

void Progress::draw(bool final) {
  const std::size_t d = done_.load();
  const double pct = total_ ? 100.0 * static_cast<double>(d) / static_cast<double>(total_) : 100.0;
  if (log_lines_)
    std::fprintf(stderr, "%s%s %.0f%% (%zu/%zu)\n", console_prefix().c_str(), label_.c_str(), pct, d, total_);
  else
    std::fprintf(stderr, "\r%-24s %5.1f%% (%zu/%zu)%s", label_.c_str(), pct, d, total_, final ? "\n" : "");
  std::fflush(stderr);
}

}  // namespace skerry
