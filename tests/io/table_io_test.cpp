// read_table / write_table through files, and every format re-read by an
// independent reader: astropy (Debian's python3-astropy) — astropy.io.votable
// .parse(verify='exception') validates the VOTable, astropy.table.Table.read and
// astropy.io.fits read the FITS binary table (FITS Standard 4.0, sec. 7.3).
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>

#include "app/errors.h"
#include "io/table_io.h"
#include "skerry/table_text.h"
#include "skerry_test_support.h"

using namespace skerry;
namespace fs = std::filesystem;

namespace {

fs::path temp_dir(const std::string& name) {
  fs::path d = fs::temp_directory_path() / ("skerry_table_io_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

Table demo_table() {
  Table t;
  t.name = "components";
  t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "Right ascension (ICRS)", {201.25, 201.3, std::nan("")});
  t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "Declination (ICRS)", {-38.6, -38.55, 1e-300});
  t.add_f64("s_int_jy", "Jy", "phot.flux.density", "Integrated flux density", {0.0125, 3.0, -1.5e-6});
  t.add_i64("component_id", "", "meta.id", "Component number", {1, 2, 9007199254740993LL});
  t.add_text("designation", "", "meta.id", "Designation", {"SKDC J132500-383600", "it's", ""});
  t.set_meta("tool_version", "0.1.0");
  t.set_meta("config.detect.peak_snr",
             "5.0 and a long value that needs more than one FITS card to hold it, so CONTINUE cards are used here");
  return t;
}

int run(const std::string& cmd, std::string* out = nullptr) { return skerry::test::shell_capture(cmd, out); }

}  // namespace

TEST(TableIo, RoundTripAllFormats) {
  fs::path d = temp_dir("rt");
  Table t = demo_table();
  for (const char* ext : {".csv", ".fits", ".vot"}) {
    std::string p = (d / (std::string("t") + ext)).string();
    write_table(t, p);
    Table r = read_table(p);
    ASSERT_EQ(r.ncols(), t.ncols()) << ext;
    ASSERT_EQ(r.rows(), t.rows()) << ext;
    for (std::size_t j = 0; j < t.ncols(); ++j) {
      const Column& a = t.columns()[j];
      const Column& b = r.columns()[j];
      EXPECT_EQ(a.name, b.name);
      if (std::string(ext) != ".csv") {  // CSV carries no units or UCDs
        EXPECT_EQ(a.unit, b.unit) << ext << " " << a.name;
        EXPECT_EQ(a.ucd, b.ucd) << ext << " " << a.name;
        EXPECT_EQ(a.description, b.description) << ext << " " << a.name;
      }
      ASSERT_EQ(static_cast<int>(a.type), static_cast<int>(b.type)) << ext << " " << a.name;
      for (std::size_t i = 0; i < t.rows(); ++i) {
        if (a.type == ColumnType::Float64) {
          if (std::isnan(a.f64[i])) EXPECT_TRUE(std::isnan(b.f64[i]));
          else EXPECT_EQ(a.f64[i], b.f64[i]) << ext << " " << a.name;
        } else if (a.type == ColumnType::Int64) {
          EXPECT_EQ(a.i64[i], b.i64[i]);
        } else {
          EXPECT_EQ(a.text[i], b.text[i]);
        }
      }
    }
    if (std::string(ext) == ".vot") {
      ASSERT_NE(r.get_meta("config.detect.peak_snr"), nullptr);
      EXPECT_EQ(*r.get_meta("config.detect.peak_snr"), *t.get_meta("config.detect.peak_snr"));
    }
    if (std::string(ext) == ".fits") {
      // FITS keyword names are upper-cased by CFITSIO (FITS keywords are case-insensitive).
      ASSERT_NE(r.get_meta("CONFIG.DETECT.PEAK_SNR"), nullptr);
      EXPECT_EQ(*r.get_meta("CONFIG.DETECT.PEAK_SNR"), *t.get_meta("config.detect.peak_snr"));
    }
  }
  // No temporary files left behind.
  for (const auto& e : fs::directory_iterator(d)) EXPECT_NE(e.path().filename().string()[0], '.');
  fs::remove_all(d);
}

TEST(TableIo, AstropyReadsAndValidatesEveryFormat) {
  fs::path d = temp_dir("astropy");
  Table t = demo_table();
  write_table(t, (d / "t.csv").string());
  write_table(t, (d / "t.fits").string());
  write_table(t, (d / "t.vot").string());
  const std::string script = (d / "check.py").string();
  {
    std::ofstream py(script);
    py << R"PY(
import sys, math, warnings
warnings.simplefilter('error')          # any astropy warning fails the check
from astropy.io.votable import parse
from astropy.table import Table
from astropy.io import fits
import numpy as np
d = sys.argv[1]
names = ['ra_deg', 'dec_deg', 's_int_jy', 'component_id', 'designation']
units = ['deg', 'deg', 'Jy', None, None]
ucds = ['pos.eq.ra;meta.main', 'pos.eq.dec;meta.main', 'phot.flux.density', 'meta.id', 'meta.id']
vals = {'ra_deg': [201.25, 201.3, float('nan')], 'dec_deg': [-38.6, -38.55, 1e-300],
        's_int_jy': [0.0125, 3.0, -1.5e-6], 'component_id': [1, 2, 9007199254740993]}
def same(col, expect):
    for a, b in zip(col, expect):
        if isinstance(b, float) and math.isnan(b):
            assert np.ma.is_masked(a) or math.isnan(a), (a, b)
        else:
            assert a == b, (a, b)
vt = parse(d + '/t.vot', verify='exception')
tab = vt.get_first_table()
assert [f.name for f in tab.fields] == names
assert [f.ucd for f in tab.fields] == ucds, [f.ucd for f in tab.fields]
assert [None if f.unit is None else str(f.unit) for f in tab.fields] == units
at = tab.to_table()
for k, v in vals.items(): same(at[k], v)
assert list(at['designation'])[:2] == ['SKDC J132500-383600', "it's"]
ft = Table.read(d + '/t.fits')
assert ft.colnames == names
assert [None if ft[n].unit is None else str(ft[n].unit) for n in names] == units
for k, v in vals.items(): same(ft[k], v)
h = fits.getheader(d + '/t.fits', 1)
assert [h['TUCD%d' % (i + 1)] for i in range(5)] == ucds
assert h['TDESC1'] == 'Right ascension (ICRS)'
assert h['HIERARCH TOOL_VERSION'] == '0.1.0'
assert h['HIERARCH CONFIG.DETECT.PEAK_SNR'].startswith('5.0 and a long value') and h['HIERARCH CONFIG.DETECT.PEAK_SNR'].endswith('are used here')
with fits.open(d + '/t.fits', checksum=True) as f: pass   # CHECKSUM/DATASUM verified
ct = Table.read(d + '/t.csv', format='ascii.csv')
assert ct.colnames == names
for k, v in vals.items(): same(ct[k], v)
print('ok')
)PY";
  }
  std::string out;
  int rc = run("/usr/bin/python3 " + script + " " + d.string(), &out);
  EXPECT_EQ(rc, 0) << out;
  EXPECT_NE(out.find("ok"), std::string::npos) << out;
  fs::remove_all(d);
}

TEST(TableIo, ReadsForeignFitsTable) {
  // A table written by astropy: int16 with TNULL, float32, bool, string and a
  // vector column (skipped, listed in meta).
  fs::path d = temp_dir("foreign");
  std::string p = (d / "ext.fits").string();
  std::string out;
  int rc = run("/usr/bin/python3 -c \"\nimport numpy as np\nfrom astropy.io import fits\n"
               "c1 = fits.Column(name='RAJ2000', format='E', unit='deg', array=np.array([1.5, 2.5], dtype='f4'))\n"
               "c2 = fits.Column(name='N', format='I', null=-1, array=np.array([-1, 7], dtype='i2'))\n"
               "c3 = fits.Column(name='OK', format='L', array=np.array([True, False]))\n"
               "c4 = fits.Column(name='LABEL', format='6A', array=np.array(['ab', 'cdef']))\n"
               "c5 = fits.Column(name='VEC', format='3D', array=np.zeros((2, 3)))\n"
               "fits.BinTableHDU.from_columns([c1, c2, c3, c4, c5]).writeto('" + p + "')\n\"", &out);
  ASSERT_EQ(rc, 0) << out;
  Table t = read_table(p);
  ASSERT_EQ(t.rows(), 2u);
  EXPECT_EQ(t.at("RAJ2000").f64[1], 2.5);
  EXPECT_EQ(t.at("RAJ2000").unit, "deg");
  ASSERT_EQ(t.at("N").type, ColumnType::Float64);  // null -> NaN
  EXPECT_TRUE(std::isnan(t.at("N").f64[0]));
  EXPECT_EQ(t.at("N").f64[1], 7.0);
  EXPECT_EQ(t.at("OK").i64[0], 1);
  EXPECT_EQ(t.at("LABEL").text[1], "cdef");
  EXPECT_EQ(t.find("VEC"), nullptr);
  ASSERT_NE(t.get_meta("skipped_columns"), nullptr);
  EXPECT_EQ(*t.get_meta("skipped_columns"), "VEC");
  fs::remove_all(d);
}

TEST(TableIo, ErrorsNameTheFile) {
  fs::path d = temp_dir("err");
  const std::string bad = (d / "bad.csv").string();
  std::ofstream(bad) << "ra,dec\n1,2\n3,4,5\n";
  try {
    read_table(bad);
    FAIL();
  } catch (const InputError& e) {
    const std::string m = e.what();
    EXPECT_EQ(m.rfind(bad, 0), 0u) << m;
    EXPECT_NE(m.find("row 2"), std::string::npos) << m;
  }
  EXPECT_THROW(read_table((d / "missing.csv").string()), InputError);
  EXPECT_THROW(read_table((d / "missing.fits").string()), InputError);
  const std::string notfits = (d / "junk.fits").string();
  std::ofstream(notfits) << "this is not FITS";
  EXPECT_THROW(read_table(notfits), InputError);
  EXPECT_THROW(read_table((d / "t.txt").string()), UsageError);
  EXPECT_THROW(write_table(demo_table(), (d / "t.txt").string()), UsageError);
  fs::remove_all(d);
}
