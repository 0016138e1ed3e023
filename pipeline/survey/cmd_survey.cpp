// `skerry survey CONFIG`: unattended, incremental reduction of a survey's tiles
// and the merged survey catalogue. See pipeline/survey/engine.h for the files it keeps.
//
// Exit codes (errors.h): 0 work done, 5 nothing to do, 6 some tiles failed
// (the others were processed and merged; the failed ones are retried on the next
// run), 7 another run holds the lock, 2 bad configuration.
#include <fcntl.h>
#include <sys/file.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <mutex>
#include <set>
#include <sstream>
#include <thread>

#include "app/console.h"
#include "app/command.h"
#include "app/errors.h"
#include "io/atomic_file.h"
#include "app/options.h"
#include "app/progress.h"
#include "app/run_record.h"
#include "survey/engine.h"

namespace skerry {

namespace {

namespace fs = std::filesystem;
using namespace surveyrun;

/// The lock: flock(2) on survey.lock, held for the life of the run and released
/// by the kernel however the process ends (kill -9 included).
class RunLock {
 public:
  explicit RunLock(const std::string& path) {
    fd_ = ::open(path.c_str(), O_RDWR | O_CREAT | O_CLOEXEC, 0644);
    if (fd_ < 0) throw OutputError(path, std::string("cannot open the lock file: ") + std::strerror(errno));
    if (::flock(fd_, LOCK_EX | LOCK_NB) != 0) {
      const int e = errno;
      ::close(fd_);
      fd_ = -1;
      if (e == EWOULDBLOCK) throw ExitError(kExitBusy, "busy: another survey run holds " + path);
      throw OutputError(path, std::string("cannot lock: ") + std::strerror(e));
    }
  }
  ~RunLock() {
    if (fd_ >= 0) ::close(fd_);
  }
  RunLock(const RunLock&) = delete;
  RunLock& operator=(const RunLock&) = delete;

 private:
  int fd_ = -1;
};

/// Removes temporary files and folders left by a killed run (we hold the lock,
/// so nothing of ours is writing them).
void remove_stale_temporaries(const SurveyConfig& cfg) {
  std::vector<fs::path> dirs{fs::path(cfg.output_root), fs::path(cfg.output_root) / "tiles",
                             fs::path(cfg.output_root) / "stage"};
  std::error_code ec;
  // The merge folders: merge/, merge/scatter/, merge/scatter/NAME/, merge/parts/, merge/parts/FP/.
  const fs::path merge = fs::path(cfg.output_root) / "merge";
  if (fs::is_directory(merge, ec)) {
    dirs.push_back(merge);
    for (const char* sub : {"scatter", "parts"}) {
      const fs::path d = merge / sub;
      if (!fs::is_directory(d, ec)) continue;
      dirs.push_back(d);
      for (const auto& e : fs::directory_iterator(d, ec))
        if (e.is_directory(ec) && !is_temporary_name(e.path().filename().string())) dirs.push_back(e.path());
    }
  }
  for (const fs::path& dir : dirs) {
    if (!fs::is_directory(dir, ec)) continue;
    for (const auto& e : fs::directory_iterator(dir, ec)) {
      if (is_temporary_name(e.path().filename().string())) fs::remove_all(e.path(), ec);
    }
  }
}

std::string run_id_now() {
  std::time_t t = std::time(nullptr);
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buf[32];
  std::strftime(buf, sizeof buf, "%Y%m%dT%H%M%SZ", &tm);
  return std::string(buf) + "-" + std::to_string(::getpid());
}

std::string fixed(double v, int digits) {
  std::ostringstream s;
  s.setf(std::ios::fixed);
  s.precision(digits);
  s << v;
  return s.str();
}

std::string stage_ini(const SurveyConfig& cfg, const std::map<std::string, std::string>& kv, const std::string& cmd) {
  std::ostringstream s;
  s << "# Stage settings of survey " << cfg.name << " for skerry " << cmd << " (written by skerry survey from "
    << fs::path(cfg.config_path).filename().string() << ")\n";
  std::string section;
  for (const auto& [k, v] : kv) {  // sorted by "section.key"
    const std::string sec = k.substr(0, k.find('.'));
    if (sec != section) {
      s << "[" << sec << "]\n";
      section = sec;
    }
    s << k.substr(k.find('.') + 1) << " = " << v << "\n";
  }
  return s.str();
}

/// Rebuilds the tile table of a fresh state record from the tile folders' run
/// records (tiles/NAME/tile.json, tiles/NAME.failed.json). Input hashes are not
/// rebuilt: the next look at each input hashes it again. Returns the number of
/// tiles recorded.
std::size_t rebuild_state(const SurveyConfig& cfg, StateRecord& db, const std::vector<TileInput>& tiles) {
  std::map<std::string, std::string> image;
  for (const auto& t : tiles) image[t.name] = t.image;
  std::set<std::string> names;
  std::error_code ec;
  const fs::path tdir = fs::path(cfg.output_root) / "tiles";
  for (const auto& e : fs::directory_iterator(tdir, ec)) {
    const std::string n = e.path().filename().string();
    if (is_temporary_name(n) || n.empty() || n[0] == '.') continue;
    if (e.is_directory(ec)) names.insert(n);
    else if (n.ends_with(".failed.json")) names.insert(n.substr(0, n.size() - 12));
  }
  std::size_t count = 0;
  db.begin();
  for (const auto& n : names) {
    auto r = read_tile_report(cfg, n);
    if (!r || !r->ok) r = read_failure_report(cfg, n);
    if (!r) continue;
    StateRecord::TileState s;
    s.name = n;
    s.image = image.count(n) ? image[n] : "";
    s.status = r->ok ? "ok" : "failed";
    s.inputs_sha256 = r->ok ? r->inputs_sha256 : "";
    s.config_sha256 = r->ok ? r->config_sha256 : "";
    s.tool_version = r->ok ? r->tool_version : "";
    s.components_sha256 = r->ok ? r->components_sha256 : "";
    s.message = r->message;
    s.centre_ra_deg = r->centre_ra_deg;
    s.centre_dec_deg = r->centre_dec_deg;
    s.seconds = r->seconds;
    s.rows = r->rows;
    s.updated_utc = utc_now();
    db.set_tile(s);
    ++count;
  }
  db.commit();
  return count;
}

/// The stage settings checked by the stage commands themselves before any tile
/// runs: `skerry extract` (and `skerry bands`) parse them from a temporary copy
/// of the stage file with an empty image, which they refuse as bad input (exit
/// 3) after the settings; a refusal of the settings (exit 2) is this survey's
/// configuration error, naming the key.
void check_stage_settings(const SurveyConfig& cfg) {
  auto check = [&](const std::map<std::string, std::string>& kv, const std::string& cmd, int n_images) {
    if (kv.empty()) return;
    char dir_tmpl[] = "/tmp/skerry-stage-check.XXXXXX";
    const char* tmpdir = std::getenv("TMPDIR");
    std::string tmpl = std::string(tmpdir && *tmpdir ? tmpdir : "/tmp") + "/skerry-stage-check.XXXXXX";
    std::vector<char> buf(tmpl.begin(), tmpl.end());
    buf.push_back('\0');
    const char* made = ::mkdtemp(buf.data());
    if (!made) made = ::mkdtemp(dir_tmpl);
    if (!made) return;  // no place to check: the tile runs check the settings
    const fs::path dir(made);
    std::error_code ec;
    const std::string ini = (dir / "stage.ini").string();
    {
      std::ofstream o(ini);
      o << stage_ini(cfg, kv, cmd);
    }
    const std::string exe = fs::read_symlink("/proc/self/exe", ec).string();
    std::vector<std::string> args{exe, cmd};
    for (int i = 0; i < n_images; ++i) args.push_back((dir / ("empty" + std::to_string(i) + ".fits")).string());
    for (int i = 0; i < n_images; ++i) std::ofstream((dir / ("empty" + std::to_string(i) + ".fits")).string());
    const std::string out_dir = (dir / "out").string();
    for (const std::string& a : {std::string("--config"), ini, std::string("--out"), out_dir, std::string("--threads"),
                                 std::string("1")})
      args.push_back(a);
    std::vector<char*> argv;
    for (auto& a : args) argv.push_back(a.data());
    argv.push_back(nullptr);
    const std::string err_path = (dir / "stderr.txt").string();
    const pid_t pid = ::fork();
    if (pid == 0) {
      int fd = ::open(err_path.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
      int nul = ::open("/dev/null", O_RDWR);
      if (nul >= 0) {
        ::dup2(nul, 0);
        ::dup2(nul, 1);
      }
      if (fd >= 0) ::dup2(fd, 2);
      ::execv(argv[0], argv.data());
      ::_exit(127);
    }
    int status = 0;
    if (pid > 0)
      while (::waitpid(pid, &status, 0) < 0 && errno == EINTR) {
      }
    std::string last;
    {
      std::ifstream in(err_path);
      for (std::string line; std::getline(in, line);)
        if (!line.empty()) last = line;
    }
    fs::remove_all(dir, ec);
    if (pid > 0 && WIFEXITED(status) && WEXITSTATUS(status) == kExitUsage) {
      const std::string prefix = "skerry " + cmd + ": error: ";
      if (last.rfind(prefix, 0) == 0) last = last.substr(prefix.size());
      // The child names its temporary copy of the stage file: name ours instead.
      if (last.rfind(ini, 0) == 0) last = last.substr(ini.size() + (last.size() > ini.size() + 1 ? 2 : 0));
      throw UsageError(cfg.config_path + ": stage settings of skerry " + cmd + ": " + last);
    }
  };
  check(cfg.extract, "extract", 1);
  if (cfg.bands.size() >= 2) check(cfg.bands_stage, "bands", static_cast<int>(cfg.bands.size()));
}

bool is_current(const StateRecord::TileState& s, const std::string& inputs_sha256, const SurveyConfig& cfg) {
  return s.status == "ok" && s.inputs_sha256 == inputs_sha256 && s.config_sha256 == cfg.config_sha256 &&
         s.tool_version == tool_version();
}

struct ProgressCtx {
  Progress* p;
  std::size_t shown = 0;
};
void slurm_progress(std::size_t done, std::size_t, void* ctx) {
  auto* c = static_cast<ProgressCtx*>(ctx);
  if (done > c->shown) {
    c->p->advance(done - c->shown);
    c->shown = done;
  }
}

int run_survey(const std::vector<std::string>& args) {
  po::options_description d("survey options");
  // clang-format off
  d.add_options()
    ("survey_file", po::value<std::string>(), "CONFIG: the survey file (INI: [survey], [catalogue], extract's and bands' stage sections, [slurm]); also given as the first argument")
    ("force", po::bool_switch(), "reprocess every tile (with --only: those tiles)")
    ("up_to_date_exit", po::value<int>()->default_value(5), "exit code when every tile is up to date and nothing runs: 5 (default, tells a no-op apart) or 0 (for schedulers that read any non-zero code as failure)")
    ("only", po::value<std::vector<std::string>>()->composing(), "process only this tile (by name; repeatable); it is reprocessed even when current")
    ("engine", po::value<std::string>(), "local or slurm (overrides survey.engine)")
    ("worker_task", po::value<int>(), "internal: run task N of a Slurm run (--run_dir)")
    ("merge_job", po::bool_switch(), "internal: the merge plan job of a Slurm run (--run_dir)")
    ("partition_task", po::value<int>(), "internal: partition-merge task N of a Slurm run (--run_dir)")
    ("concat_job", po::bool_switch(), "internal: the concatenation job of a Slurm run (--run_dir)")
    ("run_dir", po::value<std::string>(), "internal: the Slurm run folder");
  // clang-format on
  CommonOptions common;
  common.threads_help = "tiles processed at once by the local engine (0 = survey.workers, default 2)";
  common.config = false;  // CONFIG is the survey file itself
  ParsedOptions opts = parse_options(
      "survey", "CONFIG [--force] [--only TILE]... [--engine local|slurm] [--threads N]\n\n"
                "Processes new or changed tiles of a survey and merges all tiles into one catalogue.\n"
                "Exit codes: 0 done, 5 nothing to do (0 with --up_to_date_exit 0), 6 some tiles failed, 7 busy (another run holds\n"
                "the lock), 2 bad configuration.",
      d, {{"survey_file", 1}}, args, common);
  if (opts.help) {
    std::cout << "\n";
    print_survey_file_keys(std::cout);
    return kExitOk;
  }
  const int up_to_date_exit = opts.vm["up_to_date_exit"].as<int>();
  require(up_to_date_exit == 0 || up_to_date_exit == kExitNothingToDo, "up_to_date_exit", std::to_string(up_to_date_exit),
          "0 or 5");
  if (!opts.vm.count("survey_file")) throw UsageError("survey: the survey file CONFIG is missing");
  SurveyConfig cfg = load_survey_config(opts.vm["survey_file"].as<std::string>());
  if (opts.vm.count("engine")) {
    cfg.engine = opts.vm["engine"].as<std::string>();
    require(cfg.engine == "local" || cfg.engine == "slurm", "engine", cfg.engine, "local or slurm");
  }
  const int threads = opts.vm["threads"].as<int>();
  require(threads >= 0, "threads", std::to_string(threads), "threads >= 0");
  if (threads > 0) cfg.workers = threads;

  // ---- Slurm task and merge job: files only, no lock, no state record --------
  if (opts.vm.count("worker_task") || opts.vm["merge_job"].as<bool>() || opts.vm.count("partition_task") ||
      opts.vm["concat_job"].as<bool>()) {
    if (!opts.vm.count("run_dir"))
      throw UsageError("--worker_task, --merge_job, --partition_task and --concat_job need --run_dir");
    const std::string run_dir = opts.vm["run_dir"].as<std::string>();
    if (opts.vm.count("worker_task")) return slurm_worker_task(cfg, run_dir, opts.vm["worker_task"].as<int>());
    ThreadLimit tl(cfg.slurm.cpus_per_task);
    if (opts.vm.count("partition_task")) return slurm_partition_task(cfg, run_dir, opts.vm["partition_task"].as<int>());
    if (opts.vm["concat_job"].as<bool>()) return slurm_concat_job(cfg, run_dir);
    return slurm_merge_job(cfg, run_dir);
  }

  const auto t_start = std::chrono::steady_clock::now();
  // The run's summary line: on a terminal (not with --quiet), or with --verbose;
  // warnings and failures are printed at every verbosity (cron mails them).
  const bool tty = (stderr_is_terminal() && verbosity() != Verbosity::Quiet) || verbosity() == Verbosity::Verbose;
  // Configuration checked before any work (nothing is written when it fails):
  // the tile patterns, then the stage settings as the stage commands read them.
  const std::vector<TileInput> tiles = discover_tiles(cfg);
  check_stage_settings(cfg);
  std::error_code ec;
  fs::create_directories(cfg.output_root, ec);
  if (ec) throw OutputError(cfg.output_root, "cannot create the output folder: " + ec.message());
  RunLock lock((fs::path(cfg.output_root) / "survey.lock").string());
  StateRecord db((fs::path(cfg.output_root) / "survey.sqlite").string());
  // A controller killed during a Slurm run leaves its jobs running: wait for
  // them (exit busy) rather than race them on the same tiles.
  if (const std::string prev = db.get("slurm_run_dir"); !prev.empty()) {
    const std::string active = slurm_jobs_active(prev);
    if (!active.empty())
      throw ExitError(kExitBusy, "busy: Slurm jobs " + active + " of an earlier run (" + prev + ") are still active");
    db.set("slurm_run_dir", "");
  }
  remove_stale_temporaries(cfg);
  SurveyLog log(cfg.output_root);
  const std::string run_id = run_id_now();

  if (!db.recovered_from().empty()) {
    const std::size_t n = rebuild_state(cfg, db, tiles);
    const std::string msg = "the state record " + (fs::path(cfg.output_root) / "survey.sqlite").string() +
                            " was damaged (" + db.recovery_reason() + "); moved aside to " + db.recovered_from() +
                            " and rebuilt from the run records of " + std::to_string(n) + " tile folders";
    log.write(msg, "\"event\":\"state_rebuilt\",\"run\":" + json_str(run_id) + ",\"moved_to\":" +
                       json_str(db.recovered_from()) + ",\"reason\":" + json_str(db.recovery_reason()) +
                       ",\"tiles\":" + std::to_string(n));
    std::cerr << "skerry survey: " << msg << "\n";
  }
  std::set<std::string> only;
  if (opts.vm.count("only")) {
    for (const auto& n : opts.vm["only"].as<std::vector<std::string>>()) {
      bool found = false;
      for (const auto& t : tiles) found |= t.name == n;
      if (!found) throw UsageError("--only " + n + ": no tile of that name in the survey (" + cfg.config_path + ")");
      only.insert(n);
    }
  }
  const bool force = opts.vm["force"].as<bool>();

  // ---- Inputs: quick key (size, mtime ns, inode) decides whether to hash ------
  std::vector<std::string> inputs_sha(tiles.size());
  std::vector<std::string> unreadable(tiles.size());
  bool began = false;
  for (std::size_t i = 0; i < tiles.size(); ++i) {
    // Every band file of the tile is an input (just the image for one band).
    const std::vector<std::string> files = tile_band_files(cfg, tiles[i]);
    std::vector<std::string> shas;
    for (const auto& file : files) {
      struct stat st {};
      if (::stat(file.c_str(), &st) != 0) {
        unreadable[i] = file + ": " + std::strerror(errno) + (files.size() > 1 ? " (a band file of tile " + tiles[i].name + ")" : "");
        break;
      }
      StateRecord::InputKey k;
      k.size = static_cast<std::int64_t>(st.st_size);
      k.mtime_ns = static_cast<std::int64_t>(st.st_mtim.tv_sec) * 1000000000LL + st.st_mtim.tv_nsec;
      k.inode = static_cast<std::int64_t>(st.st_ino);
      auto old = db.input(file);
      if (old && old->size == k.size && old->mtime_ns == k.mtime_ns && old->inode == k.inode) {
        shas.push_back(old->sha256);
        continue;
      }
      try {
        k.sha256 = sha256_file(file);
      } catch (const std::exception& e) {
        unreadable[i] = e.what();
        break;
      }
      shas.push_back(k.sha256);
      if (!began) {
        db.begin();
        began = true;
      }
      db.set_input(file, k);  // a touch updates the quick key; the hash decides
    }
    if (!unreadable[i].empty()) continue;
    if (shas.size() == 1) {
      inputs_sha[i] = shas[0];
    } else {
      // Multi-band: hash of "SUFFIX SHA" per band, in the configured order.
      std::string text;
      for (std::size_t b = 0; b < shas.size(); ++b) text += cfg.bands[b] + " " + shas[b] + "\n";
      inputs_sha[i] = sha256_hex(text.data(), text.size());
    }
  }
  if (began) db.commit();

  // ---- Which tiles are pending ------------------------------------------------
  auto state = db.tiles();
  std::vector<PendingTile> pending;
  std::vector<TileReport> failures_now;
  for (std::size_t i = 0; i < tiles.size(); ++i) {
    const auto& t = tiles[i];
    if (!only.empty() && !only.count(t.name)) continue;
    std::string reason;
    auto s = state.find(t.name);
    if (force || !only.empty()) reason = "forced";
    else if (s == state.end()) reason = "new";
    else if (s->second.status != "ok") reason = "failed before";
    else if (s->second.inputs_sha256 != inputs_sha[i]) reason = "content changed";
    else if (s->second.config_sha256 != cfg.config_sha256) reason = "configuration changed";
    else if (s->second.tool_version != tool_version()) reason = "tool version changed";
    else {
      // The results on disk must be the ones recorded (a file deleted by hand,
      // or replaced by a task of an earlier, killed run, is reprocessed).
      const auto rep = read_tile_report(cfg, t.name);
      if (!rep || !rep->ok) reason = "results missing";
      else if (rep->components_sha256 != s->second.components_sha256) reason = "results differ from the record";
    }
    if (reason.empty()) continue;
    if (!unreadable[i].empty()) {
      TileReport r;
      r.name = t.name;
      r.exit_code = kExitBadInput;
      r.message = unreadable[i];
      failures_now.push_back(r);
      continue;
    }
    pending.push_back({t, inputs_sha[i], reason});
  }

  // The tiles the merge takes: every current tile, and every other tile (missing,
  // unreadable, failed, or changed but not reprocessed) with last good results
  // on disk, marked stale, until the operator retires it (survey.retired_tiles).
  std::int64_t merge_rows = 0;  // tile rows of the last merge_list()
  std::map<std::string, std::size_t> discovered;
  for (std::size_t i = 0; i < tiles.size(); ++i) discovered[tiles[i].name] = i;
  auto merge_list = [&]() {
    std::vector<MergeTile> m;
    auto st = db.tiles();
    merge_rows = 0;
    std::set<std::string> names;
    for (const auto& t : tiles) names.insert(t.name);
    for (const auto& [n, s] : st) names.insert(n);
    for (const auto& n : names) {
      if (cfg.retired_tiles.count(n)) continue;
      auto s = st.find(n);
      auto found = discovered.find(n);
      if (found != discovered.end() && s != st.end() && is_current(s->second, inputs_sha[found->second], cfg)) {
        m.push_back({n, s->second.components_sha256, s->second.centre_ra_deg, s->second.centre_dec_deg, false});
        merge_rows += s->second.rows;
        continue;
      }
      const auto rep = read_tile_report(cfg, n);
      if (rep && rep->ok) {
        m.push_back({n, rep->components_sha256, rep->centre_ra_deg, rep->centre_dec_deg, true});
        merge_rows += rep->rows;
      }
    }
    return m;
  };
  // Why a stale tile is stale, for the messages.
  auto stale_reason = [&](const std::string& n) -> std::string {
    auto found = discovered.find(n);
    if (found == discovered.end()) return "missing";
    if (!unreadable[found->second].empty()) return "unreadable";
    const auto st = db.tiles();
    auto s = st.find(n);
    if (s != st.end() && s->second.status == "failed") return "failed";
    return "not reprocessed";
  };

  // ---- Nothing to do? ------------------------------------------------------------
  if (pending.empty() && failures_now.empty()) {
    const auto ml = merge_list();
    const bool any_stale = std::any_of(ml.begin(), ml.end(), [](const MergeTile& t) { return t.stale; });
    const std::string fp = merge_fingerprint(cfg, ml);
    if (!any_stale && fp == db.get("merge_fingerprint") && fs::exists(catalogue_path(cfg), ec)) {
      log.write("run " + run_id + " nothing to do (" + std::to_string(tiles.size()) + " tiles up to date)",
                "\"event\":\"run\",\"run\":" + json_str(run_id) + ",\"outcome\":\"nothing_to_do\",\"tiles\":" +
                    std::to_string(tiles.size()));
      if (tty) std::cerr << "skerry survey: nothing to do (" << tiles.size() << " tiles up to date)\n";
      return up_to_date_exit;
    }
  }

  // The stage settings every tile run reads (rewritten only when they change).
  auto put_stage = [&](const std::map<std::string, std::string>& kv, const std::string& file, const std::string& cmd) {
    if (kv.empty()) return;
    const std::string ini = stage_ini(cfg, kv, cmd);
    const std::string p = (fs::path(cfg.output_root) / "stage" / file).string();
    std::ifstream in(p);
    std::ostringstream cur;
    cur << in.rdbuf();
    if (!in || cur.str() != ini) write_text_atomic(p, ini);
  };
  put_stage(cfg.extract, "extract.ini", "extract");
  put_stage(cfg.bands_stage, "bands.ini", "bands");

  log.write("run " + run_id + " start engine=" + cfg.engine + " tiles=" + std::to_string(tiles.size()) +
                " pending=" + std::to_string(pending.size()),
            "\"event\":\"run_start\",\"run\":" + json_str(run_id) + ",\"engine\":" + json_str(cfg.engine) +
                ",\"tiles\":" + std::to_string(tiles.size()) + ",\"pending\":" + std::to_string(pending.size()));

  std::mutex mu;
  std::size_t n_ok = 0, n_failed = 0;
  std::string usage_error;  // a tile run refused the stage settings: a bad configuration
  auto record = [&](const TileReport& r, const PendingTile* p) {
    std::lock_guard g(mu);
    StateRecord::TileState s;
    s.name = r.name;
    s.image = p ? p->tile.image : "";
    s.status = r.ok ? "ok" : "failed";
    s.inputs_sha256 = r.ok ? r.inputs_sha256 : "";
    s.config_sha256 = r.ok ? r.config_sha256 : "";
    s.tool_version = r.ok ? r.tool_version : "";
    s.components_sha256 = r.components_sha256;
    s.message = r.message;
    s.centre_ra_deg = r.centre_ra_deg;
    s.centre_dec_deg = r.centre_dec_deg;
    s.seconds = r.seconds;
    s.rows = r.rows;
    s.updated_utc = utc_now();
    db.begin();
    db.set_tile(s);
    db.commit();
    (r.ok ? n_ok : n_failed)++;
    if (!r.ok && r.exit_code == kExitUsage && usage_error.empty()) {
      usage_error = r.message;
      for (const std::string prefix : {"skerry extract: error: ", "skerry bands: error: "})
        if (usage_error.rfind(prefix, 0) == 0) usage_error = usage_error.substr(prefix.size());
    }
    const std::string reason = p ? p->reason : "unreadable";
    if (r.ok) {
      log.write("tile " + r.name + " ok " + fixed(r.seconds, 2) + " s components=" + std::to_string(r.rows) + " (" +
                    reason + ")",
                "\"event\":\"tile\",\"run\":" + json_str(run_id) + ",\"tile\":" + json_str(r.name) +
                    ",\"status\":\"ok\",\"seconds\":" + fixed(r.seconds, 3) + ",\"components\":" +
                    std::to_string(r.rows) + ",\"reason\":" + json_str(reason));
    } else {
      log.write("tile " + r.name + " failed " + fixed(r.seconds, 2) + " s exit=" + std::to_string(r.exit_code) + ": " +
                    r.message,
                "\"event\":\"tile\",\"run\":" + json_str(run_id) + ",\"tile\":" + json_str(r.name) +
                    ",\"status\":\"failed\",\"seconds\":" + fixed(r.seconds, 3) + ",\"exit_code\":" +
                    std::to_string(r.exit_code) + ",\"message\":" + json_str(r.message) + ",\"reason\":" +
                    json_str(reason));
    }
  };
  for (const auto& f : failures_now) record(f, nullptr);

  // ---- Run the pending tiles ------------------------------------------------------
  bool merged = false;
  std::vector<std::string> merge_failures;
  auto merge_done = [&](const MergeSummary& ms, const char* where) {
    db.begin();
    db.set("merge_fingerprint", ms.fingerprint);
    db.commit();
    merged = true;
    prune_merge_folders(cfg, merge_list(), ms.fingerprint);
    log.write("merge ok " + fixed(ms.seconds, 2) + " s (" + where + ") tiles=" + std::to_string(ms.tiles) + " rows=" +
                  std::to_string(ms.rows) + " of " + std::to_string(ms.input_rows) + " duplicates_removed=" +
                  std::to_string(ms.duplicates_removed) + " rescued=" + std::to_string(ms.rescued) + " stale_rows=" +
                  std::to_string(ms.stale_rows) + " residual_duplicate_pairs=" +
                  std::to_string(ms.residual_duplicate_pairs) + " partitions=" + std::to_string(ms.partitions),
              "\"event\":\"merge\",\"run\":" + json_str(run_id) + ",\"where\":" + json_str(where) + ",\"seconds\":" +
                  fixed(ms.seconds, 3) + ",\"tiles\":" + std::to_string(ms.tiles) + ",\"rows\":" +
                  std::to_string(ms.rows) + ",\"input_rows\":" + std::to_string(ms.input_rows) +
                  ",\"duplicates_removed\":" + std::to_string(ms.duplicates_removed) + ",\"rescued\":" +
                  std::to_string(ms.rescued) + ",\"stale_rows\":" + std::to_string(ms.stale_rows) +
                  ",\"residual_duplicate_pairs\":" + std::to_string(ms.residual_duplicate_pairs) +
                  ",\"partitions\":" + std::to_string(ms.partitions));
  };
  auto merge_needed = [&] {
    return merge_fingerprint(cfg, merge_list()) != db.get("merge_fingerprint") || !fs::exists(catalogue_path(cfg), ec);
  };
  if (cfg.engine == "local") {
    if (!pending.empty()) {
      Progress prog("survey tiles", pending.size());
      std::atomic<std::size_t> next{0};
      std::vector<std::thread> pool;
      const std::size_t nw = std::min<std::size_t>(static_cast<std::size_t>(cfg.workers), pending.size());
      for (std::size_t w = 0; w < nw; ++w) {
        pool.emplace_back([&] {
          for (std::size_t i; (i = next++) < pending.size();) {
            const TileReport r = process_tile(cfg, pending[i].tile, pending[i].inputs_sha256, run_id);
            record(r, &pending[i]);
            prog.advance();
          }
        });
      }
      for (auto& th : pool) th.join();
      prog.finish();
    }
  } else if (!pending.empty() || merge_needed()) {
    // Slurm: tile array (if any tile is pending), then the merge chain: plan
    // job, partition-merge array, concatenation job.
    Progress prog("survey tiles", pending.size());
    ProgressCtx pc{&prog};
    std::string run_dir;
    db.set("slurm_run_dir", (fs::path(cfg.output_root) / "slurm" / run_id).string());
    // The tiles that stay as they are (the plan job adds each pending tile: its
    // new results, or its last good ones marked stale when it fails).
    std::set<std::string> pending_names;
    for (const auto& p : pending) pending_names.insert(p.tile.name);
    std::vector<MergeTile> keep;
    for (const auto& t : merge_list())
      if (!pending_names.count(t.name)) keep.push_back(t);
    auto reports = run_slurm(cfg, pending, keep, run_id, &slurm_progress, &pc, &run_dir, &merge_failures);
    db.set("slurm_run_dir", "");
    for (std::size_t i = 0; i < reports.size(); ++i) record(reports[i], &pending[i]);
    prog.finish();
    // Accept the concatenation job's catalogue only if it merged exactly what we would.
    auto ms = read_merge_summary(cfg);
    if (ms && ms->fingerprint == merge_fingerprint(cfg, merge_list()) && fs::exists(catalogue_path(cfg), ec)) {
      merge_failures.clear();
      merge_done(*ms, "slurm");
    } else if (merge_failures.empty()) {
      merge_failures.push_back("the Slurm merge of " + run_dir + " wrote no catalogue for this run's tiles; see its logs");
    }
  }

  if (!usage_error.empty()) {
    log.write("run " + run_id + " end exit=2: skerry extract refused the stage settings: " + usage_error,
              "\"event\":\"run_end\",\"run\":" + json_str(run_id) + ",\"exit_code\":2,\"message\":" +
                  json_str(usage_error));
    throw UsageError(cfg.config_path + ": skerry extract refused the stage settings: " + usage_error);
  }

  // ---- Merge (local engine) --------------------------------------------------------------
  if (cfg.engine == "local" && merge_needed()) {
    const auto mt = merge_list();
    ThreadLimit tl(cfg.workers);
    try {
      if (merge_rows <= cfg.merge_in_memory_rows) {
        merge_done(merge_tiles(cfg, mt), "local");
      } else if (auto ms = merge_tiles_on_disk(cfg, mt, merge_failures)) {
        merge_done(*ms, "local");
      }
    } catch (const OutputError& e) {
      // Disk full (or a file-size limit) at the catalogue: the message also
      // names the tiles that failed in this run (often for the same reason).
      std::string failed;
      for (const auto& [n, s] : db.tiles())
        if (s.status == "failed" && discovered.count(n)) failed += (failed.empty() ? "" : ", ") + n;
      log.write("run " + run_id + " end exit=4: " + e.what(), "\"event\":\"run_end\",\"run\":" + json_str(run_id) +
                                                          ",\"exit_code\":4,\"message\":" + json_str(e.what()));
      if (failed.empty()) throw;
      throw ExitError(kExitOutput, std::string("error: ") + e.what() + "; tiles that failed in this run: " + failed);
    }
  }
  for (const auto& f : merge_failures)
    log.write(f + " (retried on the next run)",
              "\"event\":\"merge_failed\",\"run\":" + json_str(run_id) + ",\"message\":" + json_str(f));

  const double secs = std::chrono::duration<double>(std::chrono::steady_clock::now() - t_start).count();
  // Stale tiles: kept from their last good results, never silently.
  std::vector<std::string> stale;
  for (const auto& t : merge_list())
    if (t.stale) stale.push_back(t.name + " (" + stale_reason(t.name) + ")");
  {
    std::string list;
    for (const auto& t : stale) list += (list.empty() ? "" : ",") + t;
    db.begin();
    db.set("stale_tiles", list);
    db.commit();
  }
  const int code = n_failed > 0 || !merge_failures.empty() || !stale.empty() ? kExitSomeFailed : kExitOk;
  log.write("run " + run_id + " end exit=" + std::to_string(code) + " processed=" + std::to_string(n_ok) +
                " failed=" + std::to_string(n_failed) + " stale=" + std::to_string(stale.size()) +
                (merge_failures.empty() ? "" : " merge=failed") + " " + fixed(secs, 2) + " s",
            "\"event\":\"run_end\",\"run\":" + json_str(run_id) + ",\"exit_code\":" + std::to_string(code) +
                ",\"processed\":" + std::to_string(n_ok) + ",\"failed\":" + std::to_string(n_failed) +
                ",\"stale\":" + std::to_string(stale.size()) + ",\"seconds\":" + fixed(secs, 3));
  const std::string see = "see " + (fs::path(cfg.output_root) / "survey.log").string();
  if (!merge_failures.empty()) {
    // Not quiet: cron mails these lines to whoever owns the job.
    std::cerr << "skerry survey: the merge did not complete (retried next run): " << merge_failures.front()
              << (merge_failures.size() > 1 ? " (and " + std::to_string(merge_failures.size() - 1) + " more; " + see + ")"
                                            : std::string())
              << "\n";
  }
  if (n_failed > 0 || !stale.empty()) {
    // One line naming the tiles: failures (retried next run) and stale tiles
    // (their last good rows kept in the catalogue, marked in merge_flags).
    std::string line = "skerry survey: ";
    if (n_failed > 0) {
      std::vector<std::string> names;
      for (const auto& [n, s] : db.tiles())
        if (s.status == "failed" && discovered.count(n) && (only.empty() || only.count(n))) names.push_back(n);
      std::string nl;
      for (const auto& n : names) nl += (nl.empty() ? "" : ", ") + n;
      line += std::to_string(n_failed) + " of " + std::to_string(n_ok + n_failed) + " tiles failed (" + nl +
              "; retried next run)";
    }
    if (!stale.empty()) {
      std::string sl;
      for (const auto& t : stale) sl += (sl.empty() ? "" : ", ") + t;
      line += std::string(n_failed > 0 ? "; " : "") + std::to_string(stale.size()) + " stale tile" +
              (stale.size() > 1 ? "s" : "") + " kept from last good results: " + sl +
              " (drop with survey.retired_tiles)";
    }
    std::cerr << line << "; " << see << "\n";
  } else if (merge_failures.empty() && tty) {
    std::cerr << "skerry survey: " << n_ok << " tiles processed, catalogue " << catalogue_path(cfg) << " ("
              << fixed(secs, 1) << " s)\n";
  }
  return code;
}

const CommandRegistrar reg{"survey", "incremental survey runs (cron, Slurm) and the merged survey catalogue",
                           &run_survey};

}  // namespace
}  // namespace skerry
