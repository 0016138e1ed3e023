// The README's bad-input table: one test per row. Each test makes its bad input
// (FITS through CFITSIO, catalogues and configurations as text), runs the real
// `skerry` binary in a child process, and checks the documented exit code
// (pipeline/app/errors.h), that stderr is exactly one line naming the file (or the
// option) and what is wrong, and that nothing is left in the output folder --
// no output and no temporary *.partial (pipeline/io/atomic_file.h). Inputs that
// are usable must give a catalogue (with the flag set where one applies).
#include <fcntl.h>
#include <fitsio.h>
#include <gtest/gtest.h>
#include <signal.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <cstdlib>
#include <cstdint>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <limits>
#include <map>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "app/errors.h"
#include "io/table_io.h"
#include "skerry/table.h"

namespace {

namespace fs = std::filesystem;
using skerry::Table;

struct Outcome {
  int code = -1;       ///< exit code; -1 when killed by a signal
  int signal = 0;
  std::string err;     ///< stderr
};

/// Outcome `skerry args...` with fork/exec; stderr to a file. When fsize_limit > 0
/// the child gets RLIMIT_FSIZE = fsize_limit bytes and ignores SIGXFSZ, so a
/// write beyond the limit fails with EFBIG (as on a full disk) instead of
/// killing the process (POSIX setrlimit(2)).
Outcome run_skerry(const std::vector<std::string>& args, const fs::path& dir, rlim_t fsize_limit = 0,
               rlim_t as_limit = 0) {
  const fs::path err_path = dir / "stderr.txt";
  const pid_t pid = ::fork();
  if (pid == 0) {
    const int fd = ::open(err_path.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0600);
    if (fd >= 0) ::dup2(fd, 2);
    const int nul = ::open("/dev/null", O_WRONLY);
    if (nul >= 0) ::dup2(nul, 1);
    if (fsize_limit > 0) {
      ::signal(SIGXFSZ, SIG_IGN);  // ignored dispositions survive exec
      struct rlimit rl{fsize_limit, fsize_limit};
      ::setrlimit(RLIMIT_FSIZE, &rl);
    }
    if (as_limit > 0) {
      struct rlimit rl{as_limit, as_limit};
      ::setrlimit(RLIMIT_AS, &rl);
    }
    std::vector<std::string> all{SKERRY_BINARY};
    all.insert(all.end(), args.begin(), args.end());
    std::vector<char*> argv;
    for (auto& a : all) argv.push_back(a.data());
    argv.push_back(nullptr);
    ::execv(argv[0], argv.data());
    ::_exit(127);
  }
  int st = 0;
  ::waitpid(pid, &st, 0);
  Outcome r;
  if (WIFEXITED(st)) r.code = WEXITSTATUS(st);
  if (WIFSIGNALED(st)) r.signal = WTERMSIG(st);
  std::ifstream in(err_path);
  std::stringstream ss;
  ss << in.rdbuf();
  r.err = ss.str();
  fs::remove(err_path);
  return r;
}

class TempDir {
 public:
  TempDir() {
    std::string t = (fs::temp_directory_path() / "skerry-badinput-XXXXXX").string();
    if (!::mkdtemp(t.data())) throw std::runtime_error("mkdtemp failed");
    path_ = t;
  }
  ~TempDir() {
    std::error_code ec;
    fs::remove_all(path_, ec);
  }
  fs::path operator/(const std::string& f) const { return path_ / f; }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

/// Every entry (hidden ones too: temporaries start with '.') of a folder.
std::vector<std::string> entries(const fs::path& dir) {
  std::vector<std::string> v;
  if (!fs::exists(dir)) return v;
  for (const auto& e : fs::recursive_directory_iterator(dir)) v.push_back(e.path().string());
  std::sort(v.begin(), v.end());
  return v;
}

/// The error contract (errors.h, main.cpp): the exit code, one line on stderr
/// containing `names` (the file or the option) and `what`, nothing in `out`.
void expect_refused(const Outcome& r, int code, const std::string& names, const std::string& what,
                    const fs::path& out) {
  EXPECT_EQ(r.signal, 0) << "killed by signal " << r.signal;
  EXPECT_EQ(r.code, code) << r.err;
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << "not one line: " << r.err;
  EXPECT_FALSE(r.err.empty() || r.err.back() != '\n') << r.err;
  EXPECT_NE(r.err.find(names), std::string::npos) << "does not name " << names << ": " << r.err;
  EXPECT_NE(r.err.find(what), std::string::npos) << "does not say '" << what << "': " << r.err;
  for (const auto& e : entries(out)) ADD_FAILURE() << "left behind: " << e;
}

// ---- FITS images --------------------------------------------------------------------

/// An image on a SIN grid about the Lanternfish Field centre (RA 201.25, Dec -38.6),
/// 2" pixels, a 6" circular beam (3 pixels FWHM), white noise of rms 1e-4 Jy/beam
/// and point sources (peak Jy/beam at 0-based pixel x, y).
struct ImageSpec {
  long nx = 96, ny = 96;
  int bitpix = -32;
  double rms = 1e-4;
  std::vector<std::array<double, 3>> sources{{47.3, 48.6, 5e-3}};  // x, y, peak: 50 sigma
  double source_fwhm_pix = 3.0;
  std::uint64_t seed = 17;
  std::map<std::string, std::string> str_keys{{"CTYPE1", "RA---SIN"}, {"CTYPE2", "DEC--SIN"},
                                              {"CUNIT1", "deg"}, {"CUNIT2", "deg"},
                                              {"RADESYS", "ICRS"}, {"BUNIT", "JY/BEAM"}};
  std::map<std::string, double> num_keys{{"CRVAL1", 201.25}, {"CRVAL2", -38.6},
                                         {"CDELT1", -2.0 / 3600}, {"CDELT2", 2.0 / 3600},
                                         {"BMAJ", 6.0 / 3600}, {"BMIN", 6.0 / 3600}, {"BPA", 0.0},
                                         {"FREQ", 1.4e9}};
  std::vector<double> pixels() const {
    std::vector<double> v(static_cast<std::size_t>(nx * ny));
    std::mt19937_64 rng(seed);
    std::normal_distribution<double> g(0.0, rms);
    const double a = 4.0 * std::log(2.0) / (source_fwhm_pix * source_fwhm_pix);
    for (long y = 0; y < ny; ++y)
      for (long x = 0; x < nx; ++x) {
        double s = rms > 0 ? g(rng) : 0.0;
        for (const auto& src : sources)
          s += src[2] * std::exp(-a * ((x - src[0]) * (x - src[0]) + (y - src[1]) * (y - src[1])));
        v[static_cast<std::size_t>(y * nx + x)] = s;
      }
    return v;
  }
};

void check_fits(int status, const std::string& what) {
  if (status) {
    char msg[FLEN_STATUS];
    fits_get_errstatus(status, msg);
    throw std::runtime_error(what + ": " + msg);
  }
}

/// Write `spec` (CRPIX at the centre) with its BITPIX; integer BITPIX get
/// BSCALE/BZERO spanning the values (FITS Standard 4.0 sec. 5.3, REF-FITS-02).
void write_image(const fs::path& path, const ImageSpec& spec, std::vector<double> v = {}) {
  if (v.empty()) v = spec.pixels();
  fitsfile* f = nullptr;
  int status = 0;
  fs::remove(path);
  fits_create_file(&f, path.c_str(), &status);
  long naxes[2] = {spec.nx, spec.ny};
  fits_create_img(f, spec.bitpix, 2, naxes, &status);
  check_fits(status, "create " + path.string());
  for (const auto& [k, s] : spec.str_keys) fits_update_key(f, TSTRING, k.c_str(), const_cast<char*>(s.c_str()), nullptr, &status);
  for (auto [k, d] : spec.num_keys) fits_update_key(f, TDOUBLE, k.c_str(), &d, nullptr, &status);
  double crpix1 = 0.5 * (spec.nx + 1), crpix2 = 0.5 * (spec.ny + 1);
  fits_update_key(f, TDOUBLE, "CRPIX1", &crpix1, nullptr, &status);
  fits_update_key(f, TDOUBLE, "CRPIX2", &crpix2, nullptr, &status);
  if (spec.bitpix > 0) {
    double lo = std::numeric_limits<double>::max(), hi = -lo;
    for (double x : v)
      if (std::isfinite(x)) lo = std::min(lo, x), hi = std::max(hi, x);
    // Raw range: 0..255 for BITPIX 8 (unsigned), else symmetric about 0.
    const double raw_lo = spec.bitpix == 8 ? 0.0 : -std::ldexp(1.0, std::min(spec.bitpix, 32) - 2);
    const double raw_hi = spec.bitpix == 8 ? 255.0 : std::ldexp(1.0, std::min(spec.bitpix, 32) - 2);
    double bscale = (hi - lo) / (raw_hi - raw_lo - 2), bzero = lo - bscale * (raw_lo + 1);
    fits_update_key(f, TDOUBLE, "BSCALE", &bscale, nullptr, &status);
    fits_update_key(f, TDOUBLE, "BZERO", &bzero, nullptr, &status);
    fits_set_bscale(f, bscale, bzero, &status);
  }
  fits_write_img(f, TDOUBLE, 1, static_cast<LONGLONG>(v.size()), v.data(), &status);
  fits_close_file(f, &status);
  check_fits(status, "write " + path.string());
}

/// Replace the value of a header card in the raw bytes of a FITS file.
/// Replaces the card of `key` by "KEY = value", KEY = `new_key` (default: key).
void patch_card(const fs::path& path, const std::string& key, const std::string& value, std::string new_key = "") {
  std::fstream io(path, std::ios::in | std::ios::out | std::ios::binary);
  std::string head(2880 * 4, ' ');
  io.read(head.data(), static_cast<std::streamsize>(head.size()));
  std::string k = key;
  k.resize(8, ' ');
  if (new_key.empty()) new_key = key;
  new_key.resize(8, ' ');
  for (std::size_t at = 0; at + 80 <= head.size(); at += 80) {
    if (head.compare(at, 8, k) == 0) {
      std::string card = new_key + "= " + std::string(20 - std::min<std::size_t>(20, value.size()), ' ') + value;
      card.resize(80, ' ');
      io.clear();
      io.seekp(static_cast<std::streamoff>(at));
      io.write(card.data(), 80);
      return;
    }
  }
  throw std::runtime_error("no card " + key + " in " + path.string());
}

std::string arg(const fs::path& p) { return p.string(); }

/// skerry extract with small tables only (CSV) and no maps: quicker, same checks.
Outcome extract(const fs::path& img, const fs::path& out, std::vector<std::string> extra = {}, rlim_t fsize = 0) {
  std::vector<std::string> a{"extract", arg(img), "--out", arg(out), "--threads", "1"};
  a.insert(a.end(), extra.begin(), extra.end());
  return run_skerry(a, out.parent_path(), fsize);
}

/// The catalogue holds a component within 1.5 pixels of (x, y) (0-based);
/// returns its row or -1.
long find_component(const Table& t, double x, double y) {
  const auto& cx = t.at("x_pix1").f64;
  const auto& cy = t.at("y_pix1").f64;
  for (std::size_t i = 0; i < t.rows(); ++i)
    if (std::hypot(cx[i] - 1 - x, cy[i] - 1 - y) < 1.5) return static_cast<long>(i);
  return -1;
}

// ---- rows of the table -------------------------------------------------------------

TEST(BadInputTable, MissingFile) {
  TempDir d;
  const Outcome r = extract(d / "absent.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "absent.fits"), "not found", d / "out");
}

TEST(BadInputTable, NotFits) {
  TempDir d;
  std::ofstream(d / "notes.fits") << "SIMPLE but not really a FITS file\n";
  const Outcome r = extract(d / "notes.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "notes.fits"), "FITS", d / "out");
}

// FITS Standard 4.0 sec. 3.3.2 (REF-FITS-02): the data array holds
// NAXIS1 x NAXIS2 x |BITPIX|/8 bytes, padded to a multiple of 2880.
TEST(BadInputTable, TruncatedFits) {
  TempDir d;
  ImageSpec s;
  write_image(d / "cut.fits", s);
  fs::resize_file(d / "cut.fits", 2880 + 2880 * 3);  // header + part of the 36,864 data bytes
  const Outcome r = extract(d / "cut.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "cut.fits"), "truncated", d / "out");
}

TEST(BadInputTable, HeaderLiesAboutAxisLengths) {
  TempDir d;
  ImageSpec s;
  write_image(d / "lying.fits", s);
  patch_card(d / "lying.fits", "NAXIS2", "960");  // ten times the rows the file holds
  const Outcome r = extract(d / "lying.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "lying.fits"), "96 x 960", d / "out");
}

// FITS Standard 4.0 sec. 4.1.2.1: header cards hold printable ASCII only
// (0x20-0x7E). A NUL byte inside a keyword card's value is refused before
// CFITSIO or WCSLIB parse the header, naming the HDU and card.
TEST(BadInputTable, HeaderCardWithControlByte) {
  TempDir d;
  ImageSpec s;
  write_image(d / "nul.fits", s);
  patch_card(d / "nul.fits", "CRVAL1", std::string("201.2") + '\0' + "5");
  const Outcome r = extract(d / "nul.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "nul.fits"), "(CRVAL1) holds a byte that is not printable ASCII",
                 d / "out");
}

// FITS Standard 4.0 sec. 4.2.1.1: a string value is enclosed in single quotes.
// One without its closing quote is refused (WCSLIB's parser would overrun a buffer).
TEST(BadInputTable, HeaderStringWithoutClosingQuote) {
  TempDir d;
  ImageSpec s;
  write_image(d / "quote.fits", s);
  patch_card(d / "quote.fits", "CTYPE2", "'DEC--SIN");
  const Outcome r = extract(d / "quote.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "quote.fits"), "(CTYPE2) has a string value without its closing quote",
                 d / "out");
}

// A WCS value that is not a FITS number: WCSLIB would skip the card and use 0
// (every position 150 degrees off); refused, naming the card (REF-FITS-02).
TEST(BadInputTable, HeaderWcsValueNotANumber) {
  TempDir d;
  ImageSpec s;
  write_image(d / "nan.fits", s);
  patch_card(d / "nan.fits", "CRVAL1", "NaN");
  const Outcome r = extract(d / "nan.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "nan.fits"), "(CRVAL1 = NaN) is not a finite number", d / "out");
}

// A keyword skerry reads, given twice with different values (readers disagree
// on which wins: positions 0.5 degrees apart); refused, naming both cards.
TEST(BadInputTable, HeaderKeywordRepeatedWithAnotherValue) {
  TempDir d;
  ImageSpec s;
  write_image(d / "twice.fits", s);
  patch_card(d / "twice.fits", "FREQ", "201.75", "CRVAL1");
  const Outcome r = extract(d / "twice.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "twice.fits"), "keyword CRVAL1 appears twice with different values",
                 d / "out");
}

// Optical-plate distortion cards (here the DSS plate's corner pixel, with a value
// that does not parse): WCSLIB 7.12 would replace the image's WCS by a plate
// solution or, as here, write through a null pointer; refused, naming the card.
TEST(BadInputTable, HeaderWithPlateDistortionCard) {
  TempDir d;
  ImageSpec s;
  write_image(d / "plate.fits", s);
  patch_card(d / "plate.fits", "FREQ", "'abc'", "CNPIX1");
  const Outcome r = extract(d / "plate.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "plate.fits"), "(CNPIX1) is a DSS plate-solution keyword",
                 d / "out");
}

// Resources: a header whose plane needs more than the machine's physical memory
// is refused before anything is allocated. The file really is that large (a
// sparse file: the size passes the truncation check), so the memory guard is
// what refuses it; a 1 GiB address-space limit on the child proves that no
// allocation of the plane was attempted (it would fail as out of memory, exit 1).
TEST(BadInputTable, ImageLargerThanMemory) {
  // The child runs under a 1 GiB address-space limit, which AddressSanitizer's
  // shadow memory cannot live with; the guard itself is the same code in every build.
  if (std::getenv("SKERRY_SANITIZER_BUILD"))
    GTEST_SKIP() << "address-space limit not usable under the sanitizers (SKERRY_SANITIZER_BUILD)";
  TempDir d;
  ImageSpec s;
  write_image(d / "huge.fits", s);
  const double phys = static_cast<double>(::sysconf(_SC_PHYS_PAGES)) * static_cast<double>(::sysconf(_SC_PAGESIZE));
  const long n = static_cast<long>(std::ceil(std::sqrt(1.5 * phys / 4.0)));  // float32 plane of 1.5 x memory
  patch_card(d / "huge.fits", "NAXIS1", std::to_string(n));
  patch_card(d / "huge.fits", "NAXIS2", std::to_string(n));
  std::error_code ec;
  fs::resize_file(d / "huge.fits", 2880 + static_cast<std::uintmax_t>(n) * static_cast<std::uintmax_t>(n) * 4u, ec);
  if (ec) GTEST_SKIP() << "no sparse file of " << n << "^2 pixels here: " << ec.message();
  const Outcome r = run_skerry({"extract", arg(d / "huge.fits"), "--out", arg(d / "out")}, d.path(), 0, 1ul << 30);
  expect_refused(r, skerry::kExitBadInput, arg(d / "huge.fits"), "more than this machine's", d / "out");
  fs::remove(d / "huge.fits");
}

class Bitpix : public ::testing::TestWithParam<int> {};

// FITS Standard 4.0 Table 8 (REF-FITS-02): BITPIX 8 (unsigned), 16, 32, 64
// (two's complement, with BSCALE/BZERO) and -32, -64 (IEEE 754). Each is read
// and the 50-sigma source is found where it was put.
TEST_P(Bitpix, ExtractFindsTheSource) {
  TempDir d;
  ImageSpec s;
  s.bitpix = GetParam();
  const fs::path img = d / ("b" + std::to_string(std::abs(s.bitpix)) + ".fits");
  write_image(img, s);
  const Outcome r = extract(img, d / "out", {"--output.formats", "csv", "--output.maps", "false",
                                         "--output.model", "false", "--output.residual", "false"});
  ASSERT_EQ(r.code, 0) << r.err;
  const Table t = skerry::read_table(arg(d / "out" / (img.stem().string() + ".components.csv")));
  const long i = find_component(t, s.sources[0][0], s.sources[0][1]);
  ASSERT_GE(i, 0) << "source not found; " << t.rows() << " components";
  // Quantisation of BITPIX 8 adds (range/253)/sqrt(12) ~ 7e-6 Jy/beam of noise:
  // the peak stays within 5 sigma (5e-4) of the truth.
  EXPECT_NEAR(t.at("s_peak_jy_per_beam").f64[static_cast<std::size_t>(i)], s.sources[0][2], 5e-4);
}
INSTANTIATE_TEST_SUITE_P(BadInputTable, Bitpix, ::testing::Values(8, 16, 32, 64, -32, -64));

TEST(BadInputTable, AllNanImage) {
  TempDir d;
  ImageSpec s;
  write_image(d / "blank.fits", s, std::vector<double>(96 * 96, std::nan("")));
  const Outcome r = extract(d / "blank.fits", d / "out");
  expect_refused(r, skerry::kExitNoData, arg(d / "blank.fits"), "blank", d / "out");
}

TEST(BadInputTable, ConstantImage) {
  TempDir d;
  ImageSpec s;
  write_image(d / "flat.fits", s, std::vector<double>(96 * 96, 0.125));
  const Outcome r = extract(d / "flat.fits", d / "out");
  expect_refused(r, skerry::kExitNoData, arg(d / "flat.fits"), "rms is zero", d / "out");
}

// The default box is 30 beams (90 pixels here); a 40 x 40 image is smaller.
TEST(BadInputTable, ImageSmallerThanBackgroundBox) {
  TempDir d;
  ImageSpec s;
  s.nx = s.ny = 40;
  s.sources = {{19.6, 20.2, 5e-3}};
  write_image(d / "small.fits", s);
  const Outcome r = extract(d / "small.fits", d / "out", {"--output.formats", "csv"});
  ASSERT_EQ(r.code, 0) << r.err;
  const Table t = skerry::read_table(arg(d / "out/small.components.csv"));
  EXPECT_GE(find_component(t, 19.6, 20.2), 0) << t.rows() << " components";
}

// A single row (1 x 300): the noise boxes and islands degenerate to one
// dimension; the source must still be measured, flagged near_edge (its island
// touches the image edge on both sides).
TEST(BadInputTable, OneByNImage) {
  TempDir d;
  ImageSpec s;
  s.nx = 300;
  s.ny = 1;
  s.sources = {{150.0, 0.0, 5e-3}};
  write_image(d / "strip.fits", s);
  const Outcome r = extract(d / "strip.fits", d / "out", {"--output.formats", "csv"});
  ASSERT_EQ(r.code, 0) << r.err;
  const Table t = skerry::read_table(arg(d / "out/strip.components.csv"));
  const long i = find_component(t, 150.0, 0.0);
  ASSERT_GE(i, 0) << t.rows() << " components";
  EXPECT_NE(t.at("flags").i64[static_cast<std::size_t>(i)] & 1, 0) << "near_edge (bit 0) not set";
}

// REF-FITS-03: BMAJ/BMIN/BPA give the restoring beam (FWHM, deg).
TEST(BadInputTable, MissingBeam) {
  TempDir d;
  ImageSpec s;
  s.num_keys.erase("BMAJ");
  s.num_keys.erase("BMIN");
  s.num_keys.erase("BPA");
  write_image(d / "nobeam.fits", s);
  const Outcome r = extract(d / "nobeam.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "nobeam.fits"), "BMAJ", d / "out");
}

TEST(BadInputTable, ZeroBeam) {
  TempDir d;
  ImageSpec s;
  s.num_keys["BMAJ"] = 0.0;
  s.num_keys["BMIN"] = 0.0;
  write_image(d / "zerobeam.fits", s);
  const Outcome r = extract(d / "zerobeam.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "zerobeam.fits"), "BMAJ", d / "out");
}

// WCS Paper I (Greisen & Calabretta 2002, REF-FITS-04): celestial axes have
// CTYPE 'RA--'/'DEC-' (or GLON/GLAT, ...) with a projection code.
TEST(BadInputTable, NonCelestialAxes) {
  TempDir d;
  ImageSpec s;
  s.str_keys["CTYPE1"] = "LINEAR";
  s.str_keys["CTYPE2"] = "LINEAR";
  write_image(d / "linear.fits", s);
  const Outcome r = extract(d / "linear.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "linear.fits"), "celestial", d / "out");
}

// BUNIT units: FITS Standard 4.0 sec. 4.3 (REF-UNIT-05). MJy/sr is a unit skerry
// does not convert; the option takes it as Jy/beam.
TEST(BadInputTable, WrongBunit) {
  TempDir d;
  ImageSpec s;
  s.str_keys["BUNIT"] = "MJy/sr";
  write_image(d / "sr.fits", s);
  const Outcome r = extract(d / "sr.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "sr.fits"), "BUNIT 'MJy/sr' is not Jy/beam, K or Jy/pixel", d / "out");
  EXPECT_NE(r.err.find("image.accept_bunit = true"), std::string::npos) << r.err;
}

// K needs the frequency for the Rayleigh-Jeans conversion (REF-UNIT-04).
TEST(BadInputTable, KelvinWithoutFrequency) {
  TempDir d;
  ImageSpec s;
  s.str_keys["BUNIT"] = "K";
  s.num_keys.erase("FREQ");
  write_image(d / "kelvin.fits", s);
  const Outcome r = extract(d / "kelvin.fits", d / "out");
  expect_refused(r, skerry::kExitBadInput, arg(d / "kelvin.fits"), "has no observing frequency", d / "out");
  EXPECT_NE(r.err.find("give image.freq_mhz"), std::string::npos) << r.err;
}

// The beam only in AIPS-style HISTORY cards (REF-FITS-07): read from the last
// CLEAN card; the source is measured.
TEST(BadInputTable, BeamOnlyInHistoryCards) {
  TempDir d;
  ImageSpec s;
  s.num_keys.erase("BMAJ");
  s.num_keys.erase("BMIN");
  s.num_keys.erase("BPA");
  const fs::path img = d / "history.fits";
  write_image(img, s);
  {
    fitsfile* f = nullptr;
    int status = 0;
    fits_open_file(&f, img.c_str(), READWRITE, &status);
    fits_write_history(f, "AIPS   CLEAN BMAJ=  3.3333E-03 BMIN=  3.3333E-03 BPA=   0.00", &status);
    fits_write_history(f, "AIPS   CLEAN BMAJ=  1.6667E-03 BMIN=  1.6667E-03 BPA=   0.00", &status);
    fits_close_file(f, &status);
    check_fits(status, "history cards");
  }
  const Outcome r = extract(img, d / "out");
  ASSERT_EQ(r.code, 0) << r.err;
  const Table t = skerry::read_table(arg(d / "out/history.components.csv"));
  EXPECT_GE(find_component(t, 47.3, 48.6), 0);
  std::ifstream rec(d / "out/history.run.json");
  const std::string json((std::istreambuf_iterator<char>(rec)), std::istreambuf_iterator<char>());
  EXPECT_NE(json.find("\"beam_origin\": \"history\""), std::string::npos);
}

// A source of 10^5 sigma dominating the noise boxes: 4 beams across (12
// pixels), and 10 beams across (30 pixels, its island covers most of the 96 x
// 96 image and so of every noise box). The first pass's rms is inflated by it,
// the second pass masks it; the source must be in the catalogue with its
// peak (Gaussian: S_int = S_peak x source area / beam area, Condon 1997 eq. 4).
TEST(BadInputTable, BrightSourceDominatesNoise) {
  for (const double fwhm_pix : {12.0, 30.0}) {
    SCOPED_TRACE("source FWHM " + std::to_string(fwhm_pix) + " pixels");
    TempDir d;
    ImageSpec s;
    s.sources = {{48.2, 47.7, 10.0}};
    s.source_fwhm_pix = fwhm_pix;
    write_image(d / "bright.fits", s);
    const Outcome r = extract(d / "bright.fits", d / "out", {"--output.formats", "csv"});
    ASSERT_EQ(r.code, 0) << r.err;
    const Table t = skerry::read_table(arg(d / "out/bright.components.csv"));
    const long i = find_component(t, 48.2, 47.7);
    ASSERT_GE(i, 0) << t.rows() << " components";
    const auto k = static_cast<std::size_t>(i);
    EXPECT_NEAR(t.at("s_peak_jy_per_beam").f64[k], 10.0, 0.1);
    EXPECT_NEAR(t.at("s_int_jy").f64[k], 10.0 * (fwhm_pix / 3.0) * (fwhm_pix / 3.0), 0.02 * 10.0 * fwhm_pix * fwhm_pix / 9.0);
  }
}

// ---- configuration (extract --config) --------------------------------------------

TEST(BadInputTable, ConfigUnknownKey) {
  TempDir d;
  ImageSpec s;
  write_image(d / "ok.fits", s);
  std::ofstream(d / "bad.ini") << "[detect]\npeak_snr = 5\nisland_snr_typo = 3\n";
  const Outcome r = extract(d / "ok.fits", d / "out", {"--config", arg(d / "bad.ini")});
  expect_refused(r, skerry::kExitUsage, "island_snr_typo", "", d / "out");
}

TEST(BadInputTable, ConfigWrongType) {
  TempDir d;
  ImageSpec s;
  write_image(d / "ok.fits", s);
  std::ofstream(d / "bad.ini") << "[detect]\npeak_snr = five\n";
  const Outcome r = extract(d / "ok.fits", d / "out", {"--config", arg(d / "bad.ini")});
  expect_refused(r, skerry::kExitUsage, "detect.peak_snr", "five", d / "out");
}

// ---- catalogues (skerry match) -----------------------------------------------------

Outcome match(const TempDir& d, const std::string& b_text, std::vector<std::string> extra = {}) {
  std::ofstream(d / "a.csv") << "ra_deg,dec_deg\n201.25,-38.6\n201.30,-38.55\n";
  std::ofstream(d / "b.csv") << b_text;
  std::vector<std::string> a{"match", arg(d / "a.csv"), arg(d / "b.csv"), "--out", arg(d / "out"),
                             "--match.chance_shifts", "0"};
  a.insert(a.end(), extra.begin(), extra.end());
  return run_skerry(a, d.path());
}

TEST(BadInputTable, CatalogueNonNumericCell) {
  TempDir d;
  const Outcome r = match(d, "ra_deg,dec_deg\n201.25,-38.6\n201.30,minus38\n");
  expect_refused(r, skerry::kExitBadInput, arg(d / "b.csv"), "row 2, column 'dec_deg'", d / "out");
}

// Missing cells: the row has no position; it is counted (one line on stderr)
// and never matched; the other rows are matched.
TEST(BadInputTable, CatalogueMissingCells) {
  TempDir d;
  const Outcome r = match(d, "ra_deg,dec_deg\n201.25,-38.6\n,\n201.30,\n", {"--match.name", "m"});
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_NE(r.err.find("2 rows without a position"), std::string::npos) << r.err;
  const Table t = skerry::read_table(arg(d / "out/m.matches.csv"));
  EXPECT_EQ(t.rows(), 1u);
}

TEST(BadInputTable, EmptyCatalogue) {
  TempDir d;
  const Outcome r = match(d, "ra_deg,dec_deg\n", {"--match.name", "e"});
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(skerry::read_table(arg(d / "out/e.matches.csv")).rows(), 0u);
}

TEST(BadInputTable, OutOfRangeDeclination) {
  TempDir d;
  const Outcome r = match(d, "ra_deg,dec_deg\n201.25,-38.6\n201.30,-95.5\n");
  expect_refused(r, skerry::kExitBadInput, arg(d / "b.csv"), "outside [-90, 90]", d / "out");
}

// Resources: a FITS table header claiming 10^12 rows (NAXIS2) is refused before
// any column is allocated.
TEST(BadInputTable, CatalogueLargerThanMemory) {
  TempDir d;
  fitsfile* f = nullptr;
  int status = 0;
  const fs::path p = d / "b.fits";
  fits_create_file(&f, p.c_str(), &status);
  char* ttype[] = {const_cast<char*>("ra_deg"), const_cast<char*>("dec_deg")};
  char* tform[] = {const_cast<char*>("D"), const_cast<char*>("D")};
  char* tunit[] = {const_cast<char*>("deg"), const_cast<char*>("deg")};
  fits_create_tbl(f, BINARY_TBL, 0, 2, ttype, tform, tunit, "CAT", &status);
  double ra[2] = {201.25, 201.3}, dec[2] = {-38.6, -38.55};
  fits_write_col(f, TDOUBLE, 1, 1, 1, 2, ra, &status);
  fits_write_col(f, TDOUBLE, 2, 1, 1, 2, dec, &status);
  fits_close_file(f, &status);
  check_fits(status, "write " + p.string());
  // The table is the second HDU: its header starts at byte 2880.
  std::fstream io(p, std::ios::in | std::ios::out | std::ios::binary);
  std::string head(2880, ' ');
  io.seekg(2880);
  io.read(head.data(), 2880);
  const auto at = head.find("NAXIS2  =");
  ASSERT_NE(at, std::string::npos);
  std::string card = "NAXIS2  =        1000000000000";
  card.resize(80, ' ');
  io.seekp(static_cast<std::streamoff>(2880 + at));
  io.write(card.data(), 80);
  io.close();
  std::ofstream(d / "a.csv") << "ra_deg,dec_deg\n201.25,-38.6\n";
  const Outcome r = run_skerry({"match", arg(d / "a.csv"), arg(p), "--out", arg(d / "out"), "--match.chance_shifts", "0"},
                           d.path());
  expect_refused(r, skerry::kExitBadInput, arg(p), "1000000000000 rows", d / "out");
}

// ---- output ------------------------------------------------------------------------

// Disk full: the child may write at most 20 kB per file (RLIMIT_FSIZE, SIGXFSZ
// ignored so writes fail with EFBIG as on a full file system). The 36 kB rms map,
// stored plain, cannot be written: exit 4, one line naming an output, nothing
// left behind.
TEST(BadInputTable, DiskFullOnOutput) {
  TempDir d;
  ImageSpec s;
  write_image(d / "ok.fits", s);
  const Outcome r = extract(d / "ok.fits", d / "out", {"--output.map_storage", "rms:plain"}, 20000);
  expect_refused(r, skerry::kExitOutput, "ok.rms_map.fits", "write failed", d / "out");
}

}  // namespace
