#include "app/console.h"

#include <atomic>
#include <cstdio>
#include <iostream>
#include <mutex>

#include "app/progress.h"

namespace skerry {
namespace {
std::atomic<Verbosity> g_verbosity{Verbosity::Normal};
std::mutex g_mu;
std::string g_command;  // guarded by g_mu
bool g_stage_line = false;  // a terminal stage line is standing (guarded by g_mu)

std::string prefix() { return g_command.empty() ? std::string("skerry: ") : "skerry " + g_command + ": "; }

void clear_stage_line_locked() {
  if (!g_stage_line) return;
  std::fputs("\r\033[K", stderr);
  g_stage_line = false;
}
}  // namespace

void end_stage_line() {
  std::lock_guard lock(g_mu);
  clear_stage_line_locked();
  std::fflush(stderr);
}

std::string console_prefix() {
  std::lock_guard lock(g_mu);
  return prefix();
}

void set_verbosity(Verbosity v) { g_verbosity = v; }
Verbosity verbosity() { return g_verbosity.load(); }

void set_console_command(const std::string& name) {
  std::lock_guard lock(g_mu);
  g_command = name;
}

void say(const std::string& line) {
  if (verbosity() == Verbosity::Quiet) return;
  std::lock_guard lock(g_mu);
  clear_stage_line_locked();
  std::fflush(stderr);
  std::cout << line << (line.empty() || line.back() != '\n' ? "\n" : "") << std::flush;
}

void note(const std::string& line) {
  if (verbosity() == Verbosity::Quiet) return;
  std::lock_guard lock(g_mu);
  clear_stage_line_locked();
  std::fprintf(stderr, "%snote: %s\n", prefix().c_str(), line.c_str());
  std::fflush(stderr);
}

void stage_started(const std::string& stage) {
  const Verbosity v = verbosity();
  if (v == Verbosity::Quiet) return;
  std::lock_guard lock(g_mu);
  if (v == Verbosity::Verbose) {
    std::fprintf(stderr, "%s%s ...\n", prefix().c_str(), stage.c_str());
  } else if (stderr_is_terminal()) {
    clear_stage_line_locked();
    std::fprintf(stderr, "%s%s ...", prefix().c_str(), stage.c_str());
    g_stage_line = true;
  }
  std::fflush(stderr);
}

void stage_ended(const std::string& stage, double seconds) {
  const Verbosity v = verbosity();
  if (v == Verbosity::Quiet) return;
  std::lock_guard lock(g_mu);
  if (v == Verbosity::Verbose) {
    std::fprintf(stderr, "%s%s done in %.2f s\n", prefix().c_str(), stage.c_str(), seconds);
  } else {
    clear_stage_line_locked();
  }
  std::fflush(stderr);
}

}  // namespace skerry
