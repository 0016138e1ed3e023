// Survey benchmark (prints figures; not a test).
//
//  1. Merge of N synthetic components (default 10^6) from an 8 x 8 grid of
//     overlapping tiles: wall time and peak RSS, 1 and 2 threads, two partition
//     orders (the result must be the same: checked and printed).
//  2. A survey of T simulated tiles (default 64 of 2048 x 2048 pixels, 8 x 8
//     grid, overlapping by about 10 %): `skerry survey` cold run, unchanged rerun,
//     tiles per minute, merge time (from the merge summary), peak RSS of the
//     largest process, on W workers (default 2).
//
// usage: bench_survey [--merge-rows N] [--tiles T] [--size PIX] [--workers W]
//                     [--work DIR] [--skip-survey] [--skip-merge]
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <oneapi/tbb/global_control.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "skerry/survey.h"

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
      std::printf("  threads %d, partition order %d: %.2f s (%.2f M rows/s), %zu partitions, kept %zu, dropped %zu, "
                  "residual duplicate pairs %zu, name collisions %zu, same catalogue as first: %s\n",
                  threads, order, dt, static_cast<double>(comps.size()) / dt / 1e6, r.partitions, r.kept.size(),
                  r.dropped_by_cell, r.residual_duplicate_pairs, r.name_collisions, same ? "yes" : "NO");
    }
  }
  std::printf("  peak RSS of the merge benchmark process: %ld MB\n", self_maxrss_mb());
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
                          "--bands.freqs_mhz", "1400", "--bands.crpix_shift_pix", "0", "--field.size_pix",
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
      << workers << "\n[output]\nformats = csv\nmaps = false\nmodel = false\nresidual = false\n";
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
  std::printf("  merge: %s s, %s rows kept of %s, %s dropped by the cell rule, %s residual duplicate pairs\n",
              json_number(mss.str(), "seconds").c_str(), json_number(mss.str(), "rows").c_str(),
              json_number(mss.str(), "input_rows").c_str(), json_number(mss.str(), "dropped_by_cell").c_str(),
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
  bool do_survey = true, do_merge = true;
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
    else {
      std::fprintf(stderr, "bench_survey: unknown argument %s\n", a.c_str());
      return 2;
    }
  }
  if (do_merge) bench_merge(merge_rows);
  if (do_survey) bench_survey(tiles, size, workers, work);
  return 0;
}
