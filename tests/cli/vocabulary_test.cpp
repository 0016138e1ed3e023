// One name and one unit per concept across every sub-command (issue "one name
// for one thing"). The test runs `skerry --help` for the list of sub-commands,
// then `skerry CMD --help` for each, collects every long option (and, for
// survey, every key of the survey file), and fails when
//  - a long option is spelt with a hyphen (the house style is underscores:
//    --run_dir, --survey_file, detect.peak_snr);
//  - a frequency option is not in MHz (freq_*_hz, *_ghz, ... next to freq_mhz);
//  - two SECTION.KEY options differ only by a plural -s of one word
//    (bands.freqs_mhz in simulate next to bands.freq_mhz in bands; the plain
//    arguments such as --image/--images or --catalogue/--catalogues name one
//    file or a list of files and are not compared);
//  - the designation prefix has more than one key (catalogue.name_prefix in
//    extract next to survey.designation_prefix in the survey file);
//  - one --help describes an option twice (an option list entry plus a
//    "--threads N: ..." line with another meaning in the usage text), or offers
//    two options described as its configuration (an option whose file goes to
//    another sub-command says so by naming it, "skerry extract").
// All of these held before the vocabulary change; the test names each
// offending option.
#include <gtest/gtest.h>

#include <cstdio>
#include <map>
#include <regex>
#include <set>
#include <sstream>
#include <string>
#include <vector>

namespace {

const std::string kBin = SKERRY_BINARY;

std::string run_stdout(const std::string& args) {
  std::string out;
  FILE* p = popen((kBin + " " + args + " 2>/dev/null").c_str(), "r");
  if (!p) return out;
  char buf[4096];
  std::size_t n;
  while ((n = fread(buf, 1, sizeof buf, p)) > 0) out.append(buf, n);
  pclose(p);
  return out;
}

std::vector<std::string> lines_of(const std::string& text) {
  std::vector<std::string> out;
  std::istringstream in(text);
  for (std::string l; std::getline(in, l);) out.push_back(l);
  return out;
}

struct Option {
  std::string command;      ///< sub-command ("survey file" for the file's keys)
  std::string name;         ///< without the leading "--"
  std::string description;  ///< its description, lines joined
};

struct Help {
  std::string header;            ///< the text before the first option list
  std::vector<Option> options;   ///< every long option of the lists
};

// Boost's option lists: "  --name [ --alias ] arg (=default)   description".
// Entries start with two spaces and "--" (or "-h [ --help ]").
Help parse_help(const std::string& command, const std::string& text) {
  Help h;
  static const std::regex entry(R"(^  (?:-[A-Za-z] \[ )?--([A-Za-z0-9_.\-]+)(?: \])?(?: (?:arg|\[arg\])(?: \([^)]*\))?)?\s*(.*)$)");
  static const std::regex file_key(R"(^  ([a-z0-9_]+\.[a-z0-9_]+)\s{2,}(.*)$)");
  bool in_lists = false, in_file_keys = false;
  for (const auto& l : lines_of(text)) {
    std::smatch m;
    if (!l.empty() && l.back() == ':' && l.find("usage") == std::string::npos && l[0] != ' ') in_lists = true;
    if (l.rfind("Survey file keys", 0) == 0) in_file_keys = true;
    if (in_file_keys && std::regex_match(l, m, file_key)) {
      h.options.push_back({"survey file", m[1], m[2]});
    } else if (std::regex_match(l, m, entry)) {
      in_lists = true;
      h.options.push_back({command, m[1], m[2]});
    } else if (in_lists && !h.options.empty() && l.rfind("    ", 0) == 0) {
      // A description that starts (or goes on) on the next line.
      const auto a = l.find_first_not_of(' ');
      std::string& d = h.options.back().description;
      while (!d.empty() && d.back() == ' ') d.pop_back();
      d += (d.empty() ? "" : " ") + l.substr(a);
    } else if (!in_lists) {
      h.header += l + "\n";
    }
  }
  return h;
}

std::vector<std::string> sub_commands() {
  std::vector<std::string> out;
  static const std::regex row(R"(^  ([a-z][a-z_]*)\s{2,}\S.*$)");
  bool in = false;
  for (const auto& l : lines_of(run_stdout("--help"))) {
    if (l.rfind("sub-commands:", 0) == 0) {
      in = true;
      continue;
    }
    std::smatch m;
    if (in && std::regex_match(l, m, row)) out.push_back(m[1]);
    else if (in && l.empty()) in = false;
  }
  return out;
}

// Words of an option name: split at '.', '_' and '-'.
std::vector<std::string> words(const std::string& name) {
  std::vector<std::string> w;
  std::string cur;
  for (char c : name) {
    if (c == '.' || c == '_' || c == '-') {
      if (!cur.empty()) w.push_back(cur);
      cur.clear();
    } else {
      cur += c;
    }
  }
  if (!cur.empty()) w.push_back(cur);
  return w;
}

// The name with a plural -s dropped from every word longer than three letters
// ("freqs" -> "freq", "beams" -> "beam"; "pass", "ss" endings kept).
std::string singular_form(const std::string& name) {
  std::string out;
  std::string cur;
  auto flush = [&] {
    if (cur.size() > 3 && cur.back() == 's' && cur[cur.size() - 2] != 's') cur.pop_back();
    out += cur;
    cur.clear();
  };
  for (char c : name) {
    if (c == '.' || c == '_' || c == '-') {
      flush();
      out += c == '-' ? '_' : c;
    } else {
      cur += c;
    }
  }
  flush();
  return out;
}

bool contains(const std::string& s, const std::string& what) { return s.find(what) != std::string::npos; }

class Vocabulary : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    commands_ = new std::vector<std::string>(sub_commands());
    helps_ = new std::map<std::string, Help>;
    for (const auto& c : *commands_) (*helps_)[c] = parse_help(c, run_stdout(c + " --help"));
  }
  static void TearDownTestSuite() {
    delete commands_;
    delete helps_;
  }
  static std::vector<Option> all_options() {
    std::vector<Option> out;
    for (const auto& [c, h] : *helps_) out.insert(out.end(), h.options.begin(), h.options.end());
    return out;
  }
  static std::vector<std::string>* commands_;
  static std::map<std::string, Help>* helps_;
};
std::vector<std::string>* Vocabulary::commands_ = nullptr;
std::map<std::string, Help>* Vocabulary::helps_ = nullptr;

TEST_F(Vocabulary, EverySubCommandListsItsOptions) {
  // The parser itself must see the commands and options it is meant to check.
  for (const char* c : {"extract", "bands", "match", "survey", "report", "completeness", "simulate", "demo"})
    EXPECT_NE(std::find(commands_->begin(), commands_->end(), c), commands_->end()) << c << " missing from skerry --help";
  for (const auto& c : *commands_) {
    const auto& opts = helps_->at(c).options;
    EXPECT_GE(opts.size(), 2u) << "skerry " << c << " --help lists no options";
    bool help = false;
    for (const auto& o : opts) help |= o.name == "help";
    EXPECT_TRUE(help) << c;
  }
  std::set<std::string> names;
  for (const auto& o : all_options()) names.insert(o.command + " " + o.name);
  for (const char* must : {"extract detect.peak_snr", "bands bands.freq_mhz", "simulate bands.freq_mhz",
                           "match match.radius_arcsec", "survey file survey.tiles", "survey force"})
    EXPECT_EQ(names.count(must), 1u) << must << " not found by the help parser";
}

TEST_F(Vocabulary, LongOptionsUseUnderscores) {
  for (const auto& o : all_options())
    EXPECT_FALSE(contains(o.name, "-")) << o.command << ": --" << o.name << " has a hyphen (house style: underscores)";
}

TEST_F(Vocabulary, FrequenciesAreInMegahertz) {
  for (const auto& o : all_options()) {
    const auto w = words(o.name);
    bool freq = false;
    for (const auto& x : w) freq |= x == "freq" || x == "freqs" || x == "frequency" || x == "frequencies";
    if (!freq) continue;
    bool mhz = false, other_unit = false;
    for (const auto& x : w) {
      mhz |= x == "mhz";
      other_unit |= x == "hz" || x == "khz" || x == "ghz";
    }
    EXPECT_TRUE(mhz && !other_unit) << o.command << ": " << o.name << " is a frequency not in MHz (_mhz)";
  }
}

TEST_F(Vocabulary, NoConceptHasTwoSpellings) {
  std::map<std::string, std::set<std::string>> spellings;  // singular form -> names
  std::map<std::string, std::set<std::string>> where;
  for (const auto& o : all_options()) {
    if (!contains(o.name, ".")) continue;  // SECTION.KEY options only
    spellings[singular_form(o.name)].insert(o.name);
    where[o.name].insert(o.command);
  }
  for (const auto& [form, names] : spellings) {
    if (names.size() < 2) continue;
    std::string list;
    for (const auto& n : names) {
      list += " " + n + " (";
      for (const auto& c : where[n]) list += c + ";";
      list += ")";
    }
    ADD_FAILURE() << "one concept, several spellings:" << list;
  }
}

TEST_F(Vocabulary, OneDesignationPrefixKey) {
  std::set<std::string> keys;
  for (const auto& o : all_options())
    if (contains(o.name, "prefix") && contains(o.description, "designation")) keys.insert(o.name);
  EXPECT_EQ(keys.size(), 1u) << "the designation prefix has " << keys.size() << " keys";
  for (const auto& k : keys) EXPECT_EQ(k, "catalogue.designation_prefix");
}

TEST_F(Vocabulary, EachHelpDescribesAnOptionOnce) {
  for (const auto& [c, h] : *helps_) {
    std::map<std::string, int> seen;
    for (const auto& o : h.options)
      if (o.command == c) ++seen[o.name];
    for (const auto& [n, k] : seen) EXPECT_EQ(k, 1) << c << ": --" << n << " listed " << k << " times";
    // The usage text must not define a listed option a second time ("--threads N: ...").
    for (const auto& l : lines_of(h.header)) {
      static const std::regex def(R"(^\s*--([A-Za-z0-9_.\-]+)[^:]*:)");
      std::smatch m;
      if (std::regex_search(l, m, def) && seen.count(m[1]))
        ADD_FAILURE() << c << ": the usage text describes --" << m[1] << " again: " << l;
    }
    // At most one option that is "the configuration" of the command.
    std::vector<std::string> config_like;
    for (const auto& o : h.options) {
      if (o.command != c || !(contains(o.description, "configuration") || contains(o.description, "INI"))) continue;
      bool other_command = false;
      for (const auto& other : *commands_) other_command |= other != c && contains(o.description, "skerry " + other);
      if (!other_command) config_like.push_back(o.name);
    }
    EXPECT_LE(config_like.size(), 1u) << c << ": several options describe a configuration, first two: --"
                                      << config_like[0] << ", --" << config_like[1];
  }
}

// The checks themselves catch the spellings this project used to have.
// The entry points a user tries first (common practice of command-line tools):
// `skerry help CMD` shows CMD's options, -V the version as --version does.
TEST(CommandLine, HelpCommandAndShortVersion) {
  for (const char* c : {"extract", "bands", "match", "survey", "report"}) {
    const std::string a = run_stdout(std::string("help ") + c), b = run_stdout(std::string(c) + " --help");
    EXPECT_FALSE(a.empty()) << c;
    EXPECT_EQ(a, b) << c;
  }
  const std::string v = run_stdout("-V");
  EXPECT_EQ(v.rfind("skerry ", 0), 0u) << v;
  EXPECT_EQ(v, run_stdout("--version"));
}

// Defaults are shown as a person writes them (0.2, 5e-6), not as the 17
// significant digits of the nearest double (0.20000000000000001).
TEST(CommandLine, DefaultsPrintedAsWritten) {
  for (const char* c : {"extract", "bands", "match", "survey", "report", "completeness", "simulate", "demo"}) {
    const std::string h = run_stdout(std::string(c) + " --help");
    for (std::size_t a = h.find("(="); a != std::string::npos; a = h.find("(=", a + 2)) {
      const std::string d = h.substr(a, h.find(')', a) - a + 1);
      EXPECT_FALSE(contains(d, "0000000") || contains(d, "9999999") || contains(d, "e-0")) << c << ": " << d;
    }
  }
  const std::string e = run_stdout("extract --help");
  EXPECT_TRUE(contains(e, "--image.pb_cut arg (=0.2)")) << e;
  EXPECT_TRUE(contains(run_stdout("match --help"), "--match.spectral_index arg (=-0.7)"));
  EXPECT_TRUE(contains(run_stdout("simulate --help"), "(=5e-6)"));
}

TEST(VocabularyRules, CatchTheOldSpellings) {
  EXPECT_EQ(singular_form("bands.freqs_mhz"), singular_form("bands.freq_mhz"));
  EXPECT_NE(singular_form("noise.second_pass"), singular_form("noise.second_pas"));
  EXPECT_EQ(singular_form("survey-file"), singular_form("survey_file"));
  const auto w = words("match.freq_a_hz");
  EXPECT_NE(std::find(w.begin(), w.end(), "hz"), w.end());
  const Help h = parse_help("survey",
                            "usage: skerry survey CONFIG [--threads N]\n\n"
                            "--threads N: tiles run at once by the local engine.\n\n"
                            "survey:\n"
                            "  --survey-file arg                     the survey description (INI: [survey])\n"
                            "  --run-dir arg                         internal: the Slurm run folder\n\n"
                            "General:\n"
                            "  -h [ --help ]                         show this help and exit\n"
                            "  --config arg                          configuration file\n"
                            "  --threads arg (=0)                    worker threads (0 = all cores)\n");
  ASSERT_EQ(h.options.size(), 5u);
  EXPECT_EQ(h.options[0].name, "survey-file");
  EXPECT_EQ(h.options[2].name, "help");
  EXPECT_EQ(h.options[4].name, "threads");
  EXPECT_NE(h.header.find("--threads N: tiles"), std::string::npos);
}

}  // namespace
