#pragma once
/// `skerry survey`: internals shared by the controller (cmd_survey.cpp), the
/// tile worker, the merge and the Slurm engine. Not a module: these read and
/// write files.
///
/// Layout of the output root:
///   survey.lock                 flock'ed by the controlling run (busy -> exit 7)
///   survey.sqlite               state record; written by the controller only
///   survey.log, survey.jsonl    plain log (one line per tile) and JSON lines
///   stage/extract.ini           the [extract] settings passed to every tile run
///   tiles/NAME/                 one tile's results (renamed into place whole)
///       NAME.components.csv ... what `skerry extract` wrote
///       tile.json               the worker's record of the tile (hashes, centre)
///   tiles/NAME.failed.json      the last failure of the tile (removed on success)
///   CATALOGUE                   the merged catalogue ([survey] catalogue)
///   CATALOGUE stem + .merge.json  merge summary (counts, fingerprint)
///   merge/scatter/NAME/         the tile's rows cut by sky partition (index.json,
///                               layout.stab, pPIXEL.stab); kept while the tile's
///                               results and the merge settings stay the same
///   merge/parts/FP/             one merge (FP: its fingerprint, 16 hex digits):
///                               plan.json, pPIXEL.stab + pPIXEL.json per partition
///   slurm/RUN/                  job scripts, task lists and task logs of a Slurm run
#include <cstdint>
#include <iosfwd>
#include <map>
#include <optional>
#include <set>
#include <string>
#include <vector>

#include <nlohmann/json_fwd.hpp>

#include "skerry/survey.h"
#include "skerry/table.h"

namespace skerry::surveyrun {

struct SlurmSettings {
  std::string partition;        ///< empty: the cluster's default
  std::string account;          ///< empty: none
  int cpus_per_task = 1;
  std::string mem = "2G";       ///< --mem per task
  std::string time = "01:00:00";///< --time per task
  int max_parallel = 0;         ///< array throttle (%N); 0 = no limit
  std::string merge_mem = "4G";
  std::string merge_time = "01:00:00";
  double poll_seconds = 1.0;
  std::string extra;            ///< extra sbatch arguments (split on spaces)
};

struct SurveyConfig {
  std::string config_path;      ///< absolute
  std::string base_dir;         ///< folder of the configuration file (relative paths start here)
  std::string name = "survey";
  std::vector<std::string> tile_patterns;  ///< globs or files, as written
  /// [survey] retired_tiles: tiles dropped on purpose (not processed, not merged).
  std::set<std::string> retired_tiles;
  std::string output_root;      ///< absolute
  std::string catalogue = "survey.components.csv";
  std::string engine = "local"; ///< "local" or "slurm"
  int workers = 2;
  int threads_per_tile = 1;
  survey::MergeOptions merge;
  /// Local engine: surveys of at most this many tile rows are merged in memory
  /// in one process (the same bytes as the on-disk merge; 0 = always on disk).
  std::int64_t merge_in_memory_rows = 1000000;
  std::string ra_column = "ra_deg", dec_column = "dec_deg";
  /// Stage settings of `skerry extract`: every "section.key" of the file outside
  /// [survey] and [slurm] ([image], [noise], [detect], [fit], [output], ...),
  /// passed through to each tile run as its --config file (extract checks them).
  std::map<std::string, std::string> extract;
  /// Multi-band tiles: the file-stem suffix of each band ([survey] bands, in the
  /// order given; empty = single-band tiles). A tile's band files share a stem
  /// prefix (the tile's name) and folder; `detection_band` indexes the band whose
  /// file the tile glob selects and whose `skerry extract` catalogue is the tile's.
  std::vector<std::string> bands;
  std::size_t detection_band = 0;
  /// Stage settings of `skerry bands` ([bands], [forced], [maps] sections), passed
  /// to each tile's bands run as its --config file. Only with two or more bands.
  std::map<std::string, std::string> bands_stage;
  SlurmSettings slurm;
  /// Hash of everything that changes a tile's results: the stage settings.
  std::string config_sha256;
  /// Hash of the merge settings (a change re-merges, it does not reprocess).
  std::string merge_settings;
};

/// Reads the survey description. Throws UsageError (bad or unknown keys, naming
/// the file and option) or InputError (file missing).
SurveyConfig load_survey_config(const std::string& path);
/// The keys of the survey file with their descriptions (for `skerry survey --help`).
void print_survey_file_keys(std::ostream& os);

/// "VERSION (REVISION)" of this executable.
std::string tool_version();

struct TileInput {
  std::string name;     ///< the image file's stem: unique in a survey
  std::string image;    ///< absolute path
};

/// The tile's image of every band (order of cfg.bands; just `tile.image` for
/// single-band tiles). Derived from the detection band's file name alone, so a
/// Slurm task finds the same files.
std::vector<std::string> tile_band_files(const SurveyConfig& cfg, const TileInput& tile);

/// Expands the tile patterns (sorted by name). Throws UsageError for a listed
/// file that does not exist or two tiles with one name.
std::vector<TileInput> discover_tiles(const SurveyConfig& cfg);

/// What a worker reports for one tile (tile.json or NAME.failed.json).
struct TileReport {
  std::string name;
  bool ok = false;
  int exit_code = 0;            ///< of the per-tile command
  std::string message;          ///< one line, on failure
  std::string inputs_sha256, config_sha256, tool_version;
  std::string components_file;  ///< file name inside tiles/NAME/
  /// Hash of the tile's results the merge reads: the component table's SHA-256,
  /// or, for multi-band tiles, SHA-256 of "COMPONENTS_SHA\nSPECTRA_SHA\n".
  std::string components_sha256;
  std::string spectra_file;     ///< multi-band tiles: file name inside tiles/NAME/ (bands/NAME.spectra.csv)
  std::int64_t rows = 0;
  double centre_ra_deg = 0.0, centre_dec_deg = 0.0;
  double seconds = 0.0;
  std::string run_id;
};

/// Runs the per-tile command for one tile as a child process (this executable,
/// `skerry extract IMAGE --out TMP`), then moves the results into tiles/NAME/ by
/// renames (fsync of files and folders). Never throws for a tile failure: the
/// report says what went wrong (and NAME.failed.json holds it). Never touches
/// the state record.
TileReport process_tile(const SurveyConfig& cfg, const TileInput& tile, const std::string& inputs_sha256,
                        const std::string& run_id);

/// Reads tiles/NAME/tile.json; nullopt when absent or unreadable.
std::optional<TileReport> read_tile_report(const SurveyConfig& cfg, const std::string& name);
/// Reads tiles/NAME.failed.json; nullopt when absent.
std::optional<TileReport> read_failure_report(const SurveyConfig& cfg, const std::string& name);

/// A tile as the merge takes it.
struct MergeTile {
  std::string name;
  std::string components_sha256;
  double centre_ra_deg = 0.0, centre_dec_deg = 0.0;
  /// The tile's last good results, kept while the tile is missing, unreadable or
  /// failed (its rows carry the stale bit of merge_flags) until it is retired.
  bool stale = false;
};

/// Descriptions of the merged catalogue's tile and merge_flags columns.
inline constexpr const char* kTileColumnDescription =
    "tile the row comes from (the tile owning its position, or the best tile that detected it)";
inline constexpr const char* kMergeFlagsDescription =
    "merge warnings: 1 = stale tile (its last good results; the tile is missing, unreadable or failed), "
    "2 = rescued (the tile owning the position did not detect it; kept from the lowest-noise tile that did)";
/// Bits of the merged catalogue's merge_flags column.
constexpr std::int64_t kMergeStaleTile = 1;  ///< from a stale tile's last good results
constexpr std::int64_t kMergeRescued = 2;    ///< the tile owning the position did not detect it

/// Tile worker: reads the rms map `skerry extract` wrote into `dir` and writes
/// dir/noise_cells.csv (the tile's local noise on HEALPix cells). Throws
/// InputError when there is no rms map.
void write_tile_noise(const std::string& dir);
/// The tile's noise cells (tiles/NAME/noise_cells.csv); an empty map (no valid
/// data known) when the file is absent. Throws InputError when it is damaged.
survey::TileNoise read_tile_noise(const SurveyConfig& cfg, const std::string& tile);

/// Fingerprint of a merge: settings, tool version and each tile's results.
std::string merge_fingerprint(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles);

struct MergeSummary {
  std::string fingerprint;
  std::size_t tiles = 0, input_rows = 0, rows = 0, duplicates_removed = 0, rescued = 0, stale_rows = 0,
              residual_duplicate_pairs = 0, name_collisions = 0, partitions = 0;
  std::vector<std::string> stale_tiles;  ///< name order
  double seconds = 0.0;
};

/// Merges the tiles' component tables into the survey catalogue (atomically),
/// and writes the merge summary, all in this process's memory. Tiles in name
/// order. Throws InputError / OutputError.
MergeSummary merge_tiles(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles);

// ---- On-disk merge (pipeline/survey/merge.cpp): scatter, partition merge, concatenation
//
// The survey never sits in one process's memory: (a) scatter cuts each tile's
// rows by HEALPix partition (home pixel plus the pixels whose margin holds the
// row) into merge/scatter/NAME/; (b) one partition at a time reads only its
// scatter files, runs survey::merge_partition and writes its result rows, in
// catalogue order and in the catalogue's final column layout; (c) the
// concatenation streams the partition results in pixel order into the
// catalogue. Memory: one tile in (a), one partition's rows in (b), one
// partition's result in (c). Byte-identical to merge_tiles.

/// The tile's scatter folder is current (or made so). Returns its row count.
/// Throws InputError naming the tile's table when it cannot be read.
std::int64_t ensure_scatter(const SurveyConfig& cfg, const MergeTile& tile);

/// A merge's plan: its tiles and the partitions holding at least one home row.
struct MergePlan {
  std::string fingerprint;
  std::string dir;                      ///< merge/parts/FP
  std::vector<MergeTile> tiles;         ///< name order
  std::vector<std::int64_t> partitions; ///< pixel order
  std::int64_t input_rows = 0;
};
/// Builds the plan from the tiles' scatter indexes (ensure_scatter first) and
/// writes plan.json. Throws InputError for a missing or stale scatter folder.
MergePlan plan_merge(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles);
/// Reads plan.json of merge folder `dir`. Throws InputError.
MergePlan read_merge_plan(const std::string& dir);
/// True when partition `pixel`'s result of this plan is on disk.
bool partition_done(const MergePlan& plan, std::int64_t pixel);
/// Merges one partition (skipped when done). Returns its peak-memory proxy: the
/// number of member rows it read. Throws InputError / OutputError.
std::size_t merge_one_partition(const SurveyConfig& cfg, const MergePlan& plan, std::int64_t pixel);
/// Concatenates the partition results into the catalogue and writes the merge
/// summary. Throws InputError when a partition result is missing.
MergeSummary concatenate_partitions(const SurveyConfig& cfg, const MergePlan& plan);

/// Local engine: scatter (tiles in parallel), partitions in parallel (oneTBB),
/// concatenation. Partitions that fail are listed in `failed` (one line each,
/// naming the partition and the reason) and the catalogue is not written; the
/// partitions done stay on disk for the next run. Returns the summary when the
/// catalogue was written.
std::optional<MergeSummary> merge_tiles_on_disk(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles,
                                                std::vector<std::string>& failed);

/// Removes merge folders of other fingerprints and scatter folders of tiles
/// not in `tiles` (controller only, under the lock).
void prune_merge_folders(const SurveyConfig& cfg, const std::vector<MergeTile>& tiles, const std::string& keep_fp);
/// Path of the merged catalogue and of its summary.
std::string catalogue_path(const SurveyConfig& cfg);
std::string merge_summary_path(const SurveyConfig& cfg);
std::optional<MergeSummary> read_merge_summary(const SurveyConfig& cfg);
/// The counts of a merge summary (rows, duplicates_removed, rescued, stale_rows,
/// stale_tiles, residual_duplicate_pairs, name_collisions, partitions) into `j`.
void put_summary_counts(nlohmann::json& j, const MergeSummary& sum);

/// Appends one line to survey.log and one JSON object to survey.jsonl (each by
/// one write(2) on an O_APPEND descriptor, then fsync).
class SurveyLog {
 public:
  explicit SurveyLog(const std::string& output_root);
  ~SurveyLog();
  SurveyLog(const SurveyLog&) = delete;
  SurveyLog& operator=(const SurveyLog&) = delete;
  /// `text` is the plain line after the time stamp; `json` an object's members
  /// already encoded (without braces), e.g. "\"event\":\"tile\",...".
  void write(const std::string& text, const std::string& json_members);

 private:
  int plain_ = -1, json_ = -1;
};

/// The merged catalogue's provenance (bands when there are several, survey,
/// tool, merge rule, counts, row order, fingerprint), the same for the in-memory
/// and the on-disk merge.
void set_catalogue_meta(Table& catalogue, const SurveyConfig& cfg, std::size_t n_tiles, const MergeSummary& sum);

/// For a tile's spectra table `spectra` (read from `spectra_path`), the row that
/// holds each of the `n_components` rows of `components_file`: its integer
/// `component_id` column (1-based) must name every component exactly once.
/// Throws InputError naming `spectra_path` and the first offending row.
std::vector<std::int64_t> spectra_row_of_component(const Table& spectra, std::size_t n_components,
                                                   const std::string& spectra_path,
                                                   const std::string& components_file);

/// UTC time stamp, ISO 8601 to the second ("2026-12-01T19:30:00Z").
std::string utc_now();
/// JSON string literal of `s` (with quotes).
std::string json_str(const std::string& s);

}  // namespace skerry::surveyrun

namespace skerry::surveyrun {

/// The state record: SQLite in the output root, opened by the controlling
/// process only (never by workers: SQLite's locking is unreliable on network
/// file systems, and one writer needs no locking at all). Rollback journal
/// (not WAL, which needs shared memory on one host) and synchronous=FULL: a
/// run killed mid-update leaves the previous state.
class StateRecord {
 public:
  explicit StateRecord(const std::string& path);
  ~StateRecord();
  StateRecord(const StateRecord&) = delete;
  StateRecord& operator=(const StateRecord&) = delete;

  struct InputKey {
    std::int64_t size = -1, mtime_ns = -1, inode = -1;
    std::string sha256;
  };
  std::optional<InputKey> input(const std::string& path) const;
  void set_input(const std::string& path, const InputKey& key);

  struct TileState {
    std::string name, image, status, inputs_sha256, config_sha256, tool_version, components_sha256, message;
    double centre_ra_deg = 0.0, centre_dec_deg = 0.0, seconds = 0.0;
    std::int64_t rows = 0;
    std::string updated_utc;
  };
  std::map<std::string, TileState> tiles() const;
  void set_tile(const TileState& t);

  std::string get(const std::string& key) const;
  void set(const std::string& key, const std::string& value);

  void begin();
  void commit();

  /// The integrity check at open found the record damaged: it was moved aside
  /// to this path and a fresh, empty record made (the caller rebuilds it from
  /// the tile folders). Empty when the record was sound.
  const std::string& recovered_from() const { return recovered_from_; }
  const std::string& recovery_reason() const { return recovery_reason_; }

 private:
  void open_checked();
  void exec(const std::string& sql);
  std::string recovered_from_, recovery_reason_;
  void* db_ = nullptr;
  std::string path_;
};

}  // namespace skerry::surveyrun

namespace skerry::surveyrun {

/// One pending tile handed to an engine.
struct PendingTile {
  TileInput tile;
  std::string inputs_sha256;
  std::string reason;  ///< new, content changed, configuration changed, ...
};

/// Slurm engine: one job array (a task per pending tile, which also scatters
/// its tile) and a plan job (afterok) through sbatch. The plan job scatters
/// what is left, plans the merge and submits a partition-merge array (one task
/// per non-empty partition still to do) and a concatenation job (afterok on
/// it). Everything is polled with squeue until it has ended. When tiles failed
/// (so the afterok plan job never ran) the plan job is submitted again for the
/// tiles that succeeded; with no pending tiles only the merge chain runs.
/// Returns one report per pending tile (in order); failed or lost tasks give
/// failure reports naming the task and its log. `merge_tiles_now` are the tiles
/// that are already current (the plan job adds the pending ones that succeed).
/// Partition tasks that failed are listed in `merge_failures` (one line each).
/// `on_progress(done, total)` is called while polling.
std::vector<TileReport> run_slurm(const SurveyConfig& cfg, const std::vector<PendingTile>& pending,
                                  const std::vector<MergeTile>& merge_tiles_now, const std::string& run_id,
                                  void (*on_progress)(std::size_t, std::size_t, void*), void* progress_ctx,
                                  std::string* run_dir_out, std::vector<std::string>* merge_failures);

/// The jobs of a Slurm run folder (its jobs.json) that squeue still shows
/// active, as "ID,ID"; "" when none (or no jobs.json, or no squeue).
std::string slurm_jobs_active(const std::string& run_dir);

/// `skerry survey CONFIG --worker_task N --run_dir DIR`: one Slurm array task.
int slurm_worker_task(const SurveyConfig& cfg, const std::string& run_dir, int task);
/// `skerry survey CONFIG --merge_job --run_dir DIR`: the Slurm plan job.
int slurm_merge_job(const SurveyConfig& cfg, const std::string& run_dir);
/// `skerry survey CONFIG --partition_task N --run_dir DIR`: one partition merge.
int slurm_partition_task(const SurveyConfig& cfg, const std::string& run_dir, int task);
/// `skerry survey CONFIG --concat_job --run_dir DIR`: the concatenation job.
int slurm_concat_job(const SurveyConfig& cfg, const std::string& run_dir);

}  // namespace skerry::surveyrun
