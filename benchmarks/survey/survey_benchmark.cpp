// Survey benchmark (prints figures; not a test).
//
//  1. Merge of N synthetic components (default 10^6) from an 8 x 8 grid of
//     overlapping tiles: wall time and peak RSS, 1 and 2 threads, two partition
//     orders (the result must be the same: checked and printed).
//  2. The on-disk merge (scatter -> partitions -> concatenation) of N synthetic
//     components (default 10^6) with the 36 columns of `skerry extract`'s
//     component table, as 64 tile result folders: wall time of each step on 2
//     threads against the in-memory merge of the same tiles (the catalogues
//     must be byte-identical: checked and printed), and, per partition, the
//     wall time and peak RSS of a separate `skerry survey --partition_task`
//     process (the Slurm task), and of the `--concat_job` process.
//  3. A survey of T simulated tiles (default 64 of 2048 x 2048 pixels, 8 x 8
//     grid, overlapping by about 10 %): `skerry survey` cold run, unchanged rerun,
//     tiles per minute, merge time (from the merge summary), peak RSS of the
//     largest process, on W workers (default 2).
//
// usage: bench_survey [--merge-rows N] [--tiles T] [--size PIX] [--workers W]
//                     [--work DIR] [--disk-order K] [--skip-survey] [--skip-merge]
//                     [--skip-disk-merge]
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <oneapi/tbb/global_control.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <tuple>
#include <utility>
#include <vector>

#include <nlohmann/json.hpp>

#include "io/table_io.h"
#include "app/options.h"
#include "app/run_record.h"
#include "skerry/survey.h"
#include "survey/engine.h"

namespace fs = std::filesystem;
using namespace skerry::survey;

namespace {

double now_s() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}
long self_maxrss_mb() {
  rusage u{};
  getrusage(RUSAGE_SELF, &u);
  return u.ru_maxrss / 1024;
}
long children_maxrss_mb() {
  rusage u{};
  getrusage(RUSAGE_CHILDREN, &u);
  return u.ru_maxrss / 1024;
}

int run(const std::vector<std::string>& args, const std::string& log) {
  std::vector<std::string> full{SKERRY_BINARY};
  full.insert(full.end(), args.begin(), args.end());
  std::vector<char*> argv;
  for (auto& a : full) argv.push_back(a.data());
  argv.push_back(nullptr);
  std::fflush(stdout);  // else the child inherits and re-prints buffered output
  pid_t pid = fork();
  if (pid == 0) {
    FILE* f = std::freopen(log.c_str(), "a", stdout);
    (void)f;
    dup2(1, 2);
    execv(argv[0], argv.data());
    _exit(127);
  }
  int st = 0;
  waitpid(pid, &st, 0);
  return WIFEXITED(st) ? WEXITSTATUS(st) : 128;
}

constexpr double kPi = 3.14159265358979323846;

void bench_merge(std::size_t n_rows) {
  // 8 x 8 tiles of radius 0.45 deg, centres 0.8 deg apart: each source inside
  // 1..4 tiles, so the merge reads about 1.6 rows per source.
  std::vector<SkyPoint> centres;
  const double dec0 = -38.6;
  for (int j = 0; j < 8; ++j)
    for (int i = 0; i < 8; ++i)
      centres.push_back({201.25 + (i - 3.5) * 0.8 / std::cos(dec0 * kPi / 180), dec0 + (j - 3.5) * 0.8});
  std::mt19937_64 rng(42);
  std::uniform_real_distribution<double> u(-1.0, 1.0);
  std::normal_distribution<double> jit(0.0, 0.3 / 3600);
  std::vector<TileComponent> comps;
  std::vector<std::int64_t> rows(centres.size(), 0);
  while (comps.size() < n_rows) {
    const double dec = dec0 + 3.4 * u(rng);
    const double ra = 201.25 + 3.4 * u(rng) / std::cos(dec * kPi / 180);
    for (std::size_t t = 0; t < centres.size() && comps.size() < n_rows; ++t) {
      const double dra = (ra - centres[t].ra_deg) * std::cos(dec * kPi / 180), ddec = dec - centres[t].dec_deg;
      if (dra * dra + ddec * ddec > 0.45 * 0.45) continue;
      comps.push_back({ra + jit(rng) / std::cos(dec * kPi / 180), dec + jit(rng), static_cast<std::int32_t>(t), rows[t]++});
    }
  }
  std::printf("merge of %zu synthetic components from %zu tiles\n", comps.size(), centres.size());
  MergeResult first;
  for (int threads : {1, 2}) {
    for (int order : {4, 8}) {
      oneapi::tbb::global_control gc(oneapi::tbb::global_control::max_allowed_parallelism, threads);
      MergeOptions o;
      o.partition_order = order;
      const double t0 = now_s();
      MergeResult r = merge_components(comps, centres, o);
      const double dt = now_s() - t0;
      bool same = true;
      if (first.kept.empty()) first = r;
      else same = r.names == first.names && r.kept.size() == first.kept.size();
      std::printf("  threads %d, partition order %d: %.2f s (%.2f M rows/s), %zu partitions, kept %zu, duplicates removed %zu, "
                  "residual duplicate pairs %zu, name collisions %zu, same catalogue as first: %s\n",
                  threads, order, dt, static_cast<double>(comps.size()) / dt / 1e6, r.partitions, r.kept.size(),
                  r.duplicates_removed, r.residual_duplicate_pairs, r.name_collisions, same ? "yes" : "NO");
    }
  }
  std::printf("  peak RSS of the merge benchmark process: %ld MB\n", self_maxrss_mb());
}

/// Runs SKERRY_BINARY with `args` (output to `log`) and returns its wall time
/// [s] and peak RSS [MB] (wait4's rusage of that child alone).
std::pair<double, long> run_measured(const std::vector<std::string>& args, const std::string& log, int* code) {
  std::vector<std::string> full{SKERRY_BINARY};
  full.insert(full.end(), args.begin(), args.end());
  std::vector<char*> argv;
  for (auto& a : full) argv.push_back(a.data());
  argv.push_back(nullptr);
  std::fflush(stdout);
  const double t0 = now_s();
  pid_t pid = fork();
  if (pid == 0) {
    FILE* f = std::freopen(log.c_str(), "a", stdout);
    (void)f;
    dup2(1, 2);
    execv(argv[0], argv.data());
    _exit(127);
  }
  int st = 0;
  rusage u{};
  wait4(pid, &st, 0, &u);
  *code = WIFEXITED(st) ? WEXITSTATUS(st) : 128;
  return {now_s() - t0, u.ru_maxrss / 1024};
}

/// The figure N of the last "peak RSS N MiB" in `log` (the task's own VmHWM),
/// or -1.
long last_peak_rss(const std::string& log) {
  std::ifstream in(log);
  std::string line;
  long v = -1;
  while (std::getline(in, line)) {
    const auto p = line.rfind("peak RSS ");
    if (p != std::string::npos) v = std::atol(line.c_str() + p + 9);
  }
  return v;
}

void bench_disk_merge(std::size_t n_rows, int order, const std::string& work_root) {
  namespace sr = skerry::surveyrun;
  using nlohmann::json;
  const std::string work = work_root + "-disk";
  fs::remove_all(work);
  fs::create_directories(work + "/out/tiles");
  // The same sky as bench_merge: 8 x 8 tiles, 0.45 deg radius, 0.8 deg apart.
  std::vector<SkyPoint> centres;
  const double dec0 = -38.6;
  for (int j = 0; j < 8; ++j)
    for (int i = 0; i < 8; ++i)
      centres.push_back({201.25 + (i - 3.5) * 0.8 / std::cos(dec0 * kPi / 180), dec0 + (j - 3.5) * 0.8});
  std::mt19937_64 rng(42);
  std::uniform_real_distribution<double> u(-1.0, 1.0), pos(0.0, 1.0);
  std::normal_distribution<double> jit(0.0, 0.3 / 3600);
  std::vector<std::vector<std::pair<double, double>>> per_tile(centres.size());
  std::size_t n = 0;
  while (n < n_rows) {
    const double dec = dec0 + 3.4 * u(rng);
    const double ra = 201.25 + 3.4 * u(rng) / std::cos(dec * kPi / 180);
    for (std::size_t t = 0; t < centres.size() && n < n_rows; ++t) {
      const double dra = (ra - centres[t].ra_deg) * std::cos(dec * kPi / 180), ddec = dec - centres[t].dec_deg;
      if (dra * dra + ddec * ddec > 0.45 * 0.45) continue;
      per_tile[t].push_back({ra + jit(rng) / std::cos(dec * kPi / 180), dec + jit(rng)});
      ++n;
    }
  }
  const std::vector<std::string> ints{"component_id", "island_id", "component", "source_id", "resolved", "flags", "info_bits"};
  const std::vector<std::string> floats{
      "ra_err_arcsec", "dec_err_arcsec", "x_pix1", "y_pix1", "s_peak_jy_per_beam", "s_peak_err_jy_per_beam",
      "s_int_jy", "s_int_err_jy", "maj_arcsec", "maj_err_arcsec", "min_arcsec", "min_err_arcsec", "pa_deg",
      "pa_err_deg", "intrinsic_maj_arcsec", "intrinsic_maj_err_arcsec", "intrinsic_min_arcsec", "intrinsic_min_err_arcsec", "intrinsic_pa_deg",
      "intrinsic_pa_err_deg", "background_jy_per_beam", "rms_jy_per_beam", "snr", "chi2_red", "pb",
      "s_peak_pbcor_jy_per_beam", "s_int_pbcor_jy", "s_int_pbcor_err_jy"};
  std::ofstream(work + "/survey.ini") << "[survey]\nname = bench\ntiles = none/*.fits\noutput = out\n"
                                         "catalogue = bench.components.csv\nmerge_in_memory_rows = 0\n"
                                         "partition_order = "
                                      << order << "\n";
  const sr::SurveyConfig cfg = sr::load_survey_config(work + "/survey.ini");
  std::vector<sr::MergeTile> tiles;
  double t0 = now_s();
  std::size_t csv_bytes = 0;
  for (std::size_t t = 0; t < centres.size(); ++t) {
    char name[32];
    std::snprintf(name, sizeof name, "tile_%02zu_%02zu", t / 8, t % 8);
    skerry::Table tab;
    const auto& rows = per_tile[t];
    std::vector<std::int64_t> id(rows.size());
    for (std::size_t i = 0; i < rows.size(); ++i) id[i] = static_cast<std::int64_t>(i + 1);
    for (const auto& c : ints) tab.add_i64(c, "", "", "", id);
    std::vector<double> ra(rows.size()), dec(rows.size());
    for (std::size_t i = 0; i < rows.size(); ++i) std::tie(ra[i], dec[i]) = rows[i];
    tab.add_f64("ra_deg", "deg", "", "", ra);
    tab.add_f64("dec_deg", "deg", "", "", dec);
    for (const auto& c : floats) {
      std::vector<double> v(rows.size());
      for (auto& x : v) x = pos(rng);
      tab.add_f64(c, "", "", "", v);
    }
    const std::string dir = work + "/out/tiles/" + name;
    fs::create_directories(dir);
    const std::string file = std::string(name) + ".components.csv";
    skerry::write_table(tab, dir + "/" + file);
    csv_bytes += fs::file_size(dir + "/" + file);
    const std::string sha = skerry::sha256_file(dir + "/" + file);
    json j{{"tile", name}, {"ok", true}, {"exit_code", 0}, {"message", ""}, {"inputs_sha256", ""},
           {"config_sha256", ""}, {"tool_version", sr::tool_version()}, {"components_file", file},
           {"components_sha256", sha}, {"rows", rows.size()}, {"centre_ra_deg", centres[t].ra_deg},
           {"centre_dec_deg", centres[t].dec_deg}, {"seconds", 0.0}, {"run_id", "bench"}};
    std::ofstream(dir + "/tile.json") << j.dump(2) << "\n";
    tiles.push_back({name, sha, centres[t].ra_deg, centres[t].dec_deg});
  }
  per_tile.clear();
  std::printf("on-disk merge of %zu synthetic components (36 columns, %.0f B per CSV row) from %zu tiles, "
              "partition order %d (writing the tiles: %.1f s)\n",
              n, static_cast<double>(csv_bytes) / static_cast<double>(n), tiles.size(), order, now_s() - t0);
  {
    skerry::ThreadLimit tl(2);
    // In-memory reference, in this process: in a forked child of this process
    // (which has run oneTBB loops already) oneTBB's loops run on one thread only.
    t0 = now_s();
    sr::merge_tiles(cfg, tiles);
    const double t_mem = now_s() - t0;
    const std::string ref = work + "/in-memory.csv";
    fs::rename(sr::catalogue_path(cfg), ref);
    rusage self{};
    getrusage(RUSAGE_SELF, &self);
    std::printf("  in-memory merge (this process, 2 threads): %.2f s; peak RSS of the process so far %ld MB\n", t_mem,
                self.ru_maxrss / 1024);
    t0 = now_s();
    for (const auto& t : tiles) sr::ensure_scatter(cfg, t);
    const double t_scatter1 = now_s() - t0;
    fs::remove_all(work + "/out/merge");
    t0 = now_s();
    std::vector<std::string> failed;
    auto ms = sr::merge_tiles_on_disk(cfg, tiles, failed);  // all three steps, 2 threads
    const double t_all = now_s() - t0;
    std::ifstream a(ref), b(sr::catalogue_path(cfg));
    std::stringstream sa, sb;
    sa << a.rdbuf();
    sb << b.rdbuf();
    std::printf("  scatter alone, one tile at a time: %.2f s (%.3f s per tile of %zu rows)\n", t_scatter1,
                t_scatter1 / static_cast<double>(tiles.size()), n / tiles.size());
    std::printf("  on-disk merge, 2 threads, all three steps: %.2f s; %zu partitions, %zu rows kept; byte-identical "
                "to the in-memory catalogue: %s (%zu bytes)\n",
                t_all, ms ? ms->partitions : 0, ms ? ms->rows : 0, ms && sa.str() == sb.str() ? "yes" : "NO",
                sb.str().size());
  }
  // Per partition, as a Slurm task would run it: a process of its own.
  const sr::MergePlan plan = sr::plan_merge(cfg, tiles);
  fs::remove_all(plan.dir);
  const sr::MergePlan plan2 = sr::plan_merge(cfg, tiles);
  const std::string run_dir = work + "/run";
  fs::create_directories(run_dir);
  std::ofstream(run_dir + "/merge-plan.json")
      << json{{"plan_dir", plan2.dir}, {"fingerprint", plan2.fingerprint}, {"todo", plan2.partitions}}.dump() << "\n";
  std::vector<double> secs, rows_per_s;
  std::vector<long> rss;
  std::vector<std::size_t> members;
  const std::string log = work + "/tasks.log";
  for (std::size_t i = 0; i < plan2.partitions.size(); ++i) {
    int code = 0;
    auto [dt, mb_fork] = run_measured({"survey", work + "/survey.ini", "--partition_task", std::to_string(i),
                                       "--run_dir", run_dir},
                                      log, &code);
    (void)mb_fork;  // includes the benchmark's own pages at the fork; the task's VmHWM is in its log
    const long mb = last_peak_rss(log);
    if (code != 0) {
      std::printf("  partition task %zu failed (see %s)\n", i, log.c_str());
      return;
    }
    std::ifstream pj(plan2.dir + "/p" + std::to_string(plan2.partitions[i]) + ".json");
    const json j = json::parse(pj);
    secs.push_back(dt);
    rss.push_back(mb);
    members.push_back(j.at("members").get<std::size_t>());
  }
  int code = 0;
  auto [cdt, cmb_fork] = run_measured({"survey", work + "/survey.ini", "--concat_job", "--run_dir", run_dir}, log, &code);
  (void)cmb_fork;
  const long cmb = last_peak_rss(log);
  std::size_t max_i = 0, sum_members = 0;
  double sum_s = 0;
  for (std::size_t i = 0; i < secs.size(); ++i) {
    if (members[i] > members[max_i]) max_i = i;
    sum_members += members[i];
    sum_s += secs[i];
  }
  long base = *std::min_element(rss.begin(), rss.end());
  std::printf("  partition tasks (one process each, 1 thread): %zu tasks, member rows %zu in all (%.3f per input "
              "row), largest %zu rows: %.2f s, %ld MB peak RSS; smallest task peak RSS %ld MB; all tasks %.1f s in "
              "sequence (%.0f member rows/s)\n",
              secs.size(), sum_members, static_cast<double>(sum_members) / static_cast<double>(n), members[max_i],
              secs[max_i], rss[max_i], base, sum_s, static_cast<double>(sum_members) / sum_s);
  if (members[max_i] > 0 && rss[max_i] > base)
    std::printf("  memory per member row of a partition task: %.0f B ((largest - smallest peak RSS) / largest rows)\n",
                static_cast<double>(rss[max_i] - base) * 1048576.0 / static_cast<double>(members[max_i]));
  std::printf("  concatenation job: %.2f s (exit %d), %ld MB peak RSS\n", cdt, code, cmb);
}

std::string json_number(const std::string& text, const std::string& key) {
  const auto p = text.find("\"" + key + "\"");
  if (p == std::string::npos) return "?";
  auto c = text.find(':', p);
  auto e = text.find_first_of(",\n}", c);
  return text.substr(c + 1, e - c - 1);
}

void bench_survey(int n_tiles, long size, int workers, const std::string& work) {
  fs::remove_all(work);
  fs::create_directories(work + "/tiles");
  const std::string log = work + "/bench.log";
  const int side = static_cast<int>(std::lround(std::sqrt(static_cast<double>(n_tiles))));
  const double pix_arcsec = 1.5;
  const double tile_deg = static_cast<double>(size) * pix_arcsec / 3600.0;
  const double step_deg = 0.9 * tile_deg;  // about 10 % overlap on each side
  const double dec0 = -38.6;
  std::printf("survey of %d simulated %ld x %ld tiles (%d x %d grid, %.3f deg apart, %.3f deg wide), %d workers\n",
              side * side, size, size, side, side, step_deg, tile_deg, workers);
  double t0 = now_s();
  for (int j = 0; j < side; ++j) {
    for (int i = 0; i < side; ++i) {
      const double dec = dec0 + (j - 0.5 * (side - 1)) * step_deg;
      const double ra = 201.25 + (i - 0.5 * (side - 1)) * step_deg / std::cos(dec * kPi / 180);
      char name[32];
      std::snprintf(name, sizeof name, "tile_%02d_%02d", j, i);
      const std::string d = work + "/sim/" + name;
      // Each tile is its own simulation (independent sky) at its own centre:
      // the overlaps hold the cell geometry, not common sources.
      const int rc = run({"simulate", "--out", d, "--seed", std::to_string(1000 + j * side + i), "--output.name", name,
                          "--bands.freq_mhz", "1400", "--bands.crpix_shift_pix", "0", "--field.size_pix",
                          std::to_string(size), "--field.ra_deg", std::to_string(ra), "--field.dec_deg",
                          std::to_string(dec), "--primary_beam.fwhm_deg", "0", "--sources.count",
                          std::to_string(size * size / 4000), "--threads", "2"},
                         log);
      if (rc != 0) {
        std::printf("simulate failed (see %s)\n", log.c_str());
        std::exit(1);
      }
      fs::rename(d + "/" + name + "_1400MHz.fits", work + "/tiles/" + name + ".fits");
    }
  }
  std::printf("  simulating the tiles: %.1f s (not part of the survey figures)\n", now_s() - t0);
  std::ofstream(work + "/survey.ini")
      << "[survey]\nname = bench\ntiles = tiles/*.fits\noutput = out\ncatalogue = bench.components.csv\nworkers = "
      << workers << "\n[output]\nformats = csv\nmodel = false\nresidual = false\n";
  t0 = now_s();
  int rc = run({"survey", work + "/survey.ini"}, log);
  const double cold = now_s() - t0;
  std::ifstream ms(work + "/out/bench.components.merge.json");
  std::stringstream mss;
  mss << ms.rdbuf();
  t0 = now_s();
  const int rc2 = run({"survey", work + "/survey.ini"}, log);
  const double rerun = now_s() - t0;
  fs::last_write_time(work + "/tiles/tile_00_00.fits", fs::file_time_type::clock::now());
  t0 = now_s();
  const int rc3 = run({"survey", work + "/survey.ini"}, log);
  const double touched = now_s() - t0;
  std::printf("  cold run: %.1f s (exit %d), %.1f tiles per minute\n", cold, rc, 60.0 * side * side / cold);
  std::printf("  merge: %s s, %s rows kept of %s, %s duplicates removed, %s residual duplicate pairs\n",
              json_number(mss.str(), "seconds").c_str(), json_number(mss.str(), "rows").c_str(),
              json_number(mss.str(), "input_rows").c_str(), json_number(mss.str(), "duplicates_removed").c_str(),
              json_number(mss.str(), "residual_duplicate_pairs").c_str());
  std::printf("  unchanged rerun: %.3f s (exit %d); after touching a tile: %.3f s (exit %d)\n", rerun, rc2, touched, rc3);
  std::printf("  peak RSS of the largest process (survey controller or one extract): %ld MB\n", children_maxrss_mb());
}

}  // namespace

int main(int argc, char** argv) {
  std::size_t merge_rows = 1000000;
  int tiles = 64, workers = 2;
  long size = 2048;
  std::string work = (fs::temp_directory_path() / "skerry-bench-survey").string();
  bool do_survey = true, do_merge = true, do_disk = true;
  int disk_order = 6;
  for (int i = 1; i < argc; ++i) {
    const std::string a = argv[i];
    auto next = [&]() -> std::string {
      if (i + 1 >= argc) {
        std::fprintf(stderr, "bench_survey: %s needs a value\n", a.c_str());
        std::exit(2);
      }
      return argv[++i];
    };
    if (a == "--merge-rows") merge_rows = std::stoul(next());
    else if (a == "--tiles") tiles = std::stoi(next());
    else if (a == "--size") size = std::stol(next());
    else if (a == "--workers") workers = std::stoi(next());
    else if (a == "--work") work = next();
    else if (a == "--skip-survey") do_survey = false;
    else if (a == "--skip-merge") do_merge = false;
    else if (a == "--skip-disk-merge") do_disk = false;
    else if (a == "--disk-order") disk_order = std::stoi(next());
    else {
      std::fprintf(stderr, "bench_survey: unknown argument %s\n", a.c_str());
      return 2;
    }
  }
  if (do_merge) bench_merge(merge_rows);
  if (do_disk) bench_disk_merge(merge_rows, disk_order, work);
  if (do_survey) bench_survey(tiles, size, workers, work);
  return 0;
}
