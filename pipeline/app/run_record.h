#pragma once
/// The JSON run record written beside every run's outputs (NAME.run.json):
/// tool version and git revision, the full resolved configuration, SHA-256 of
/// every input file, counts, per-stage wall times, and - only here, never in
/// FITS files or tables - the time stamp and the host name.
#include <chrono>
#include <cstdint>
#include <map>
#include <string>
#include <utility>
#include <vector>

namespace skerry {

/// SHA-256 (FIPS PUB 180-4) of a byte string, as 64 lower-case hex digits.
std::string sha256_hex(const void* data, std::size_t size);
/// SHA-256 of a file's bytes (streamed); throws InputError naming the file.
std::string sha256_file(const std::string& path);

class RunRecord {
 public:
  explicit RunRecord(std::string command);

  void set_configuration(const std::map<std::string, std::string>& resolved,
                         const std::string& config_file);
  /// Records the file's size and SHA-256 under `role` ("image", "primary_beam", ...);
  /// returns the SHA-256. `sha256` may be given when already computed.
  std::string add_input(const std::string& role, const std::string& path, const std::string& sha256 = "");
  void add_output(const std::string& path);
  void set_count(const std::string& key, std::int64_t value);
  void set_value(const std::string& key, const std::string& value);
  void set_threads(int threads) { threads_ = threads; }
  /// Appends a stage with its wall time [s] (stages keep their order).
  void add_stage(const std::string& name, double seconds);
  double total_seconds() const;

  /// The record as JSON text (pretty-printed, keys sorted except stage order).
  std::string to_json() const;
  /// write_text_atomic(path, to_json()).
  void write(const std::string& path) const;

 private:
  struct Input { std::string role, path, sha256; std::uintmax_t bytes = 0; };
  std::string command_;
  std::string config_file_;
  std::map<std::string, std::string> config_;
  std::vector<Input> inputs_;
  std::vector<std::string> outputs_;
  std::map<std::string, std::int64_t> counts_;
  std::map<std::string, std::string> values_;
  std::vector<std::pair<std::string, double>> stages_;
  int threads_ = 0;
  std::chrono::system_clock::time_point started_;
  std::chrono::steady_clock::time_point t0_;
};

/// The output files an earlier run record lists ("outputs"), or none when the
/// file is missing or not a run record (a damaged record is ignored, not an
/// error: it only decides what an earlier run may have left behind).
std::vector<std::string> outputs_listed_in(const std::string& run_record_path);

/// Measures one stage: adds it to the record when stop() is called or on
/// destruction, and shows it on the console while it runs (app/console.h).
class StageTimer {
 public:
  StageTimer(RunRecord& record, std::string name);
  ~StageTimer();
  double stop();

 private:
  RunRecord& record_;
  std::string name_;
  std::chrono::steady_clock::time_point t0_;
  bool stopped_ = false;
};

}  // namespace skerry
