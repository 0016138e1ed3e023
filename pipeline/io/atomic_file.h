#pragma once
/// Outputs are written under a temporary name in the destination folder and
/// renamed into place only when complete (fsync of the file, then of the folder),
/// so a run killed at any moment leaves either the old file or the new one,
/// never a half-written one. Temporary names start with '.' and end in '.partial'.
#include <cstddef>
#include <filesystem>
#include <string>
#include <vector>

namespace skerry {

class AtomicOutput {
 public:
  /// Prepares `final_path`; creates the parent folder if needed.
  explicit AtomicOutput(std::string final_path);
  /// Removes the temporary file unless commit() succeeded.
  ~AtomicOutput();
  AtomicOutput(const AtomicOutput&) = delete;
  AtomicOutput& operator=(const AtomicOutput&) = delete;

  /// Where to write (a path in the same folder as the final file).
  const std::string& temp_path() const { return temp_; }
  const std::string& final_path() const { return final_; }
  /// fsync the temporary file, rename it to the final name, fsync the folder.
  /// Throws OutputError naming the final file on failure.
  void commit();

 private:
  std::string final_;
  std::string temp_;
  bool committed_ = false;
};

/// The same mechanism for a set of outputs that must appear together: a hidden
/// folder ".NAME.TAG-PID.partial" inside the output folder receives every file
/// (each written atomically there), and commit() moves them into the output
/// folder (one rename each, then an fsync of the folder). The destructor removes
/// the hidden folder and whatever is still in it, so a failed run leaves the
/// previous outputs untouched and no partial file behind.
/// A staging folder of the same NAME and TAG whose process no longer exists is
/// removed when the next one is created.
class StagedOutputs {
 public:
  /// Creates `out_dir` (if needed) and the hidden folder; throws OutputError.
  StagedOutputs(const std::string& out_dir, const std::string& name, const std::string& tag);
  ~StagedOutputs();
  StagedOutputs(const StagedOutputs&) = delete;
  StagedOutputs& operator=(const StagedOutputs&) = delete;
  /// Path in the hidden folder for the output file `file_name` (recorded, in call order).
  std::string path(const std::string& file_name);
  /// Where `file_name` ends up.
  std::string final_path(const std::string& file_name) const;
  /// The recorded file names, in the order path() was called.
  const std::vector<std::string>& files() const { return files_; }
  /// Moves every recorded file into place; throws OutputError naming the file.
  /// Then removes the files of `previous_outputs` (an earlier run's list, e.g.
  /// from its run record) that lie in the output folder and this run did not
  /// write: the folder holds one run's outputs, never a mix.
  void commit(const std::vector<std::string>& previous_outputs = {});

 private:
  std::filesystem::path final_, dir_;
  std::vector<std::string> files_;
};

/// Write `content` to `path` atomically. Throws OutputError on failure
/// (including a short write on a full disk).
void write_text_atomic(const std::string& path, const std::string& content);

/// fsync of a file (`is_folder` false) or of a folder's entries (true); a path
/// that cannot be opened is skipped (the rename or the next step reports it).
void fsync_path(const std::string& path, bool is_folder);

/// pwrite of all `len` bytes at `offset`, retried after EINTR and short writes.
/// Returns 0, or the errno of the failure (EIO for a write of nothing).
int write_fully_at(int fd, const char* data, std::size_t len, long long offset);

/// True for names this project uses for temporary files.
bool is_temporary_name(const std::string& file_name);

}  // namespace skerry
