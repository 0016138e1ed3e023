// Outputs: every file re-read by an independent reader (astropy, Debian's
// python3-astropy, including its VOTable validation and the UCD1+ controlled
// vocabulary), the run record, byte-identical results for 1, 2 and 8 threads,
// and the documented configuration file equal to the built-in defaults.
#include <gtest/gtest.h>

#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cstring>
#include <nlohmann/json.hpp>

#include "app/errors.h"
#include "extract_helpers.h"

namespace skerry::test {
namespace {

const Beam kBeam{7.0, 5.0, 30.0};

/// File bytes with the values and comments of the CHECKSUM and DATASUM cards of
/// FITS files blanked: CFITSIO's fits_write_chksum (used by the FITS table
/// writer) puts the current date into their comments, so those two cards differ
/// between any two runs; every other byte must be identical.
std::string comparable_bytes(const std::string& path) {
  std::string b = slurp(path);
  if (!path.ends_with(".fits")) return b;
  for (const char* key : {"CHECKSUM= ", "DATASUM = "})
    for (std::size_t pos = b.find(key); pos != std::string::npos; pos = b.find(key, pos + 1))
      if (pos % 80 == 0) std::fill(b.begin() + static_cast<long>(pos) + 8, b.begin() + static_cast<long>(pos) + 80, ' ');
  return b;
}

/// A 512^2 field of the simulator's sky: points, resolved sources, close doubles.
std::string write_field(const TempDir& tmp, std::uint64_t seed) {
  const long n = 512;
  const GridSpec g = lanternfish_grid(n, 1.0, kBeam);
  SkyImage im = make_sky_image(g, ImageF::Zero(n, n), "Lanternfish Field (simulated)");
  sim::SkyModelOptions so;
  so.footprint = im.wcs.get();
  so.footprint_nx = n;
  so.footprint_ny = n;
  so.count = 150;
  so.s_min_jy = 5e-4;
  so.s_max_jy = 0.05;
  so.resolved_fraction = 0.3;
  so.double_fraction = 0.2;
  so.unit_beam = kBeam;
  const sim::SkyModel model = sim::draw_sky_model(so, seed);
  sim::BandOptions bo;
  bo.nx = bo.ny = n;
  bo.beam = kBeam;
  bo.rms_jy_per_beam = 1e-4;
  const sim::BandImage band = sim::simulate_band(model, *im.wcs, bo, seed);
  const std::string path = tmp / "field.fits";
  write_fits_image(path, band.image, im);
  return path;
}

// Independent reader: astropy (FITS binary table, VOTable 1.4 parser with
// verify='exception', UCD1+ controlled vocabulary of IVOA UCD1+ 1.6, REF-VO-02).
TEST(Outputs, AstropyReadsEveryTable) {
  TempDir tmp("astropy");
  const std::string img = write_field(tmp, 11);
  const RunResult r = run_skerry({"extract", img, "--out", tmp / "out"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  const Table csv = read_table(tmp / "out/field.components.csv");
  ASSERT_GT(csv.rows(), 50u);
  const std::string script = tmp / "check.py";
  std::ofstream(script) << R"PY(
import sys, warnings
import numpy as np
from astropy.table import Table
from astropy.io import votable
from astropy.io.votable import ucd as vucd
d = sys.argv[1]
ok = True
def fail(msg):
    global ok
    ok = False
    print("FAIL", msg)
from astropy.io import fits
# A file name says what it is: NAME.KIND.fits tables are binary tables, *_map.fits images.
for kind in ("components", "islands", "sources"):
    with fits.open(f"{d}/field.{kind}.fits") as h:
        if len(h) < 2 or not isinstance(h[1], fits.BinTableHDU): fail(f"{kind}.fits is not a table")
# The maps as stored by default (README, "Output maps"): FITS tile compression for
# the rms, background, island and model maps (astropy's CompImageHDU, an extension
# after an empty primary HDU), a plain primary image for the residual.
stored = {"rms_map": "compressed", "background_map": "compressed", "island_map": "compressed",
          "model_map": "compressed", "residual_map": "plain"}
for m, how in stored.items():
    with fits.open(f"{d}/field.{m}.fits") as h:
        hdu = h[1] if how == "compressed" else h[0]
        if how == "compressed" and not isinstance(hdu, fits.CompImageHDU): fail(f"{m}.fits is not tile-compressed")
        if hdu.data is None or hdu.data.ndim != 2: fail(f"{m}.fits is not an image")
        if hdu.header.get("CTYPE1", "")[:4] != "RA--": fail(f"{m}.fits has no celestial WCS")
for kind in ("components", "sources"):
    if "info_bits" not in Table.read(f"{d}/field.{kind}.csv", format="ascii.csv").colnames:
        fail(f"{kind}: no info_bits column")
for kind in ("components", "islands", "sources"):
    ra, flux = ("peak_ra_deg", "s_pix_jy") if kind == "islands" else ("ra_deg", "s_int_jy")
    dec = ra.replace("ra_", "dec_")
    csv = Table.read(f"{d}/field.{kind}.csv", format="ascii.csv")
    fit = Table.read(f"{d}/field.{kind}.fits")
    if len(fit) != len(csv): fail(f"{kind}: FITS rows {len(fit)} != CSV rows {len(csv)}")
    if list(fit.colnames) != list(csv.colnames): fail(f"{kind}: column names differ")
    if str(fit[ra].unit) != "deg": fail(f"{kind}: {ra} unit {fit[ra].unit}")
    if str(fit[flux].unit) != "Jy": fail(f"{kind}: {flux} unit {fit[flux].unit}")
    for c in (ra, dec, flux):
        if not np.allclose(np.asarray(fit[c], float), np.asarray(csv[c], float), rtol=0, atol=0, equal_nan=True):
            fail(f"{kind}: {c} differs between FITS and CSV")
for kind in ("components", "islands", "sources"):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        vt = votable.parse(f"{d}/field.{kind}.vot", verify="exception")
    tab = vt.get_first_table()
    csv = Table.read(f"{d}/field.{kind}.csv", format="ascii.csv")
    if len(tab.array) != len(csv): fail(f"{kind}: VOTable rows differ")
    for f in tab.fields:
        if not f.ucd: fail(f"{kind}.{f.name}: no UCD"); continue
        try:
            vucd.parse_ucd(f.ucd, check_controlled_vocabulary=True, has_colon=False)
        except Exception as e:
            fail(f"{kind}.{f.name}: UCD {f.ucd!r}: {e}")
        if not f.description: fail(f"{kind}.{f.name}: no description")
    for c in ("ra_deg",) if kind != "islands" else ("peak_ra_deg",):
        a = np.asarray(tab.array[c], float); b = np.asarray(csv[c], float)
        if not np.array_equal(a, b): fail(f"{kind}: {c} differs between VOTable and CSV")
print("OK" if ok else "FAILED")
sys.exit(0 if ok else 1)
)PY";
  const RunResult py = run_args({python3(), script, tmp / "out"}, tmp.path());
  EXPECT_EQ(py.code, 0) << py.out << py.err;
  EXPECT_NE(py.out.find("OK"), std::string::npos) << py.out << py.err;
}

// The run record: JSON, the resolved configuration, and the input checksum equal
// to SHA-256 computed by Python's hashlib (FIPS PUB 180-4; independent code).
TEST(Outputs, RunRecord) {
  TempDir tmp("record");
  const std::string img = write_field(tmp, 12);
  const RunResult r = run_skerry({"extract", img, "--out", tmp / "out", "--detect.peak_snr", "6"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  // One plain summary line when not on a terminal.
  EXPECT_EQ(std::count(r.out.begin(), r.out.end(), '\n'), 1) << r.out;
  EXPECT_NE(r.out.find("components"), std::string::npos) << r.out;
  EXPECT_EQ(r.err, "") << "no progress output when stderr is not a terminal";
  const auto j = nlohmann::json::parse(slurp(tmp / "out/field.run.json"));
  EXPECT_EQ(j["configuration"]["detect.peak_snr"], "6");
  EXPECT_EQ(j["configuration"]["detect.grow_snr"], "3");
  ASSERT_EQ(j["inputs"].size(), 1u);
  const RunResult py = run_args({python3(), "-c",
                                 "import hashlib,sys; print(hashlib.sha256(open(sys.argv[1],'rb').read()).hexdigest())",
                                 img},
                                tmp.path());
  ASSERT_EQ(py.code, 0) << py.err;
  EXPECT_EQ(j["inputs"][0]["sha256"].get<std::string>() + "\n", py.out);
  const Table comps = read_table(tmp / "out/field.components.csv");
  EXPECT_EQ(j["counts"]["components"].get<std::int64_t>(), static_cast<std::int64_t>(comps.rows()));
  std::vector<std::string> stages;
  for (const auto& s : j["stages"]) stages.push_back(s["stage"]);
  for (const char* s : {"read", "noise_pass1", "islands_pass1", "noise_pass2", "islands", "fit", "catalogue", "write"})
    EXPECT_NE(std::find(stages.begin(), stages.end(), s), stages.end()) << "stage " << s;
  EXPECT_TRUE(j.contains("host"));
  EXPECT_TRUE(j.contains("started_utc"));
  // Time stamps and host names only in the run record (docs/CONVENTIONS.md "Determinism").
  const std::string host = j["host"];
  for (const auto& f : list_files(tmp / "out")) {
    if (f.ends_with(".run.json")) continue;
    const std::string bytes = slurp(tmp / ("out/" + f));
    if (host.size() > 3) {
      EXPECT_EQ(bytes.find(host), std::string::npos) << f << " holds the host name";
    }
  }
}

// docs/CONVENTIONS.md "Determinism": byte-identical catalogues and images for any thread
// count (the run record differs: timings, thread count).
TEST(Outputs, ResidualIsImageMinusModelWithTheBackgroundKept) {
  // The documented definition (README, "What skerry extract writes"): residual =
  // image - model, where the model is the sum of the fitted Gaussians and the
  // background stays in the residual. A smooth 0.3 mJy/beam background (3 x the
  // rms) is added to the field so that the two candidate definitions differ.
  TempDir tmp("residual");
  const std::string img = write_field(tmp, 21);
  SkyImage sky = read_sky_image(img);
  const long n = sky.pixels.cols();
  for (long y = 0; y < n; ++y)
    for (long x = 0; x < n; ++x) sky.pixels(y, x) += 3e-4f * (1.0f + 0.2f * std::sin(0.01f * static_cast<float>(x + y)));
  write_fits_image(img, sky.pixels, sky);
  const RunResult r = run_skerry({"extract", img, "--out", tmp / "out"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  const SkyImage im = read_sky_image(img);
  const ImageF res = read_sky_image(tmp / "out/field.residual_map.fits").pixels;
  const ImageF mod = read_sky_image(tmp / "out/field.model_map.fits").pixels;
  const ImageF bg = read_sky_image(tmp / "out/field.background_map.fits").pixels;
  double worst = 0.0, mean_res = 0.0, mean_bg = 0.0, model_sum = 0.0;
  for (Eigen::Index i = 0; i < im.pixels.size(); ++i) {
    // float32 image - float32 model, rounded once: exact to half an ulp of the image.
    worst = std::max(worst, std::fabs(static_cast<double>(res.data()[i]) -
                                      (static_cast<double>(im.pixels.data()[i]) - mod.data()[i])) /
                                (std::fabs(static_cast<double>(im.pixels.data()[i])) + 1e-12));
    mean_res += res.data()[i];
    mean_bg += bg.data()[i];
    model_sum += mod.data()[i];
  }
  mean_res /= static_cast<double>(im.pixels.size());
  mean_bg /= static_cast<double>(im.pixels.size());
  EXPECT_LT(worst, 1e-6);
  EXPECT_GT(model_sum, 0.0) << "no model: the check above would be trivial";
  EXPECT_NEAR(mean_res, mean_bg, 0.2 * mean_bg) << "the residual should keep the background";
  EXPECT_GT(mean_bg, 2.5e-4) << "the background map should hold the added 0.3 mJy/beam";

  // The report, when the input image is gone, rebuilds it as residual + model.
  fs::remove(img);
  const RunResult rep = run_skerry({"report", tmp / "out"}, tmp.path());
  ASSERT_EQ(rep.code, 0) << rep.err;
  const std::string html = slurp(tmp / "out/field.report.html");
  // The map viewer's buttons: one per map shown.
  EXPECT_NE(html.find("id=\"vw-btn-residual\""), std::string::npos);
  EXPECT_NE(html.find("id=\"vw-btn-image\""), std::string::npos) << "image not rebuilt from residual + model";
  EXPECT_EQ(html.find("input image not found"), std::string::npos) << "image not rebuilt from residual + model";
}

TEST(Outputs, IdenticalForAnyThreadCount) {
  TempDir tmp("threads");
  const std::string img = write_field(tmp, 13);
  std::vector<std::string> ref_files;
  for (const char* th : {"1", "2", "8"}) {
    const std::string out = tmp / (std::string("out") + th);
    const RunResult r = run_skerry({"extract", img, "--out", out, "--threads", th}, tmp.path());
    ASSERT_EQ(r.code, 0) << r.err;
    const auto files = list_files(out);
    if (ref_files.empty()) {
      ref_files = files;
      EXPECT_GE(files.size(), 14u);
      continue;
    }
    EXPECT_EQ(files, ref_files);
    for (const auto& f : files) {
      if (f.ends_with(".run.json")) continue;
      EXPECT_TRUE(comparable_bytes(out + "/" + f) == comparable_bytes(tmp / ("out1/" + f)))
          << f << " differs with " << th << " threads";
    }
  }
}

// Map storage (README, "Output maps"; FITS Standard 4.0 sec. 10 tiled image
// compression, REF-FITS-06): the default storage against every map stored plain.
// The catalogues are the same bytes; lossless maps read back bit for bit; the
// quantised rms and background maps within half the documented step (the
// smallest rms x output.quantise_step); and the maps take less room.
TEST(Outputs, MapStorageKeepsTheCataloguesAndTheDocumentedPrecision) {
  TempDir tmp("storage");
  const std::string img = write_field(tmp, 14);
  const std::string all_plain = "rms:plain,background:plain,islands:plain,model:plain,residual:plain";
  RunResult r = run_skerry({"extract", img, "--out", tmp / "plain", "--output.map_storage", all_plain}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  r = run_skerry({"extract", img, "--out", tmp / "packed"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  // CSV tables: the same bytes. (FITS and VOTable tables carry the resolved
  // configuration, which names the storage; their columns are compared below.)
  for (const char* kind : {"components", "islands", "sources"}) {
    const std::string f = std::string("field.") + kind + ".csv";
    EXPECT_TRUE(slurp(tmp / ("plain/" + f)) == slurp(tmp / ("packed/" + f))) << f;
  }
  // The maps and the other tables, read by an independent reader (astropy): raw
  // values compared bit for bit (lossless) or against half the documented step
  // (quantised: output.quantise_step's default 0.004 x the smallest rms).
  const std::string script = tmp / "maps.py";
  std::ofstream(script) << R"PY(
import sys
import numpy as np
from astropy.io import fits
from astropy.table import Table
a, b = sys.argv[1], sys.argv[2]
ok = True
def fail(msg):
    global ok
    ok = False
    print("FAIL", msg)
def image(path):
    with fits.open(path) as h:
        hdu = [x for x in h if x.data is not None][0]
        return np.asarray(hdu.data).astype(hdu.data.dtype.newbyteorder("=")), isinstance(hdu, fits.CompImageHDU)
rms, _ = image(f"{a}/field.rms_map.fits")
half_step = 0.5 * 0.004 * np.nanmin(rms[rms > 0])
plain_bytes = packed_bytes = 0
import os
for m, how in (("rms_map", "quantised"), ("background_map", "quantised"), ("island_map", "lossless"),
               ("model_map", "lossless"), ("residual_map", "plain")):
    x, xc = image(f"{a}/field.{m}.fits")
    y, yc = image(f"{b}/field.{m}.fits")
    plain_bytes += os.path.getsize(f"{a}/field.{m}.fits")
    packed_bytes += os.path.getsize(f"{b}/field.{m}.fits")
    if xc: fail(f"{m}: the all-plain run wrote a compressed map")
    if yc != (how != "plain"): fail(f"{m}: compressed {yc}, expected {how}")
    if x.shape != y.shape: fail(f"{m}: shapes differ"); continue
    if how != "quantised":
        if not np.array_equal(x.view(np.uint32), y.view(np.uint32)): fail(f"{m}: bits differ")
        continue
    fin = np.isfinite(x)
    if not np.array_equal(fin, np.isfinite(y)): fail(f"{m}: blank pixels differ")
    worst = np.max(np.abs(x[fin].astype(float) - y[fin].astype(float)))
    # float32 rounding of the restored value: one ulp of the largest value.
    tol = half_step + np.spacing(np.float32(np.max(np.abs(x[fin]))))
    if not (worst <= tol): fail(f"{m}: worst difference {worst} > half a step {half_step}")
    if not (worst > 0): fail(f"{m}: not quantised at all")
if not (packed_bytes < 0.5 * plain_bytes): fail(f"maps take {packed_bytes} bytes, plain {plain_bytes}")
for kind in ("components", "islands", "sources"):
    for ext, fmt in ((".fits", None), (".vot", "votable")):
        t1 = Table.read(f"{a}/field.{kind}{ext}", format=fmt) if fmt else Table.read(f"{a}/field.{kind}{ext}")
        t2 = Table.read(f"{b}/field.{kind}{ext}", format=fmt) if fmt else Table.read(f"{b}/field.{kind}{ext}")
        if t1.colnames != t2.colnames or len(t1) != len(t2): fail(f"{kind}{ext}: shape differs"); continue
        for c in t1.colnames:
            u, v = np.asarray(t1[c]), np.asarray(t2[c])
            same = np.array_equal(u, v, equal_nan=True) if u.dtype.kind == "f" else np.array_equal(u, v)
            if not same: fail(f"{kind}{ext}: column {c} differs")
print("OK" if ok else "FAILED")
sys.exit(0 if ok else 1)
)PY";
  const RunResult py = run_args({python3(), script, tmp / "plain", tmp / "packed"}, tmp.path());
  EXPECT_EQ(py.code, 0) << py.out << py.err;
  EXPECT_NE(py.out.find("OK"), std::string::npos) << py.out << py.err;
}

// The maps as written are inputs again (--noise.rms_map, --noise.background_map):
// read back lossless they give the very catalogue; read back quantised, the same
// sources with flux densities within a small fraction of their errors.
TEST(Outputs, StoredMapsReadBackAsNoiseMaps) {
  TempDir tmp("readback");
  const std::string img = write_field(tmp, 15);
  const std::string lossless = "rms:lossless,background:lossless";
  RunResult r = run_skerry({"extract", img, "--out", tmp / "a", "--output.map_storage", lossless}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  r = run_skerry({"extract", img, "--out", tmp / "q"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  auto rerun = [&](const std::string& from, const std::string& out) {
    const RunResult rr = run_skerry({"extract", img, "--out", tmp / out, "--noise.rms_map",
                                     tmp / (from + "/field.rms_map.fits"), "--noise.background_map",
                                     tmp / (from + "/field.background_map.fits")},
                                    tmp.path());
    EXPECT_EQ(rr.code, 0) << rr.err;
    return read_table(tmp / (out + "/field.components.csv"));
  };
  const Table first = read_table(tmp / "a/field.components.csv");
  const Table again = rerun("a", "a2");
  const Table quant = rerun("q", "q2");
  ASSERT_GT(first.rows(), 50u);
  ASSERT_EQ(again.rows(), first.rows());
  for (const char* c : {"ra_deg", "dec_deg", "s_peak_jy_per_beam", "s_int_jy", "s_int_err_jy"})
    for (std::size_t i = 0; i < first.rows(); ++i)
      EXPECT_EQ(again.at(c).f64[i], first.at(c).f64[i]) << c << " row " << i;
  // Quantised: the same sources; a pixel within half a step of the island
  // threshold can join or leave an island, which moves that island's fit by a
  // fraction of its error; the bulk does not move. Components of islands that
  // the residual search decomposed (info bit 16, residual_components: a faint
  // component split off a bright one shares its pixels with it) move more, up
  // to half their error (and their errors by a quarter), and are counted apart.
  ASSERT_EQ(quant.rows(), first.rows());
  std::size_t moved = 0, plain = 0;
  for (std::size_t i = 0; i < first.rows(); ++i) {
    const double err = first.at("s_int_err_jy").f64[i];
    const double d = std::fabs(quant.at("s_int_jy").f64[i] - first.at("s_int_jy").f64[i]);
    const bool decomposed = (first.at("info_bits").i64[i] & 16) != 0;
    EXPECT_EQ(quant.at("info_bits").i64[i] & 16, first.at("info_bits").i64[i] & 16) << "row " << i;
    EXPECT_LT(d, (decomposed ? 0.5 : 0.25) * err) << "row " << i;
    EXPECT_NEAR(quant.at("s_int_err_jy").f64[i], err, (decomposed ? 0.25 : 0.05) * err) << "row " << i;
    if (decomposed) continue;
    ++plain;
    if (d > 0.02 * err) ++moved;
  }
  ASSERT_GT(plain, first.rows() / 2);
  EXPECT_LE(moved, plain / 20) << "more than 5 % of the flux densities moved by over 2 % of their error";
}

TEST(Outputs, MapStorageOptionErrorsNameTheOption) {
  TempDir tmp("storage_opts");
  const std::string img = write_field(tmp, 16);
  for (const char* bad : {"islands:quantised", "model:quantised", "noise:plain", "rms:zip", "rms"}) {
    const RunResult r = run_skerry({"extract", img, "--out", tmp / "o", "--output.map_storage", bad}, tmp.path());
    EXPECT_EQ(r.code, kExitUsage) << bad;
    EXPECT_NE(r.err.find("output.map_storage"), std::string::npos) << r.err;
    EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
  }
  const RunResult r = run_skerry({"extract", img, "--out", tmp / "o", "--output.quantise_step", "0"}, tmp.path());
  EXPECT_EQ(r.code, kExitUsage);
  EXPECT_NE(r.err.find("output.quantise_step"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(tmp / "o")) << "nothing written on a usage error";
}

// A second run into the same folder replaces the first as a whole (README, "What
// skerry extract writes"): the first run's files that the second does not write
// (here the FITS/VOTable tables and the residual) and the first run's report
// page are gone, a file that no run wrote is kept, and a staging folder left by a killed run (its process gone) is
// removed while one of a live process stays.
TEST(Outputs, ASecondRunNeverLeavesTheFirstRunsFilesBeside) {
  TempDir tmp("rerun");
  const std::string img = write_field(tmp, 17);
  const std::string out = tmp / "out";
  RunResult r = run_skerry({"extract", img, "--out", out}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  ASSERT_TRUE(fs::exists(out + "/field.components.vot"));
  std::ofstream(out + "/notes.txt") << "mine\n";
  std::ofstream(out + "/field.report.html") << "the first run's page\n";  // as `skerry report` would leave it
  const pid_t child = fork();
  if (child == 0) _exit(0);
  ASSERT_GT(child, 0);
  waitpid(child, nullptr, 0);  // a PID that no longer exists
  const std::string dead = out + "/.field.extract-" + std::to_string(child) + ".partial";
  const std::string live = out + "/.field.extract-" + std::to_string(getppid()) + ".partial";
  fs::create_directories(dead);
  std::ofstream(dead + "/field.model_map.fits") << "half-written";
  fs::create_directories(live);
  r = run_skerry({"extract", img, "--out", out, "--output.formats", "csv", "--output.residual", "false"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  const std::vector<std::string> expected = {
      ".field.extract-" + std::to_string(getppid()) + ".partial", "field.background_map.fits",
      "field.components.csv", "field.island_map.fits", "field.islands.csv", "field.model_map.fits",
      "field.rms_map.fits", "field.run.json", "field.sources.csv", "notes.txt"};
  std::vector<std::string> have;
  for (const auto& e : fs::directory_iterator(out)) have.push_back(e.path().filename().string());
  std::sort(have.begin(), have.end());
  EXPECT_EQ(have, expected);
}

// configs/extract.ini documents every option with its default: running with it
// must give the same bytes as running without it.
TEST(Outputs, DocumentedConfigIsTheDefault) {
  TempDir tmp("config");
  const std::string img = write_field(tmp, 14);
  RunResult r = run_skerry({"extract", img, "--out", tmp / "a"}, tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  r = run_skerry({"extract", img, "--out", tmp / "b", "--config", std::string(SKERRY_SOURCE_DIR) + "/configs/extract.ini"},
                 tmp.path());
  ASSERT_EQ(r.code, 0) << r.err;
  auto ja = nlohmann::json::parse(slurp(tmp / "a/field.run.json"));
  auto jb = nlohmann::json::parse(slurp(tmp / "b/field.run.json"));
  ja["configuration"].erase("out");
  jb["configuration"].erase("out");
  EXPECT_EQ(ja["configuration"], jb["configuration"]);
  for (const auto& f : list_files(tmp / "a")) {
    if (f.ends_with(".run.json")) continue;
    EXPECT_TRUE(comparable_bytes(tmp / ("a/" + f)) == comparable_bytes(tmp / ("b/" + f))) << f;
  }
}

}  // namespace
}  // namespace skerry::test
