// `skerry survey --engine slurm`: a job array of tile tasks and a merge job that
// depends on it (afterok), submitted with sbatch and polled with squeue (not
// `sbatch --wait`, which holds a connection per job and reacts slowly).
//
// Tasks and the merge job write files only (per-tile results by atomic
// renames, the catalogue atomically); the controlling process reads them and
// writes the state record afterwards.
#include <sys/wait.h>
#include <unistd.h>

#include <nlohmann/json.hpp>

#include <chrono>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <map>
#include <set>
#include <sstream>
#include <thread>

#include "errors.h"
#include "io/atomic_file.h"
#include "survey_engine.h"

namespace skerry::surveyrun {

namespace fs = std::filesystem;
using nlohmann::json;

namespace {

std::string quote(const std::string& s) {
  std::string out = "'";
  for (char c : s) {
    if (c == '\'') out += "'\\''";
    else out += c;
  }
  return out + "'";
}

/// Runs a command (argv, no shell), returns (exit code, stdout). stderr is kept
/// for the message when the command fails.
int capture(const std::vector<std::string>& args, std::string& out, std::string& err) {
  std::string cmd;
  for (const auto& a : args) cmd += quote(a) + " ";
  const std::string errfile = fs::temp_directory_path() / ("skerry-survey-" + std::to_string(::getpid()) + ".err");
  cmd += "2>" + quote(errfile);
  FILE* p = ::popen(cmd.c_str(), "r");
  if (!p) return 127;
  out.clear();
  char buf[4096];
  std::size_t n;
  while ((n = std::fread(buf, 1, sizeof buf, p)) > 0) out.append(buf, n);
  const int st = ::pclose(p);
  std::ifstream e(errfile);
  std::ostringstream es;
  es << e.rdbuf();
  err = es.str();
  while (!err.empty() && (err.back() == '\n' || err.back() == '\r')) err.pop_back();
  std::error_code ec;
  fs::remove(errfile, ec);
  return WIFEXITED(st) ? WEXITSTATUS(st) : 128;
}

std::string self_exe() { return fs::read_symlink("/proc/self/exe").string(); }

std::string job_id_of(const std::string& parsable, const std::string& what) {
  std::string id = parsable.substr(0, parsable.find_first_of(";\n"));
  if (id.empty() || id.find_first_not_of("0123456789") != std::string::npos)
    throw ExitError(kExitInternal, "error: sbatch gave no job id for the " + what + " (output: '" + parsable + "')");
  return id;
}

bool active_state(const std::string& s) {
  static const std::set<std::string> active{"PENDING", "RUNNING", "CONFIGURING", "COMPLETING", "SUSPENDED",
                                            "REQUEUED", "REQUEUE_HOLD", "REQUEUE_FED", "RESIZING", "SIGNALING",
                                            "STAGE_OUT"};
  return active.count(s) > 0;
}

void write_script(const std::string& path, const std::string& body) {
  write_text_atomic(path, body);
  fs::permissions(path, fs::perms::owner_all | fs::perms::group_read | fs::perms::group_exec |
                            fs::perms::others_read | fs::perms::others_exec);
}

json merge_tile_json(const MergeTile& t) {
  return json{{"name", t.name}, {"components_sha256", t.components_sha256}, {"centre_ra_deg", t.centre_ra_deg},
              {"centre_dec_deg", t.centre_dec_deg}};
}

}  // namespace

std::vector<TileReport> run_slurm(const SurveyConfig& cfg, const std::vector<PendingTile>& pending,
                                  const std::vector<MergeTile>& now, const std::string& run_id,
                                  void (*on_progress)(std::size_t, std::size_t, void*), void* ctx,
                                  std::string* run_dir_out) {
  const fs::path run_dir = fs::path(cfg.output_root) / "slurm" / run_id;
  fs::create_directories(run_dir);
  if (run_dir_out) *run_dir_out = run_dir.string();
  // Task list and merge input.
  json tasks = json::array();
  for (const auto& p : pending)
    tasks.push_back({{"name", p.tile.name}, {"image", p.tile.image}, {"inputs_sha256", p.inputs_sha256}});
  json mi;
  mi["run_id"] = run_id;
  mi["tasks"] = tasks;
  mi["current"] = json::array();
  for (const auto& t : now) mi["current"].push_back(merge_tile_json(t));
  write_text_atomic((run_dir / "tasks.json").string(), mi.dump(2) + "\n");
  const std::string exe = self_exe();
  write_script((run_dir / "task.sh").string(),
               "#!/bin/sh\n# One tile of survey " + cfg.name + " (Slurm array task).\nexec " + quote(exe) +
                   " survey " + quote(cfg.config_path) + " --worker-task \"$SLURM_ARRAY_TASK_ID\" --run-dir " +
                   quote(run_dir.string()) + "\n");
  write_script((run_dir / "merge.sh").string(), "#!/bin/sh\n# Merge of survey " + cfg.name + " (Slurm job).\nexec " +
                                                    quote(exe) + " survey " + quote(cfg.config_path) +
                                                    " --merge-job --run-dir " + quote(run_dir.string()) + "\n");
  std::vector<std::string> common;
  if (!cfg.slurm.partition.empty()) common.push_back("--partition=" + cfg.slurm.partition);
  if (!cfg.slurm.account.empty()) common.push_back("--account=" + cfg.slurm.account);
  {
    std::istringstream ex(cfg.slurm.extra);
    std::string w;
    while (ex >> w) common.push_back(w);
  }
  std::string out, err;
  std::vector<std::string> a{"sbatch", "--parsable", "--job-name=skerry-" + cfg.name,
                             "--array=0-" + std::to_string(pending.size() - 1) +
                                 (cfg.slurm.max_parallel > 0 ? "%" + std::to_string(cfg.slurm.max_parallel) : ""),
                             "--output=" + (run_dir / "task-%a.log").string(),
                             "--cpus-per-task=" + std::to_string(cfg.slurm.cpus_per_task), "--mem=" + cfg.slurm.mem,
                             "--time=" + cfg.slurm.time};
  a.insert(a.end(), common.begin(), common.end());
  a.push_back((run_dir / "task.sh").string());
  int rc = capture(a, out, err);
  if (rc != 0) throw ExitError(kExitInternal, "error: sbatch failed for the tile array: " + (err.empty() ? "exit " + std::to_string(rc) : err));
  const std::string array_id = job_id_of(out, "tile array");
  std::vector<std::string> m{"sbatch", "--parsable", "--job-name=skerry-" + cfg.name + "-merge",
                             "--dependency=afterok:" + array_id, "--kill-on-invalid-dep=yes",
                             "--output=" + (run_dir / "merge.log").string(),
                             "--cpus-per-task=" + std::to_string(cfg.slurm.cpus_per_task),
                             "--mem=" + cfg.slurm.merge_mem, "--time=" + cfg.slurm.merge_time};
  m.insert(m.end(), common.begin(), common.end());
  m.push_back((run_dir / "merge.sh").string());
  rc = capture(m, out, err);
  if (rc != 0) throw ExitError(kExitInternal, "error: sbatch failed for the merge job: " + (err.empty() ? "exit " + std::to_string(rc) : err));
  const std::string merge_id = job_id_of(out, "merge job");
  write_text_atomic((run_dir / "jobs.json").string(),
                    json{{"array_job", array_id}, {"merge_job", merge_id}}.dump(2) + "\n");

  // Poll squeue (one line per array element with -r) until nothing is active.
  std::map<int, std::string> task_state;
  for (;;) {
    rc = capture({"squeue", "-h", "-r", "--states=all", "-j", array_id + "," + merge_id, "-o", "%i|%T"}, out, err);
    bool any_active = false;
    std::size_t done = 0;
    if (rc == 0) {
      std::istringstream ls(out);
      std::string line;
      while (std::getline(ls, line)) {
        const auto bar = line.find('|');
        if (bar == std::string::npos) continue;
        const std::string id = line.substr(0, bar), st = line.substr(bar + 1);
        if (active_state(st)) any_active = true;
        const auto us = id.find('_');
        if (us != std::string::npos && id.substr(0, us) == array_id) {
          const std::string idx = id.substr(us + 1);
          if (!idx.empty() && idx.find_first_not_of("0123456789") == std::string::npos) {
            task_state[std::stoi(idx)] = st;
          }
        }
      }
      for (const auto& [i, st] : task_state) done += !active_state(st);
    } else if (err.find("Invalid job id") == std::string::npos) {
      throw ExitError(kExitInternal, "error: squeue failed: " + err);
    }
    if (on_progress) on_progress(done, pending.size(), ctx);
    if (!any_active) break;
    std::this_thread::sleep_for(std::chrono::duration<double>(cfg.slurm.poll_seconds));
  }

  std::vector<TileReport> reports;
  for (std::size_t i = 0; i < pending.size(); ++i) {
    const auto& p = pending[i];
    auto ok = read_tile_report(cfg, p.tile.name);
    if (ok && ok->ok && ok->run_id == run_id && ok->inputs_sha256 == p.inputs_sha256 &&
        ok->config_sha256 == cfg.config_sha256 && ok->tool_version == tool_version()) {
      reports.push_back(*ok);
      continue;
    }
    auto bad = read_failure_report(cfg, p.tile.name);
    if (bad && bad->run_id == run_id) {
      reports.push_back(*bad);
      continue;
    }
    TileReport r;
    r.name = p.tile.name;
    r.ok = false;
    r.exit_code = kExitInternal;
    const auto st = task_state.find(static_cast<int>(i));
    r.message = "Slurm task " + array_id + "_" + std::to_string(i) + " ended " +
                (st == task_state.end() ? std::string("(state unknown)") : st->second) +
                " without a report; see " + (run_dir / ("task-" + std::to_string(i) + ".log")).string();
    r.run_id = run_id;
    reports.push_back(r);
  }
  return reports;
}

std::string slurm_jobs_active(const std::string& run_dir) {
  std::ifstream in(fs::path(run_dir) / "jobs.json");
  if (!in) return "";
  std::string ids;
  try {
    json j = json::parse(in);
    ids = j.at("array_job").get<std::string>() + "," + j.at("merge_job").get<std::string>();
  } catch (const std::exception&) {
    return "";
  }
  std::string out, err;
  if (capture({"squeue", "-h", "-r", "--states=all", "-j", ids, "-o", "%i|%T"}, out, err) != 0) return "";
  std::istringstream ls(out);
  std::string line;
  while (std::getline(ls, line)) {
    const auto bar = line.find('|');
    if (bar != std::string::npos && active_state(line.substr(bar + 1))) return ids;
  }
  return "";
}

int slurm_worker_task(const SurveyConfig& cfg, const std::string& run_dir, int task) {
  std::ifstream in(fs::path(run_dir) / "tasks.json");
  if (!in) throw InputError((fs::path(run_dir) / "tasks.json").string(), "cannot open the task list");
  json j = json::parse(in);
  const auto& tasks = j.at("tasks");
  if (task < 0 || static_cast<std::size_t>(task) >= tasks.size())
    throw UsageError("--worker-task " + std::to_string(task) + " is outside the task list of " + run_dir);
  const auto& t = tasks[static_cast<std::size_t>(task)];
  TileInput tile{t.at("name").get<std::string>(), t.at("image").get<std::string>()};
  const char* job = std::getenv("SLURM_ARRAY_JOB_ID");
  std::cout << "skerry survey task " << task << " of job " << (job ? job : "?") << ": tile " << tile.name << "\n"
            << std::flush;
  const TileReport r = process_tile(cfg, tile, t.at("inputs_sha256").get<std::string>(), j.at("run_id").get<std::string>());
  std::cout << "tile " << tile.name << (r.ok ? " ok " : " failed ") << r.seconds << " s"
            << (r.ok ? "" : ": " + r.message) << "\n";
  return r.ok ? 0 : (r.exit_code > 0 && r.exit_code < 126 ? r.exit_code : 1);
}

int slurm_merge_job(const SurveyConfig& cfg, const std::string& run_dir) {
  std::ifstream in(fs::path(run_dir) / "tasks.json");
  if (!in) throw InputError((fs::path(run_dir) / "tasks.json").string(), "cannot open the task list");
  json j = json::parse(in);
  const std::string run_id = j.at("run_id").get<std::string>();
  std::vector<MergeTile> tiles;
  for (const auto& c : j.at("current"))
    tiles.push_back({c.at("name").get<std::string>(), c.at("components_sha256").get<std::string>(),
                     c.at("centre_ra_deg").get<double>(), c.at("centre_dec_deg").get<double>()});
  for (const auto& t : j.at("tasks")) {
    auto r = read_tile_report(cfg, t.at("name").get<std::string>());
    if (r && r->ok && r->run_id == run_id && r->inputs_sha256 == t.at("inputs_sha256").get<std::string>() &&
        r->config_sha256 == cfg.config_sha256 && r->tool_version == tool_version())
      tiles.push_back({r->name, r->components_sha256, r->centre_ra_deg, r->centre_dec_deg});
  }
  const MergeSummary s = merge_tiles(cfg, tiles);
  std::cout << "merge: " << s.tiles << " tiles, " << s.rows << " rows of " << s.input_rows << ", "
            << s.residual_duplicate_pairs << " residual duplicate pairs, " << s.seconds << " s\n";
  return 0;
}

}  // namespace skerry::surveyrun
