// `skerry survey --engine slurm`: a job array of tile tasks and a merge job that
// depends on it (afterok), submitted with sbatch and polled with squeue (not
// `sbatch --wait`, which holds a connection per job and reacts slowly).
//
// Tasks and the merge job write files only (per-tile results by atomic
// renames, the catalogue atomically); the controlling process reads them and
// writes the state record afterwards.
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <nlohmann/json.hpp>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <map>
#include <optional>
#include <set>
#include <sstream>
#include <thread>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "survey/engine.h"

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
              {"centre_dec_deg", t.centre_dec_deg}, {"stale", t.stale}};
}

}  // namespace

namespace {

/// squeue states of the given jobs, one entry per array element ("ID_N") or job.
/// Returns false when squeue failed for another reason than unknown ids.
bool squeue_states(const std::string& ids, std::map<std::string, std::string>& states, std::string& err) {
  std::string out;
  const int rc = capture({"squeue", "-h", "-r", "--states=all", "-j", ids, "-o", "%i|%T"}, out, err);
  if (rc != 0) return err.find("Invalid job id") != std::string::npos;
  std::istringstream ls(out);
  std::string line;
  while (std::getline(ls, line)) {
    const auto bar = line.find('|');
    if (bar != std::string::npos) states[line.substr(0, bar)] = line.substr(bar + 1);
  }
  return true;
}

std::vector<std::string> sbatch_common(const SurveyConfig& cfg) {
  std::vector<std::string> common;
  if (!cfg.slurm.partition.empty()) common.push_back("--partition=" + cfg.slurm.partition);
  if (!cfg.slurm.account.empty()) common.push_back("--account=" + cfg.slurm.account);
  std::istringstream ex(cfg.slurm.extra);
  std::string w;
  while (ex >> w) common.push_back(w);
  return common;
}

std::string sbatch(std::vector<std::string> a, const SurveyConfig& cfg, const std::string& script,
                   const std::string& what) {
  for (auto& c : sbatch_common(cfg)) a.push_back(c);
  a.push_back(script);
  a.insert(a.begin(), {"sbatch", "--parsable"});
  std::string out, err;
  const int rc = capture(a, out, err);
  if (rc != 0)
    throw ExitError(kExitInternal, "error: sbatch failed for the " + what + ": " + (err.empty() ? "exit " + std::to_string(rc) : err));
  return job_id_of(out, what);
}

std::string array_spec(std::size_t n, int max_parallel) {
  return "--array=0-" + std::to_string(n - 1) + (max_parallel > 0 ? "%" + std::to_string(max_parallel) : "");
}

std::optional<json> read_json_file(const fs::path& p) {
  std::ifstream in(p);
  if (!in) return std::nullopt;
  try {
    return json::parse(in);
  } catch (const std::exception&) {
    return std::nullopt;
  }
}

/// Every job id of a run folder: jobs.json (tile array, plan jobs) and
/// merge-jobs.json (partition array, concatenation job), as "ID,ID,...".
std::string run_job_ids(const fs::path& run_dir) {
  std::string ids;
  auto add = [&](const json& j, const char* k) {
    if (j.contains(k) && j[k].is_string() && !j[k].get<std::string>().empty())
      ids += (ids.empty() ? "" : ",") + j[k].get<std::string>();
  };
  if (auto j = read_json_file(run_dir / "jobs.json")) {
    add(*j, "array_job");
    add(*j, "merge_job");
    if (j->contains("plan_jobs"))
      for (const auto& p : j->at("plan_jobs")) ids += (ids.empty() ? "" : ",") + p.get<std::string>();
  }
  if (auto j = read_json_file(run_dir / "merge-jobs.json")) {
    add(*j, "partition_job");
    add(*j, "concat_job");
  }
  return ids;
}

}  // namespace

std::vector<TileReport> run_slurm(const SurveyConfig& cfg, const std::vector<PendingTile>& pending,
                                  const std::vector<MergeTile>& now, const std::string& run_id,
                                  void (*on_progress)(std::size_t, std::size_t, void*), void* ctx,
                                  std::string* run_dir_out, std::vector<std::string>* merge_failures) {
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
  auto script = [&](const std::string& file, const std::string& what, const std::string& args) {
    write_script((run_dir / file).string(), "#!/bin/sh\n# " + what + " of survey " + cfg.name + ".\nexec " + quote(exe) +
                                                " survey " + quote(cfg.config_path) + " " + args + " --run_dir " +
                                                quote(run_dir.string()) + "\n");
  };
  script("task.sh", "One tile (Slurm array task)", "--worker_task \"$SLURM_ARRAY_TASK_ID\"");
  script("merge.sh", "Merge plan: scatter what is left, submit the partition array and the concatenation (Slurm job)",
         "--merge_job");
  script("partition.sh", "One sky partition of the merge (Slurm array task)", "--partition_task \"$SLURM_ARRAY_TASK_ID\"");
  script("concat.sh", "Concatenation of the merged partitions into the catalogue (Slurm job)", "--concat_job");
  const std::string cpus = "--cpus-per-task=" + std::to_string(cfg.slurm.cpus_per_task);
  auto submit_plan = [&](const std::string& dependency) {
    std::vector<std::string> a{"--job-name=skerry-" + cfg.name + "-plan", "--output=" + (run_dir / "merge.log").string(),
                               "--open-mode=append", cpus, "--mem=" + cfg.slurm.mem, "--time=" + cfg.slurm.time};
    if (!dependency.empty()) {
      a.push_back("--dependency=afterok:" + dependency);
      a.push_back("--kill-on-invalid-dep=yes");
    }
    return sbatch(a, cfg, (run_dir / "merge.sh").string(), "merge plan job");
  };
  json jobs;
  std::string array_id;
  if (!pending.empty()) {
    array_id = sbatch({"--job-name=skerry-" + cfg.name, array_spec(pending.size(), cfg.slurm.max_parallel),
                       "--output=" + (run_dir / "task-%a.log").string(), cpus, "--mem=" + cfg.slurm.mem,
                       "--time=" + cfg.slurm.time},
                      cfg, (run_dir / "task.sh").string(), "tile array");
    jobs["array_job"] = array_id;
  }
  std::vector<std::string> plan_ids{submit_plan(array_id)};
  jobs["merge_job"] = plan_ids.back();
  jobs["plan_jobs"] = plan_ids;
  write_text_atomic((run_dir / "jobs.json").string(), jobs.dump(2) + "\n");

  // Poll squeue (one line per array element with -r) until nothing is active.
  std::map<std::string, std::string> state;
  auto poll = [&] {
    for (;;) {
      const std::string ids = run_job_ids(run_dir);
      std::map<std::string, std::string> st;
      std::string err;
      if (!squeue_states(ids, st, err)) throw ExitError(kExitInternal, "error: squeue failed: " + err);
      bool any_active = false;
      std::size_t done = 0;
      for (const auto& [id, s] : st) {
        state[id] = s;
        any_active |= active_state(s);
      }
      for (const auto& [id, s] : state)
        if (!array_id.empty() && id.rfind(array_id + "_", 0) == 0) done += !active_state(s);
      if (on_progress) on_progress(std::min(done, pending.size()), pending.size(), ctx);
      if (!any_active) {
        // The plan job writes merge-jobs.json before it ends: read once more.
        if (run_job_ids(run_dir) == ids) break;
        continue;
      }
      std::this_thread::sleep_for(std::chrono::duration<double>(cfg.slurm.poll_seconds));
    }
  };
  poll();
  std::error_code ec;
  if (!pending.empty() && !fs::exists(run_dir / "merge-jobs.json", ec)) {
    // Some tile task failed, so the afterok plan job never ran: merge the
    // tiles that succeeded (and the current ones) with a plan job of its own.
    plan_ids.push_back(submit_plan(""));
    jobs["merge_job"] = plan_ids.back();
    jobs["plan_jobs"] = plan_ids;
    write_text_atomic((run_dir / "jobs.json").string(), jobs.dump(2) + "\n");
    poll();
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
    const auto st = state.find(array_id + "_" + std::to_string(i));
    r.message = "Slurm task " + array_id + "_" + std::to_string(i) + " ended " +
                (st == state.end() ? std::string("(state unknown)") : st->second) +
                " without a report; see " + (run_dir / ("task-" + std::to_string(i) + ".log")).string();
    r.run_id = run_id;
    reports.push_back(r);
  }

  // What of the merge did not happen (the controller decides from the summary's
  // fingerprint whether the catalogue is the right one).
  if (merge_failures) {
    auto mj = read_json_file(run_dir / "merge-jobs.json");
    auto mp = read_json_file(run_dir / "merge-plan.json");
    if (!mj || !mp) {
      const auto st = state.find(plan_ids.back());
      merge_failures->push_back("Slurm merge plan job " + plan_ids.back() + " ended " +
                                (st == state.end() ? std::string("(state unknown)") : st->second) +
                                " without submitting the merge; see " + (run_dir / "merge.log").string());
    } else {
      const std::string part_id = mj->value("partition_job", std::string());
      const MergePlan plan = read_merge_plan(mp->at("plan_dir").get<std::string>());
      const auto todo = mp->at("todo").get<std::vector<std::int64_t>>();
      for (std::size_t i = 0; i < todo.size(); ++i) {
        if (partition_done(plan, todo[i])) continue;
        const auto st = state.find(part_id + "_" + std::to_string(i));
        merge_failures->push_back("merge partition " + std::to_string(todo[i]) + " (Slurm task " + part_id + "_" +
                                  std::to_string(i) + ") ended " +
                                  (st == state.end() ? std::string("(state unknown)") : st->second) +
                                  " without a result; see " +
                                  (run_dir / ("partition-" + std::to_string(i) + ".log")).string());
      }
    }
  }
  return reports;
}

std::string slurm_jobs_active(const std::string& run_dir) {
  const std::string ids = run_job_ids(run_dir);
  if (ids.empty()) return "";
  std::map<std::string, std::string> st;
  std::string err;
  if (!squeue_states(ids, st, err)) return "";
  for (const auto& [id, s] : st)
    if (active_state(s)) return ids;
  return "";
}

int slurm_worker_task(const SurveyConfig& cfg, const std::string& run_dir, int task) {
  std::ifstream in(fs::path(run_dir) / "tasks.json");
  if (!in) throw InputError((fs::path(run_dir) / "tasks.json").string(), "cannot open the task list");
  json j = json::parse(in);
  const auto& tasks = j.at("tasks");
  if (task < 0 || static_cast<std::size_t>(task) >= tasks.size())
    throw UsageError("--worker_task " + std::to_string(task) + " is outside the task list of " + run_dir);
  const auto& t = tasks[static_cast<std::size_t>(task)];
  TileInput tile{t.at("name").get<std::string>(), t.at("image").get<std::string>()};
  const char* job = std::getenv("SLURM_ARRAY_JOB_ID");
  std::cout << "skerry survey task " << task << " of job " << (job ? job : "?") << ": tile " << tile.name << "\n"
            << std::flush;
  const TileReport r = process_tile(cfg, tile, t.at("inputs_sha256").get<std::string>(), j.at("run_id").get<std::string>());
  std::cout << "tile " << tile.name << (r.ok ? " ok " : " failed ") << r.seconds << " s"
            << (r.ok ? "" : ": " + r.message) << "\n";
  if (r.ok) {
    // Step (a) of the merge for this tile, while its results are fresh on this node.
    try {
      ensure_scatter(cfg, {r.name, r.components_sha256, r.centre_ra_deg, r.centre_dec_deg, false});
    } catch (const std::exception& e) {
      std::cout << "scatter of tile " << tile.name << " failed (the plan job redoes it): " << e.what() << "\n";
    }
  }
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
                     c.at("centre_ra_deg").get<double>(), c.at("centre_dec_deg").get<double>(),
                     c.at("stale").get<bool>()});
  for (const auto& t : j.at("tasks")) {
    auto r = read_tile_report(cfg, t.at("name").get<std::string>());
    if (r && r->ok && r->run_id == run_id && r->inputs_sha256 == t.at("inputs_sha256").get<std::string>() &&
        r->config_sha256 == cfg.config_sha256 && r->tool_version == tool_version())
      tiles.push_back({r->name, r->components_sha256, r->centre_ra_deg, r->centre_dec_deg, false});
    else if (r && r->ok)  // failed in this run: its last good results, marked stale (as the controller does)
      tiles.push_back({r->name, r->components_sha256, r->centre_ra_deg, r->centre_dec_deg, true});
  }
  const auto t0 = std::chrono::steady_clock::now();
  for (const auto& t : tiles) ensure_scatter(cfg, t);  // normally done by the tile tasks already
  const MergePlan plan = plan_merge(cfg, tiles);
  std::vector<std::int64_t> todo;
  for (auto px : plan.partitions)
    if (!partition_done(plan, px)) todo.push_back(px);
  write_text_atomic((fs::path(run_dir) / "merge-plan.json").string(),
                    json{{"plan_dir", plan.dir}, {"fingerprint", plan.fingerprint}, {"todo", todo}}.dump(2) + "\n");
  const std::string cpus = "--cpus-per-task=" + std::to_string(cfg.slurm.cpus_per_task);
  std::string part_id;
  if (!todo.empty())
    part_id = sbatch({"--job-name=skerry-" + cfg.name + "-part", array_spec(todo.size(), cfg.slurm.max_parallel),
                      "--output=" + (fs::path(run_dir) / "partition-%a.log").string(), cpus,
                      "--mem=" + cfg.slurm.merge_mem, "--time=" + cfg.slurm.merge_time},
                     cfg, (fs::path(run_dir) / "partition.sh").string(), "partition array");
  std::vector<std::string> c{"--job-name=skerry-" + cfg.name + "-concat",
                             "--output=" + (fs::path(run_dir) / "concat.log").string(), cpus,
                             "--mem=" + cfg.slurm.merge_mem, "--time=" + cfg.slurm.merge_time};
  if (!part_id.empty()) {
    c.push_back("--dependency=afterok:" + part_id);
    c.push_back("--kill-on-invalid-dep=yes");
  }
  const std::string concat_id = sbatch(c, cfg, (fs::path(run_dir) / "concat.sh").string(), "concatenation job");
  write_text_atomic((fs::path(run_dir) / "merge-jobs.json").string(),
                    json{{"partition_job", part_id}, {"concat_job", concat_id}, {"partitions", todo}}.dump(2) + "\n");
  std::cout << "merge plan: " << tiles.size() << " tiles, " << plan.input_rows << " rows, " << plan.partitions.size()
            << " partitions (" << todo.size() << " to merge: job " << (part_id.empty() ? "none" : part_id)
            << "), concatenation job " << concat_id << ", "
            << std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count() << " s\n";
  return 0;
}

namespace {
/// Peak resident memory of this process image [MiB]: VmHWM of /proc/self/status
/// (the high-water mark of this address space since exec, unlike ru_maxrss,
/// which also counts the parent's pages a forked child started with).
long peak_rss_mib() {
  std::ifstream in("/proc/self/status");
  std::string line;
  while (std::getline(in, line))
    if (line.rfind("VmHWM:", 0) == 0) return std::atol(line.c_str() + 6) / 1024;
  struct rusage ru {};
  ::getrusage(RUSAGE_SELF, &ru);
  return ru.ru_maxrss / 1024;
}

MergePlan plan_of_run(const std::string& run_dir, std::vector<std::int64_t>* todo) {
  const fs::path p = fs::path(run_dir) / "merge-plan.json";
  auto j = read_json_file(p);
  if (!j) throw InputError(p.string(), "missing or unreadable");
  if (todo) *todo = j->at("todo").get<std::vector<std::int64_t>>();
  return read_merge_plan(j->at("plan_dir").get<std::string>());
}
}  // namespace

int slurm_partition_task(const SurveyConfig& cfg, const std::string& run_dir, int task) {
  std::vector<std::int64_t> todo;
  const MergePlan plan = plan_of_run(run_dir, &todo);
  if (task < 0 || static_cast<std::size_t>(task) >= todo.size())
    throw UsageError("--partition_task " + std::to_string(task) + " is outside the partition list of " + run_dir);
  const std::int64_t px = todo[static_cast<std::size_t>(task)];
  const char* job = std::getenv("SLURM_ARRAY_JOB_ID");
  std::cout << "skerry survey partition task " << task << " of job " << (job ? job : "?") << ": partition " << px
            << "\n" << std::flush;
  const auto t0 = std::chrono::steady_clock::now();
  const std::size_t members = merge_one_partition(cfg, plan, px);
  std::cout << "partition " << px << " ok: " << members << " member rows, "
            << std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count() << " s, peak RSS "
            << peak_rss_mib() << " MiB\n";
  return 0;
}

int slurm_concat_job(const SurveyConfig& cfg, const std::string& run_dir) {
  const MergePlan plan = plan_of_run(run_dir, nullptr);
  const MergeSummary s = concatenate_partitions(cfg, plan);
  std::cout << "merge: " << s.tiles << " tiles, " << s.rows << " rows of " << s.input_rows << ", " << s.partitions
            << " partitions, " << s.residual_duplicate_pairs << " residual duplicate pairs, " << s.seconds
            << " s, peak RSS " << peak_rss_mib() << " MiB\n";
  return 0;
}

}  // namespace skerry::surveyrun
