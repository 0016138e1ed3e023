#include "survey_fixture.h"

#include <fcntl.h>
#include <signal.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <stdexcept>

#include <gtest/gtest.h>
#include <nlohmann/json.hpp>

#include "io/fits_image.h"

namespace skerry::testing {

namespace fs = std::filesystem;

namespace {
std::string tmp_root() {
  static const std::string root = [] {
    fs::path p = fs::temp_directory_path() / ("skerry-survey-test-" + std::to_string(::getpid()));
    fs::remove_all(p);
    fs::create_directories(p);
    return p.string();
  }();
  return root;
}

}  // namespace

RunResult run_skerry_limited(const std::vector<std::string>& args, long long fsize_bytes) {
  static int counter = 0;
  const std::string base = tmp_root() + "/limited-" + std::to_string(counter++);
  std::vector<std::string> full{test::skerry_binary()};
  full.insert(full.end(), args.begin(), args.end());
  std::vector<char*> argv;
  for (auto& a : full) argv.push_back(a.data());
  argv.push_back(nullptr);
  const pid_t pid = ::fork();
  if (pid == 0) {
    // The limit applies to this child only; its captured stdout and stderr stay far below it.
    struct rlimit rl {};
    rl.rlim_cur = rl.rlim_max = static_cast<rlim_t>(fsize_bytes);
    ::setrlimit(RLIMIT_FSIZE, &rl);
    const int o = ::open((base + ".out").c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
    const int e = ::open((base + ".err").c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
    const int nul = ::open("/dev/null", O_RDONLY);
    if (o < 0 || e < 0 || nul < 0) ::_exit(127);
    ::dup2(o, 1);
    ::dup2(e, 2);
    ::dup2(nul, 0);
    ::execv(argv[0], argv.data());
    ::_exit(127);
  }
  RunResult r;
  r.code = pid < 0 ? -1 : test::wait_exit(pid);
  r.out = read_file(base + ".out");
  r.err = read_file(base + ".err");
  return r;
}

int start_skerry(const std::vector<std::string>& args, const std::string& log_dir) {
  static int counter = 0;
  const std::string base = log_dir + "/bg-" + std::to_string(counter++);
  std::vector<std::string> argv{test::skerry_binary()};
  argv.insert(argv.end(), args.begin(), args.end());
  return test::spawn(argv, base + ".out", base + ".err");
}

std::string fresh_dir(const std::string& name) {
  fs::path p = fs::path(tmp_root()) / name;
  fs::remove_all(p);
  fs::create_directories(p);
  return p.string();
}

namespace {
double card_value(const std::string& header, const std::string& key) {
  for (std::size_t i = 0; i + 80 <= header.size(); i += 80) {
    const std::string card = header.substr(i, 80);
    std::string k = card.substr(0, 8);
    k.erase(k.find_last_not_of(' ') + 1);
    if (k == key && card.substr(8, 2) == "= ") return std::stod(card.substr(10, 20));
  }
  throw std::runtime_error("no card " + key);
}
}  // namespace

const std::string& survey_tiles() {
  static const std::string dir = [] {
    const std::string d = fresh_dir("field");
    // One band of the invented field, no primary beam (flat noise), 130 sources.
    RunResult r = run_skerry({"simulate", "--out", d, "--seed", "6101", "--bands.freq_mhz", "1400",
                              "--bands.crpix_shift_pix", "0", "--noise.rms_jy_per_beam", "2e-5",
                              "--field.size_pix", "640", "--primary_beam.fwhm_deg", "0", "--sources.count", "130",
                              "--threads", "1"});
    if (r.code != 0) throw std::runtime_error("skerry simulate failed: " + r.err);
    ImageReadOptions ro;
    const SkyImage field = read_sky_image(d + "/lanternfish_1400MHz.fits", ro);
    const double crpix1 = card_value(field.wcs_header, "CRPIX1");
    const double crpix2 = card_value(field.wcs_header, "CRPIX2");
    const long size = 384, step = 256;
    for (int j = 0; j < 2; ++j) {
      for (int i = 0; i < 2; ++i) {
        const long x0 = i * step, y0 = j * step;
        ImageF tile = field.pixels.block(y0, x0, size, size);
        char c1[32], c2[32];
        std::snprintf(c1, sizeof c1, "%.10f", crpix1 - static_cast<double>(x0));
        std::snprintf(c2, sizeof c2, "%.10f", crpix2 - static_cast<double>(y0));
        write_fits_image(d + "/tile_" + std::to_string(j) + std::to_string(i) + ".fits", tile, field, "JY/BEAM",
                         {{"CRPIX1", c1}, {"CRPIX2", c2}});
      }
    }
    fs::remove(d + "/lanternfish_1400MHz.fits");
    return d;
  }();
  return dir;
}

std::string make_survey(const std::string& dir, const std::string& extra) {
  fs::create_directories(fs::path(dir) / "tiles");
  for (const auto& e : fs::directory_iterator(survey_tiles())) {
    const std::string n = e.path().filename().string();
    if (n.rfind("tile_", 0) == 0) fs::copy_file(e.path(), fs::path(dir) / "tiles" / n, fs::copy_options::overwrite_existing);
  }
  const std::string cfg = dir + "/survey.ini";
  write_file(cfg,
             "# Test survey of the invented Lanternfish Field (four overlapping tiles).\n"
             "[survey]\nname = lanternfish\ntiles = tiles/*.fits\noutput = out\n"
             "catalogue = lanternfish.components.csv\nworkers = 2\n"
             "[output]\nformats = csv\nmodel = false\nresidual = false\n" +
                 extra);
  return cfg;
}

const std::string& multiband_tiles() {
  static const std::string dir = [] {
    const std::string d = fresh_dir("field3");
    RunResult r = run_skerry({"simulate", "--out", d, "--seed", "6102", "--bands.freq_mhz", "900,1400,3000",
                              "--bands.pixels_follow_beam", "false", "--bands.crpix_shift_pix", "0",
                              "--noise.rms_jy_per_beam", "2e-5", "--field.size_pix", "640",
                              "--primary_beam.fwhm_deg", "0", "--sources.count", "100", "--threads", "1"});
    if (r.code != 0) throw std::runtime_error("skerry simulate failed: " + r.err);
    for (const char* band : {"900MHz", "1400MHz", "3000MHz"}) {
      const std::string src = d + "/lanternfish_" + band + ".fits";
      ImageReadOptions ro;
      const SkyImage field = read_sky_image(src, ro);
      const double crpix1 = card_value(field.wcs_header, "CRPIX1");
      const double crpix2 = card_value(field.wcs_header, "CRPIX2");
      const long size = 384, step = 256;
      for (int j = 0; j < 2; ++j) {
        for (int i = 0; i < 2; ++i) {
          const long x0 = i * step, y0 = j * step;
          ImageF tile = field.pixels.block(y0, x0, size, size);
          char c1[32], c2[32];
          std::snprintf(c1, sizeof c1, "%.10f", crpix1 - static_cast<double>(x0));
          std::snprintf(c2, sizeof c2, "%.10f", crpix2 - static_cast<double>(y0));
          write_fits_image(d + "/tile_" + std::to_string(j) + std::to_string(i) + "_" + band + ".fits", tile, field,
                           "JY/BEAM", {{"CRPIX1", c1}, {"CRPIX2", c2}});
        }
      }
      fs::remove(src);
    }
    return d;
  }();
  return dir;
}

std::string make_multiband_survey(const std::string& dir, const std::string& extra) {
  fs::create_directories(fs::path(dir) / "tiles");
  for (const auto& e : fs::directory_iterator(multiband_tiles())) {
    const std::string n = e.path().filename().string();
    if (n.rfind("tile_", 0) == 0) fs::copy_file(e.path(), fs::path(dir) / "tiles" / n, fs::copy_options::overwrite_existing);
  }
  const std::string cfg = dir + "/survey.ini";
  write_file(cfg,
             "# Test survey of the invented Lanternfish Field: four overlapping three-band tiles.\n"
             "[survey]\nname = lanternfish\ntiles = tiles/*.fits\noutput = out\n"
             "catalogue = lanternfish.components.csv\nworkers = 2\n"
             "bands = _900MHz,_1400MHz,_3000MHz\ndetection_band = _1400MHz\n"
             "[output]\nformats = csv\nmodel = false\nresidual = false\n"
             "[maps]\nenabled = false\n" +
                 extra);
  return cfg;
}

std::vector<std::string> last_run_events(const std::string& out_dir, const std::string& event) {
  std::ifstream in(out_dir + "/survey.jsonl");
  std::vector<std::string> lines, cur;
  std::string line;
  while (std::getline(in, line)) {
    auto j = nlohmann::json::parse(line);
    const std::string ev = j.at("event").get<std::string>();
    if (ev == "run_start" || ev == "run") cur.clear();
    if (ev == event) cur.push_back(line);
  }
  return cur;
}

std::set<std::string> tiles_of(const std::vector<std::string>& events) {
  std::set<std::string> s;
  for (const auto& e : events) s.insert(nlohmann::json::parse(e).at("tile").get<std::string>());
  return s;
}

/// Changes the least significant byte of the first data pixel in place (same
/// size, same inode, new content).
void edit_first_pixel(const std::string& path) {
  std::string bytes = read_file(path);
  std::size_t end = std::string::npos;
  for (std::size_t i = 0; i + 80 <= bytes.size(); i += 80)
    if (bytes.compare(i, 8, "END     ") == 0) {
      end = i;
      break;
    }
  ASSERT_NE(end, std::string::npos);
  const std::size_t data = (end / 2880 + 1) * 2880;
  int fd = ::open(path.c_str(), O_WRONLY);
  ASSERT_GE(fd, 0);
  char c = static_cast<char>(bytes[data + 3] ^ 0x01);  // big-endian float: byte 3 is the lowest mantissa byte
  ASSERT_EQ(::pwrite(fd, &c, 1, static_cast<off_t>(data + 3)), 1);
  ::close(fd);
}

}  // namespace skerry::testing
