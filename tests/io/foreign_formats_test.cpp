// Catalogue files written by another library (astropy 5.2.1, Debian's
// python3-astropy; tests/data/tables/README.md) read by skerry's readers: VOTable
// TABLEDATA, BINARY and BINARY2 (IVOA VOTable 1.4, section 5; docs/REFERENCES.md
// REF-VO-01), a VOTable with two TABLEs chosen by index or name, and ECSV 1.0
// (REF-ECSV) with space and comma delimiters. The expected values are those
// make_tables.py gave astropy.
#include <gtest/gtest.h>

#include <cmath>
#include <fstream>
#include <sstream>
#include <string>

#include "app/errors.h"
#include "io/table_io.h"
#include "skerry/table_text.h"

namespace {

using skerry::ColumnType;
using skerry::Table;

std::string data(const std::string& name) { return std::string(SKERRY_TEST_DATA_DIR) + "/tables/" + name; }

std::string slurp(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

/// The table of make_tables.py, whatever the serialisation.
void expect_reference_table(const Table& t) {
  ASSERT_EQ(t.rows(), 3u);
  ASSERT_EQ(t.ncols(), 6u);
  const auto& name = t.at("name");
  ASSERT_EQ(name.type, ColumnType::Text);
  EXPECT_EQ(name.text[0], "SKDC J132500.0-383600");
  EXPECT_EQ(name.text[1], "with space, comma");
  EXPECT_EQ(name.text[2], "\xC3\xBC" "n\xC3\xAF" "code");  // "ünïcode" in UTF-8
  const auto& ra = t.at("ra_deg");
  ASSERT_EQ(ra.type, ColumnType::Float64);
  EXPECT_EQ(ra.unit, "deg");
  EXPECT_EQ(ra.f64[0], 201.25);
  EXPECT_EQ(ra.f64[1], 0.0);
  EXPECT_EQ(ra.f64[2], 359.999999999);  // float64 kept to the last bit
  EXPECT_EQ(t.at("dec_deg").f64[1], -89.5);
  const auto& flux = t.at("flux_jy");
  ASSERT_EQ(flux.type, ColumnType::Float64);
  EXPECT_EQ(flux.unit, "Jy");
  // float32: the binary serialisations carry its bits (widened exactly), the text
  // ones its shortest decimal ("0.0015"); both are the same float32.
  EXPECT_EQ(static_cast<float>(flux.f64[0]), 1.5e-3f);
  EXPECT_TRUE(std::isnan(flux.f64[1]));
  const auto& n = t.at("n_comp");
  ASSERT_EQ(n.type, ColumnType::Int64);
  EXPECT_EQ(n.i64[2], 30000);
  // A null in an integer column: the column becomes Float64 with NaN there.
  const auto& id = t.at("id");
  ASSERT_EQ(id.type, ColumnType::Float64);
  EXPECT_EQ(id.f64[0], 7.0);
  EXPECT_TRUE(std::isnan(id.f64[1]));
  EXPECT_EQ(id.f64[2], 9223372036854775807.0);
}

TEST(ForeignVotable, TabledataBinaryAndBinary2GiveTheSameTable) {
  for (const char* f : {"astropy_tabledata.vot", "astropy_binary.vot", "astropy_binary2.vot"}) {
    SCOPED_TRACE(f);
    const Table t = skerry::parse_votable(slurp(data(f)));
    expect_reference_table(t);
    EXPECT_EQ(t.at("ra_deg").description, "Right ascension (ICRS)");
  }
}

TEST(ForeignVotable, TableChosenByIndexOrName) {
  const std::string text = slurp(data("astropy_two_tables.vot"));
  EXPECT_EQ(skerry::parse_votable(text).at("x").f64.size(), 2u);  // default: the first TABLE
  skerry::VotableReadOptions o;
  o.table = "1";  // 0-based, as astropy counts
  expect_reference_table(skerry::parse_votable(text, o));
  o.table = "sources";
  expect_reference_table(skerry::parse_votable(text, o));
  o.table = "sources_id";  // the ID attribute works too
  expect_reference_table(skerry::parse_votable(text, o));
  o.table = "0";
  EXPECT_EQ(skerry::parse_votable(text, o).at("x").f64[1], 2.0);
  o.table = "2";
  try {
    skerry::parse_votable(text, o);
    FAIL() << "no error for a TABLE that is not there";
  } catch (const skerry::TableParseError& e) {
    EXPECT_STREQ(e.what(), "VOTable has no TABLE number 2 (its 2 TABLEs, numbered from 0: 0 'first', 1 'sources')");
  }
}

TEST(ForeignVotable, ReadTableTakesTheBracketSelection) {
  expect_reference_table(skerry::read_table(data("astropy_two_tables.vot") + "[1]"));
  expect_reference_table(skerry::read_table(data("astropy_two_tables.vot") + "[sources]"));
  EXPECT_THROW(skerry::read_table(data("astropy_two_tables.vot") + "[nosuch]"), skerry::InputError);
  EXPECT_THROW(skerry::read_table(data("astropy_space.ecsv") + "[1]"), skerry::UsageError);
}

TEST(ForeignVotable, DamagedStreamsAreErrorsNotGarbage) {
  const std::string good = slurp(data("astropy_binary2.vot"));
  const std::size_t b = good.find("encoding=\"base64\">") + 18;
  const std::size_t e = good.find("</STREAM>");
  ASSERT_NE(b, std::string::npos);
  // A stream cut short inside a row.
  std::string cut = good.substr(0, b) + good.substr(b, (e - b) / 2 / 4 * 4) + good.substr(e);
  EXPECT_THROW(skerry::parse_votable(cut), skerry::TableParseError);
  // A character that is not base64.
  std::string bad = good;
  bad[b + 5] = '#';
  EXPECT_THROW(skerry::parse_votable(bad), skerry::TableParseError);
}

TEST(ForeignEcsv, SpaceAndCommaDelimitersGiveTheSameTable) {
  for (const char* f : {"astropy_space.ecsv", "astropy_comma.ecsv"}) {
    SCOPED_TRACE(f);
    const Table t = skerry::parse_ecsv(slurp(data(f)));
    expect_reference_table(t);
    EXPECT_EQ(t.at("ra_deg").description, "Right ascension (ICRS)");
    ASSERT_NE(t.get_meta("survey"), nullptr);
    EXPECT_EQ(*t.get_meta("survey"), "Skerrywind");
  }
  expect_reference_table(skerry::read_table(data("astropy_comma.ecsv")));
}

TEST(ForeignEcsv, DeclaredTypesAreEnforced) {
  // Common practice (ECSV 1.0): the YAML header declares each column's type; a
  // cell that is not of that type is an error naming row and column.
  const std::string text =
      "# %ECSV 1.0\n# ---\n# datatype:\n# - {name: a, datatype: int64}\n# - {name: b, datatype: string}\n"
      "a b\n1 x\n2.5 y\n";
  try {
    skerry::parse_ecsv(text);
    FAIL() << "no error for 2.5 in an int64 column";
  } catch (const skerry::TableParseError& e) {
    EXPECT_EQ(e.row, 2u);
    EXPECT_EQ(e.column, "a");
  }
  // A string column whose cells look like numbers stays text, as written.
  const Table t = skerry::parse_ecsv(
      "# %ECSV 1.0\n# ---\n# datatype:\n# - name: code\n#   datatype: string\n# - {name: v, datatype: float64}\n"
      "code v\n007 1\n010 2\n");
  ASSERT_EQ(t.at("code").type, ColumnType::Text);
  EXPECT_EQ(t.at("code").text[0], "007");
  ASSERT_EQ(t.at("v").type, ColumnType::Float64);
  EXPECT_THROW(skerry::parse_ecsv("a,b\n1,2\n"), skerry::TableParseError);  // no ECSV header
  EXPECT_THROW(skerry::parse_ecsv("# %ECSV 1.0\n# ---\n# datatype:\n# - {name: a, datatype: int64}\nb\n1\n"),
               skerry::TableParseError);  // header row names another column
}

}  // namespace
