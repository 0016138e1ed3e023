#include "io/atomic_file.h"

#include <fcntl.h>
#include <signal.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <cerrno>
#include <cstring>
#include <filesystem>

#include "app/errors.h"

namespace skerry {

namespace fs = std::filesystem;

namespace {
std::atomic<unsigned> g_counter{0};
}  // namespace

void fsync_path(const std::string& path, bool is_folder) {
  int fd = ::open(path.c_str(), (is_folder ? (O_RDONLY | O_DIRECTORY) : O_RDONLY) | O_CLOEXEC);
  if (fd < 0) return;
  ::fsync(fd);
  ::close(fd);
}

int write_fully_at(int fd, const char* data, std::size_t len, long long offset) {
  while (len > 0) {
    const ssize_t w = ::pwrite(fd, data, len, static_cast<off_t>(offset));
    if (w < 0) {
      if (errno == EINTR) continue;
      return errno;
    }
    if (w == 0) return EIO;
    data += w;
    len -= static_cast<std::size_t>(w);
    offset += w;
  }
  return 0;
}

bool is_temporary_name(const std::string& n) {
  return n.size() > 8 && n.front() == '.' && n.ends_with(".partial");
}

AtomicOutput::AtomicOutput(std::string final_path) : final_(std::move(final_path)) {
  fs::path p(final_);
  fs::path dir = p.parent_path();
  std::error_code ec;
  if (!dir.empty()) fs::create_directories(dir, ec);
  if (ec) throw OutputError(final_, "cannot create folder " + dir.string() + ": " + ec.message());
  temp_ = (dir / ("." + p.filename().string() + "." + std::to_string(::getpid()) + "." +
                  std::to_string(g_counter++) + ".partial"))
              .string();
  fs::remove(temp_, ec);
}

AtomicOutput::~AtomicOutput() {
  if (!committed_) {
    std::error_code ec;
    fs::remove(temp_, ec);
  }
}

void AtomicOutput::commit() {
  if (!fs::exists(temp_)) throw OutputError(final_, "nothing was written");
  fsync_path(temp_, false);
  if (::rename(temp_.c_str(), final_.c_str()) != 0)
    throw OutputError(final_, std::string("cannot rename into place: ") + std::strerror(errno));
  committed_ = true;
  fs::path dir = fs::path(final_).parent_path();
  fsync_path(dir.empty() ? "." : dir.string(), true);
}

void write_text_atomic(const std::string& path, const std::string& content) {
  AtomicOutput out(path);
  int fd = ::open(out.temp_path().c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0644);
  if (fd < 0) throw OutputError(path, std::string("cannot create: ") + std::strerror(errno));
  if (const int e = write_fully_at(fd, content.data(), content.size(), 0)) {
    ::close(fd);
    throw OutputError(path, std::string("write failed: ") + std::strerror(e));
  }
  if (::fsync(fd) != 0 || ::close(fd) != 0)
    throw OutputError(path, std::string("write failed: ") + std::strerror(errno));
  out.commit();
}

StagedOutputs::StagedOutputs(const std::string& out_dir, const std::string& name, const std::string& tag)
    : final_(out_dir) {
  std::error_code ec;
  fs::create_directories(final_, ec);
  if (ec) throw OutputError(out_dir, "cannot create the output folder: " + ec.message());
  // A staging folder of the same NAME and TAG left by a process that no longer
  // exists (killed, machine restarted) is removed; one of a live process (a
  // concurrent run) is left alone.
  const std::string prefix = "." + name + "." + tag + "-";
  for (const auto& e : fs::directory_iterator(final_, ec)) {
    const std::string n = e.path().filename().string();
    if (n.size() <= prefix.size() + 8 || n.compare(0, prefix.size(), prefix) != 0 || !n.ends_with(".partial")) continue;
    const std::string pid_text = n.substr(prefix.size(), n.size() - prefix.size() - 8);
    if (pid_text.empty() || pid_text.find_first_not_of("0123456789") != std::string::npos || pid_text.size() > 9)
      continue;
    const pid_t pid = static_cast<pid_t>(std::stol(pid_text));
    if (pid == ::getpid() || (::kill(pid, 0) != 0 && errno == ESRCH)) {
      std::error_code rm;
      fs::remove_all(e.path(), rm);
    }
  }
  ec.clear();
  dir_ = final_ / (prefix + std::to_string(::getpid()) + ".partial");
  fs::remove_all(dir_, ec);
  fs::create_directories(dir_, ec);
  if (ec) throw OutputError(dir_.string(), "cannot create a staging folder: " + ec.message());
}

StagedOutputs::~StagedOutputs() {
  std::error_code ec;
  fs::remove_all(dir_, ec);
}

std::string StagedOutputs::path(const std::string& file_name) {
  files_.push_back(file_name);
  return (dir_ / file_name).string();
}

std::string StagedOutputs::final_path(const std::string& file_name) const { return (final_ / file_name).string(); }

void StagedOutputs::commit(const std::vector<std::string>& previous_outputs) {
  for (const auto& f : files_) {
    std::error_code ec;
    fs::rename(dir_ / f, final_ / f, ec);
    if (ec) throw OutputError((final_ / f).string(), "cannot move into place: " + ec.message());
  }
  // Once the new outputs are in place: an earlier run's files that this run did
  // not write are removed, so that the folder never mixes two runs (only plain
  // file names of this folder are considered).
  for (const auto& p : previous_outputs) {
    const fs::path old(p);
    if (old.parent_path().lexically_normal() != final_.lexically_normal()) {
      std::error_code e1, e2;
      const fs::path a = fs::weakly_canonical(old.parent_path(), e1), b = fs::weakly_canonical(final_, e2);
      if (e1 || e2 || a != b) continue;
    }
    const std::string n = old.filename().string();
    if (n.empty() || std::find(files_.begin(), files_.end(), n) != files_.end()) continue;
    std::error_code ec;
    fs::remove(final_ / n, ec);
  }
  fsync_path(final_.string(), true);
}

}  // namespace skerry
