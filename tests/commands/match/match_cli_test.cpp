// `skerry match` end to end: nearest neighbours identical to astropy's
// SkyCoord.match_to_catalog_sky (Debian's python3-astropy), the same result
// from CSV, FITS and VOTable inputs, sexagesimal and Galactic positions (ERFA
// eraIcrs2g/eraG2icrs, IAU SOFA), bad input with clear errors, and identical
// outputs for 1 and 2 threads; the likelihood_ratio mode and the exclusive
// sigma_scaled mode through the command line.
#include <erfa.h>
#include <erfam.h>
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <random>
#include <numeric>
#include <set>
#include <sstream>

#include "io/table_io.h"
#include "skerry/likelihood_ratio.h"
#include "skerry/simulate.h"
#include "skerry/table.h"
#include "skerry/table_text.h"
#include "skerry_test_support.h"

using namespace skerry;
namespace fs = std::filesystem;

namespace {

fs::path temp_dir(const std::string& name) {
  fs::path d = fs::temp_directory_path() / ("skerry_match_cli_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

int run(const std::string& cmd, std::string* out = nullptr) { return skerry::test::shell_capture(cmd, out); }

using skerry::test::slurp;

/// Random catalogue in the Lanternfish Field (RA 201.25, Dec -38.6), 1 x 1 deg.
Table field(std::mt19937_64& g, std::size_t n, const std::string& prefix) {
  std::uniform_real_distribution<double> u(-0.5, 0.5);
  Table t;
  t.name = prefix;
  std::vector<double> ra, dec, f;
  std::vector<std::int64_t> id;
  for (std::size_t i = 0; i < n; ++i) {
    dec.push_back(-38.6 + u(g));
    ra.push_back(201.25 + u(g) / std::cos(38.6 * ERFA_DD2R));
    f.push_back(0.001 * (2.0 + u(g)));
    id.push_back(static_cast<std::int64_t>(i) + 1);
  }
  t.add_i64(prefix + "_id", "", "meta.id", "row number", id);
  t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "Right ascension (ICRS)", ra);
  t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "Declination (ICRS)", dec);
  t.add_f64("s_int_jy", "Jy", "phot.flux.density", "Integrated flux density", f);
  return t;
}

const std::string kBin = SKERRY_BINARY;

}  // namespace

TEST(MatchCli, NearestIdenticalToAstropy) {
  fs::path d = temp_dir("astropy");
  std::mt19937_64 g(42);
  Table a = field(g, 3000, "a"), b = field(g, 3000, "b");
  write_table(a, (d / "a.csv").string());
  write_table(b, (d / "b.csv").string());
  // Radius large enough that most rows match (density 3000/deg^2, r = 40").
  ASSERT_EQ(run(kBin + " match " + (d / "a.csv").string() + " " + (d / "b.csv").string() + " --out " + d.string() +
                " --match.radius_arcsec 40 --match.chance_shifts 0"),
            0);
  Table m = read_table((d / "a_b.matches.csv").string());
  std::ofstream(d / "nn.py") << R"PY(
import sys, numpy as np
from astropy.coordinates import SkyCoord
import astropy.units as u
from astropy.table import Table
d = sys.argv[1]
a = Table.read(d + '/a.csv', format='ascii.csv'); b = Table.read(d + '/b.csv', format='ascii.csv')
ca = SkyCoord(a['ra_deg'] * u.deg, a['dec_deg'] * u.deg); cb = SkyCoord(b['ra_deg'] * u.deg, b['dec_deg'] * u.deg)
idx, d2d, _ = ca.match_to_catalog_sky(cb)
with open(d + '/nn.txt', 'w') as f:
    for i, s in zip(idx, d2d.arcsec): f.write('%d %.17g\n' % (i, s))
)PY";
  std::string out;
  ASSERT_EQ(run("/usr/bin/python3 " + (d / "nn.py").string() + " " + d.string(), &out), 0) << out;
  std::ifstream nn(d / "nn.txt");
  std::vector<std::int64_t> ai(3000);
  std::vector<double> as(3000);
  for (std::size_t i = 0; i < 3000; ++i) nn >> ai[i] >> as[i];
  const Column& ra = m.at("row_a");
  const Column& rb = m.at("row_b");
  const Column& sep = m.at("sep_arcsec");
  std::vector<std::int64_t> ours(3000, -1);
  std::vector<double> our_sep(3000, -1);
  for (std::size_t k = 0; k < m.rows(); ++k) {
    ours[ra.i64[k]] = rb.i64[k];
    our_sep[ra.i64[k]] = sep.f64[k];
  }
  std::size_t compared = 0;
  for (std::size_t i = 0; i < 3000; ++i) {
    if (as[i] <= 40.0 - 1e-6) {
      ASSERT_EQ(ours[i], ai[i]) << "row " << i;
      EXPECT_NEAR(our_sep[i], as[i], 1e-8) << "row " << i;
      ++compared;
    } else if (as[i] > 40.0 + 1e-6) {
      EXPECT_EQ(ours[i], -1) << "row " << i;
    }
  }
  EXPECT_GT(compared, 2000u);
  fs::remove_all(d);
}

TEST(MatchCli, SameResultFromEveryFormatAndThreadCount) {
  fs::path d = temp_dir("formats");
  std::mt19937_64 g(43);
  Table a = field(g, 2000, "a"), b = field(g, 2000, "b");
  write_table(a, (d / "a.csv").string());
  write_table(b, (d / "b.csv").string());
  write_table(a, (d / "a.fits").string());
  write_table(b, (d / "b.vot").string());
  const std::string common = " --match.radius_arcsec 30 --match.mode one_to_one --match.name m --match.unmatched true";
  ASSERT_EQ(run(kBin + " match " + (d / "a.csv").string() + " " + (d / "b.csv").string() + " --out " +
                (d / "o1").string() + common + " --threads 1"),
            0);
  ASSERT_EQ(run(kBin + " match " + (d / "a.csv").string() + " " + (d / "b.csv").string() + " --out " +
                (d / "o2").string() + common + " --threads 2"),
            0);
  ASSERT_EQ(run(kBin + " match " + (d / "a.fits").string() + " " + (d / "b.vot").string() + " --out " +
                (d / "o3").string() + common + " --threads 2 --match.formats csv,fits,vot"),
            0);
  for (const char* f : {"m.matches.csv", "m.unmatched_a.csv", "m.unmatched_b.csv"}) {
    const std::string x = slurp(d / "o1" / f);
    EXPECT_FALSE(x.empty());
    EXPECT_EQ(x, slurp(d / "o2" / f)) << f;
    EXPECT_EQ(x, slurp(d / "o3" / f)) << f;
  }
  // The summary differs only in the input file names/checksums between o1 and o3.
  EXPECT_EQ(slurp(d / "o1" / "m.match_summary.json"), slurp(d / "o2" / "m.match_summary.json"));
  // Every match output re-read by astropy, the VOTable validated.
  std::string out;
  EXPECT_EQ(run("/usr/bin/python3 -W error -c \"\nfrom astropy.io.votable import parse\nfrom astropy.table import Table\n"
                "v = parse('" + (d / "o3" / "m.matches.vot").string() + "', verify='exception').get_first_table()\n"
                "f = Table.read('" + (d / "o3" / "m.matches.fits").string() + "')\n"
                "c = Table.read('" + (d / "o3" / "m.matches.csv").string() + "', format='ascii.csv')\n"
                "t = v.to_table()\n"
                "assert t.colnames == f.colnames == c.colnames\n"
                "assert str(t['sep_arcsec'].unit) == 'arcsec' and str(f['sep_arcsec'].unit) == 'arcsec'\n"
                "assert [x.ucd for x in v.fields][:3] == ['meta.id', 'meta.id.cross', 'pos.angDistance']\n"
                "assert (t['sep_arcsec'] == c['sep_arcsec']).all() and (f['b_dec_deg'] == c['b_dec_deg']).all()\n"
                "assert (t['row_b'] == f['row_b']).all() and len(t) > 100\n"
                "print('ok')\n\"",
                &out),
            0)
      << out;
  fs::remove_all(d);
}

// A VOTable with several TABLEs: FILE[SEL] picks one (0-based index or name, as
// astropy counts and names them), on either side of a match; the summary keeps
// the argument as given and the checksum of the file read (SHA-256 from Python's
// hashlib, FIPS PUB 180-4).
TEST(MatchCli, VotableSelectionOnTheCommandLine) {
  fs::path d = temp_dir("votsel");
  const std::string vot = std::string(SKERRY_TEST_DATA_DIR) + "/tables/astropy_two_tables.vot";
  std::string out;
  ASSERT_EQ(run(kBin + " match '" + vot + "[sources]' '" + vot + "[1]' --out " + (d / "o").string() +
                    " --match.name m 2>&1",
                &out),
            0)
      << out;
  const Table m = read_table((d / "o" / "m.matches.csv").string());
  EXPECT_EQ(m.rows(), 3u);  // the 3-row "sources" table against itself
  const std::string summary = slurp(d / "o" / "m.match_summary.json");
  EXPECT_NE(summary.find("astropy_two_tables.vot[sources]"), std::string::npos) << summary;
  std::string sha;
  ASSERT_EQ(run("/usr/bin/python3 -c \"import hashlib,sys; print(hashlib.sha256(open(sys.argv[1],'rb').read())"
                ".hexdigest(), end='')\" " + vot, &sha),
            0);
  ASSERT_EQ(sha.size(), 64u) << sha;
  EXPECT_NE(summary.find(sha), std::string::npos) << summary;
  // A selection on a format with one table is a usage error naming the argument.
  EXPECT_EQ(run(kBin + " match '" + vot + "[sources]' '" + (d / "o" / "m.matches.csv").string() + "[1]' --out " +
                    (d / "o2").string() + " 2>&1",
                &out),
            2)
      << out;
  EXPECT_NE(out.find("m.matches.csv[1]"), std::string::npos) << out;
  fs::remove_all(d);
}

TEST(MatchCli, SexagesimalAndGalacticInputs) {
  fs::path d = temp_dir("frames");
  std::mt19937_64 g(44);
  Table a = field(g, 500, "a");
  write_table(a, (d / "a.csv").string());
  // A again, as sexagesimal text (RA hours) and as Galactic coordinates made with
  // ERFA's eraIcrs2g: both must match A to itself at ~0 separation.
  std::ostringstream sx, gl;
  sx << "name,RAJ2000,DEJ2000\n";
  gl << "glon,glat\n";
  for (std::size_t i = 0; i < a.rows(); ++i) {
    const double ra = a.at("ra_deg").f64[i], dec = a.at("dec_deg").f64[i];
    const double h = ra / 15.0;
    const int hh = static_cast<int>(h), mm = static_cast<int>((h - hh) * 60);
    const double ss = ((h - hh) * 60 - mm) * 60;
    const double ad = std::fabs(dec);
    const int dd = static_cast<int>(ad), dm = static_cast<int>((ad - dd) * 60);
    const double ds = ((ad - dd) * 60 - dm) * 60;
    char buf[128];
    std::snprintf(buf, sizeof buf, "s%zu,%02d:%02d:%09.6f,%c%02d %02d %08.5f\n", i, hh, mm, ss, dec < 0 ? '-' : '+',
                  dd, dm, ds);
    sx << buf;
    double l, b;
    eraIcrs2g(ra * ERFA_DD2R, dec * ERFA_DD2R, &l, &b);
    gl << format_double(l * ERFA_DR2D) << "," << format_double(b * ERFA_DR2D) << "\n";
  }
  std::ofstream(d / "sx.csv") << sx.str();
  std::ofstream(d / "gal.csv") << gl.str();
  for (const char* other : {"sx.csv", "gal.csv"}) {
    std::string out;
    ASSERT_EQ(run(kBin + " match " + (d / "a.csv").string() + " " + (d / other).string() + " --out " + d.string() +
                      " --match.radius_arcsec 1 --match.chance_shifts 0",
                  &out),
              0)
        << out;
    Table m = read_table((d / ("a_" + std::string(fs::path(other).stem()) + ".matches.csv")).string());
    ASSERT_EQ(m.rows(), 500u) << other;
    for (std::size_t k = 0; k < m.rows(); ++k) {
      EXPECT_EQ(m.at("row_a").i64[k], m.at("row_b").i64[k]);
      // Sexagesimal text carries 1e-6 s of RA = 1.5e-5"; Galactic round trip ~1e-10".
      EXPECT_LT(m.at("sep_arcsec").f64[k], 2e-5) << other;
    }
  }
  fs::remove_all(d);
}

TEST(MatchCli, BadInputGivesClearErrors) {
  fs::path d = temp_dir("bad");
  std::ofstream(d / "good.csv") << "ra_deg,dec_deg\n201.25,-38.6\n201.3,-38.5\n";
  std::ofstream(d / "nocols.csv") << "x,y\n1,2\n";
  std::ofstream(d / "text.csv") << "ra_deg,dec_deg\n201.25,-38.6\n201.3,abc\n";
  std::ofstream(d / "range.csv") << "ra_deg,dec_deg\n201.25,-38.6\n201.3,95\n";
  std::ofstream(d / "empty.csv") << "ra_deg,dec_deg\n";
  std::ofstream(d / "blank.csv") << "";
  std::ofstream(d / "nan.csv") << "ra_deg,dec_deg\n201.25,-38.6\n,\n";
  const std::string good = (d / "good.csv").string();
  auto m = [&](const std::string& other, const std::string& extra, std::string& out) {
    return run(kBin + " match " + good + " " + (d / other).string() + " --out " + (d / "o").string() +
                   " --match.chance_shifts 0" + extra,
               &out);
  };
  std::string out;
  EXPECT_EQ(m("nocols.csv", "", out), 3);
  EXPECT_NE(out.find("nocols.csv: no RA"), std::string::npos) << out;
  EXPECT_EQ(m("text.csv", "", out), 3);
  EXPECT_NE(out.find("text.csv: row 2, column 'dec_deg'"), std::string::npos) << out;
  EXPECT_EQ(m("range.csv", "", out), 3);
  EXPECT_NE(out.find("outside [-90, 90]"), std::string::npos) << out;
  EXPECT_EQ(m("blank.csv", "", out), 3);
  EXPECT_NE(out.find("blank.csv"), std::string::npos) << out;
  EXPECT_EQ(m("missing.csv", "", out), 3);
  EXPECT_EQ(m("good.csv", " --match.mode bogus", out), 2);
  EXPECT_EQ(m("good.csv", " --match.radius_arcsec -1", out), 2);
  EXPECT_EQ(m("good.csv", " --match.mode sigma_scaled", out), 3);  // no error columns
  EXPECT_NE(out.find("positional error"), std::string::npos) << out;
  EXPECT_EQ(m("good.csv", " --match.ra_b nosuch", out), 3);
  EXPECT_NE(out.find("no column 'nosuch'"), std::string::npos) << out;
  // An empty catalogue is valid input: no matches, every row of A unmatched.
  EXPECT_EQ(m("empty.csv", " --match.name e --match.unmatched true", out), 0) << out;
  EXPECT_EQ(read_table((d / "o" / "e.matches.csv").string()).rows(), 0u);
  EXPECT_EQ(read_table((d / "o" / "e.unmatched_a.csv").string()).rows(), 2u);
  // Rows without a position are counted and never matched.
  EXPECT_EQ(m("nan.csv", " --match.name n", out), 0) << out;
  EXPECT_NE(out.find("1 rows without a position"), std::string::npos) << out;
  EXPECT_EQ(read_table((d / "o" / "n.matches.csv").string()).rows(), 1u);
  fs::remove_all(d);
}

TEST(MatchCli, SelfAndMultiModes) {
  fs::path d = temp_dir("self");
  // Two tiles overlapping: rows 0 and 2 are the same source 0.5" apart, row 3 a
  // third copy 0.9" from row 2 (a chain: one group of three).
  std::ofstream(d / "t.csv") << "ra_deg,dec_deg,s_int_jy,s_int_err_jy\n"
                             << "201.25,-38.6,0.010,0.001\n"
                             << "201.30,-38.6,0.020,0.001\n"
                             << format_double(201.25 + 0.5 / 3600 / std::cos(38.6 * ERFA_DD2R)) << ",-38.6,0.012,0.001\n"
                             << format_double(201.25 + 1.4 / 3600 / std::cos(38.6 * ERFA_DD2R)) << ",-38.6,0.014,0.001\n";
  std::string out;
  ASSERT_EQ(run(kBin + " match " + (d / "t.csv").string() + " --match.mode self --match.radius_arcsec 1 --out " +
                    d.string(),
                &out),
            0)
      << out;
  Table gr = read_table((d / "t.groups.csv").string());
  ASSERT_EQ(gr.rows(), 4u);
  EXPECT_EQ(gr.at("fof_group_id").i64, (std::vector<std::int64_t>{0, 1, 0, 0}));
  EXPECT_EQ(gr.at("fof_group_members").i64, (std::vector<std::int64_t>{3, 1, 3, 3}));
  // Multi: the same file as master and as three epochs.
  ASSERT_EQ(run(kBin + " match " + (d / "t.csv").string() + " " + (d / "t.csv").string() + " " +
                    (d / "t.csv").string() + " --match.mode multi --match.radius_arcsec 0.1 --match.name mm --out " +
                    d.string(),
                &out),
            0)
      << out;
  Table mm = read_table((d / "mm.multi.csv").string());
  ASSERT_EQ(mm.rows(), 4u);
  for (std::size_t i = 0; i < 4; ++i) {
    EXPECT_EQ(mm.at("n_catalogues").i64[i], 2);
    EXPECT_NEAR(mm.at("chi2_const").f64[i], 0.0, 1e-20);  // identical epochs: constant flux density
  }
  fs::remove_all(d);
}

TEST(MatchCli, LikelihoodRatioAndExclusiveModes) {
  // A simulated radio-optical field through the command line: the candidates
  // file holds exactly the module's result (checked against the truth in
  // counterparts_test.cpp), the magnitude can come from a flux column, the
  // outputs do not depend on the thread count, and bad input gives clear errors.
  fs::path d = temp_dir("lr");
  sim::CounterpartOptions co;
  co.density_deg2 = 1e5;
  sim::RadioOpticalField f = sim::draw_radio_optical_field(600, 201.25, -38.6, 0.4, 0.05, 0.3, 1.2, co, 77);
  Table ra;
  ra.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "RA", f.radio_ra_deg);
  ra.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "Dec", f.radio_dec_deg);
  ra.add_f64("ra_err_arcsec", "arcsec", "stat.error;pos.eq.ra", "error", f.radio_err_arcsec);
  ra.add_f64("dec_err_arcsec", "arcsec", "stat.error;pos.eq.dec", "error", f.radio_err_arcsec);
  write_table(ra, (d / "radio.csv").string());
  std::vector<std::int64_t> ids(600);
  std::iota(ids.begin(), ids.end(), std::int64_t{0});
  Table op = sim::counterpart_table(f.optical, ids);
  std::vector<double> flux;
  for (double m : f.optical.mag) flux.push_back(std::pow(10.0, -0.4 * m));
  op.add_f64("flux_rel", "", "phot.flux", "10^(-0.4 mag)", flux);
  write_table(op, (d / "optical.csv").string());
  const std::string base = kBin + " match " + (d / "radio.csv").string() + " " + (d / "optical.csv").string() +
                           " --out " + (d / "o").string() + " --match.chance_shifts 0 --match.mode likelihood_ratio";
  std::string out;
  ASSERT_EQ(run(base + " --threads 1 --match.name t1", &out), 0) << out;
  ASSERT_EQ(run(base + " --threads 2 --match.name t2", &out), 0) << out;
  EXPECT_NE(out.find("Q0 = "), std::string::npos) << out;
  for (const char* s : {".lr_candidates.csv", ".lr_magnitude_bins.csv", ".lr_q0_fit.csv"})
    EXPECT_EQ(slurp(d / "o" / (std::string("t1") + s)), slurp(d / "o" / (std::string("t2") + s))) << s;
  SkyPositions a, b;
  a.ra_deg = f.radio_ra_deg;
  a.dec_deg = f.radio_dec_deg;
  a.err_east_arcsec = a.err_north_arcsec = f.radio_err_arcsec;
  b.ra_deg = f.optical.ra_deg;
  b.dec_deg = f.optical.dec_deg;
  b.err_east_arcsec = b.err_north_arcsec = f.optical.err_arcsec;
  LikelihoodRatioResult r = likelihood_ratio_match(a, b, f.optical.mag, LikelihoodRatioOptions{});
  Table t = read_table((d / "o" / "t1.lr_candidates.csv").string());
  ASSERT_EQ(t.rows(), r.candidates.size());
  for (std::size_t q = 0; q < t.rows(); ++q) {
    EXPECT_EQ(t.at("row_a").i64[q], r.candidates[q].a);
    EXPECT_EQ(t.at("row_b").i64[q], r.candidates[q].b);
    EXPECT_NEAR(t.at("reliability").f64[q], r.candidates[q].reliability, 1e-12);
    EXPECT_EQ(t.at("best").i64[q], r.candidates[q].rank == 1 ? 1 : 0);
  }
  const std::string summary = slurp(d / "o" / "t1.match_summary.json");
  EXPECT_NE(summary.find("\"q0\""), std::string::npos);
  EXPECT_NE(summary.find("n_m_per_deg2_per_mag"), std::string::npos);
  // Flux column instead of a magnitude: -2.5 log10(10^(-0.4 m)) = m, the same candidates.
  ASSERT_EQ(run(base + " --match.lr_flux_b flux_rel --match.name fl", &out), 0) << out;
  Table tf = read_table((d / "o" / "fl.lr_candidates.csv").string());
  ASSERT_EQ(tf.rows(), t.rows());
  for (std::size_t q = 0; q < t.rows(); ++q) EXPECT_EQ(tf.at("row_b").i64[q], t.at("row_b").i64[q]);
  // Bad input.
  std::ofstream(d / "nomag.csv") << "ra_deg,dec_deg\n201.25,-38.6\n";
  EXPECT_EQ(run(kBin + " match " + (d / "radio.csv").string() + " " + (d / "nomag.csv").string() + " --out " +
                    (d / "o").string() + " --match.mode likelihood_ratio",
                &out),
            3);
  EXPECT_NE(out.find("nomag.csv: no magnitude column"), std::string::npos) << out;
  EXPECT_EQ(run(base + " --match.lr_q0 1.5", &out), 2);
  EXPECT_NE(out.find("match.lr_q0"), std::string::npos) << out;
  EXPECT_EQ(run(base + " --match.lr_mag_b mag --match.lr_flux_b flux_rel", &out), 2);
  // Exclusive sigma_scaled: no row of B twice; refused with other modes.
  const std::string ex = kBin + " match " + (d / "radio.csv").string() + " " + (d / "optical.csv").string() +
                         " --out " + (d / "o").string() + " --match.chance_shifts 0 --match.mode sigma_scaled";
  ASSERT_EQ(run(ex + " --match.exclusive true --match.name ex", &out), 0) << out;
  Table te = read_table((d / "o" / "ex.matches.csv").string());
  std::set<std::int64_t> used;
  for (auto v : te.at("row_b").i64) EXPECT_TRUE(used.insert(v).second);
  EXPECT_GT(te.rows(), 300u);
  // Exclusive by reliability: the reliability column, R above the threshold,
  // still one-to-one; Q0 and B's density in the summary.
  ASSERT_EQ(run(ex + " --match.exclusive true --match.exclusive_by reliability --match.name exr", &out), 0) << out;
  Table tr = read_table((d / "o" / "exr.matches.csv").string());
  ASSERT_TRUE(tr.find("reliability"));
  std::set<std::int64_t> used_r;
  for (std::size_t q = 0; q < tr.rows(); ++q) {
    EXPECT_TRUE(used_r.insert(tr.at("row_b").i64[q]).second);
    EXPECT_GT(tr.at("reliability").f64[q], 0.4);
    EXPECT_LE(tr.at("reliability").f64[q], 1.0);
  }
  EXPECT_GT(tr.rows(), 300u);
  const std::string sr = slurp(d / "o" / "exr.match_summary.json");
  EXPECT_NE(sr.find("\"exclusive_by\": \"reliability\""), std::string::npos) << sr;
  EXPECT_NE(sr.find("\"q0\""), std::string::npos) << sr;
  EXPECT_NE(sr.find("expected_false_pairs"), std::string::npos) << sr;
  EXPECT_EQ(run(ex + " --match.exclusive true --match.exclusive_by rank", &out), 2);
  EXPECT_NE(out.find("match.exclusive_by"), std::string::npos) << out;
  EXPECT_EQ(run(ex + " --match.exclusive_by reliability", &out), 2);
  EXPECT_NE(out.find("only with match.exclusive true"), std::string::npos) << out;
  EXPECT_EQ(run(ex + " --match.exclusive true --match.exclusive_by reliability --match.exclusive_min_reliability 1", &out), 2);
  EXPECT_NE(out.find("match.exclusive_min_reliability"), std::string::npos) << out;
  EXPECT_EQ(run(kBin + " match " + (d / "radio.csv").string() + " " + (d / "optical.csv").string() + " --out " +
                    (d / "o").string() + " --match.exclusive true",
                &out),
            2);
  EXPECT_NE(out.find("match.exclusive"), std::string::npos) << out;
  fs::remove_all(d);
}
