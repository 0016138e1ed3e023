// SHA-256 and the run record.
#include <gtest/gtest.h>

#include <nlohmann/json.hpp>

#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

#include "skerry_test_support.h"
#include "app/errors.h"
#include "app/options.h"
#include "app/run_record.h"

namespace skerry::test {
namespace {

// Source: FIPS PUB 180-4 examples (NIST, "SHA256.pdf" example values for
// "abc" and the 448-bit message; the empty-string digest is the well-known
// value) -- from memory; each is also checked against Python's hashlib below.
TEST(Sha256, StandardExamples) {
  EXPECT_EQ(sha256_hex("abc", 3), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
  EXPECT_EQ(sha256_hex("", 0), "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855");
  const std::string m = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
  EXPECT_EQ(sha256_hex(m.data(), m.size()), "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1");
  const std::string million(1000000, 'a');
  EXPECT_EQ(sha256_hex(million.data(), million.size()),
            "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0");
}

// Independent implementation: Python's hashlib (Debian's python3), on lengths
// around the 55/56/64-byte padding boundaries and a multi-block file.
TEST(Sha256, AgreesWithHashlib) {
  TempDir tmp("sha");
  std::string script = "import hashlib,sys\nfor n in [0,1,55,56,63,64,65,119,120,1000,70000]:\n"
                       "  b=bytes((i*31+7)%256 for i in range(n)); print(hashlib.sha256(b).hexdigest())\n";
  const RunResult py = run({python3(), "-c", script}, tmp.path());
  ASSERT_EQ(py.code, 0) << py.err;
  std::istringstream lines(py.out);
  for (int n : {0, 1, 55, 56, 63, 64, 65, 119, 120, 1000, 70000}) {
    std::string b(static_cast<std::size_t>(n), '\0');
    for (int i = 0; i < n; ++i) b[static_cast<std::size_t>(i)] = static_cast<char>((i * 31 + 7) % 256);
    std::string want;
    std::getline(lines, want);
    EXPECT_EQ(sha256_hex(b.data(), b.size()), want) << "length " << n;
    if (n == 70000) {
      const std::string f = tmp / "blob.bin";
      std::ofstream(f, std::ios::binary) << b;
      EXPECT_EQ(sha256_file(f), want);
    }
  }
}

TEST(RunRecord, JsonHoldsWhatWasSet) {
  TempDir tmp("rr");
  const std::string in = tmp / "input.txt";
  std::ofstream(in) << "abc";
  RunRecord rec("extract");
  rec.set_configuration({{"detect.peak_snr", "5"}, {"a.b", "x"}}, "cfg.ini");
  rec.add_input("image", in);
  rec.set_count("components", 42);
  rec.add_stage("read", 0.5);
  rec.add_stage("fit", 1.5);
  rec.set_threads(3);
  const auto j = nlohmann::json::parse(rec.to_json());
  EXPECT_EQ(j["command"], "extract");
  EXPECT_EQ(j["configuration"]["detect.peak_snr"], "5");
  EXPECT_EQ(j["config_file"], "cfg.ini");
  EXPECT_EQ(j["inputs"][0]["sha256"], "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
  EXPECT_EQ(j["inputs"][0]["bytes"], 3);
  EXPECT_EQ(j["counts"]["components"], 42);
  EXPECT_EQ(j["stages"][0]["stage"], "read");
  EXPECT_EQ(j["stages"][1]["stage"], "fit");
  EXPECT_EQ(j["threads"], 3);
  EXPECT_FALSE(j["git_revision"].get<std::string>().empty());
  EXPECT_THROW(rec.add_input("image", tmp / "missing"), InputError);
}

// The resolved values that run records store are the shortest decimals that
// read back as the same double (0.2, not 0.20000000000000001; common practice).
TEST(ResolvedOptions, NumbersAsWritten) {
  po::options_description d("test");
  d.add_options()("a.x", po::value<double>()->default_value(0.2), "x")("a.y", po::value<double>()->default_value(5e-6), "y")(
      "a.z", po::value<double>()->default_value(1.0 / 3.0), "z")("a.n", po::value<int>()->default_value(7), "n");
  const ParsedOptions p = parse_options("test", "", d, {}, {"--a.y", "-0.7"});
  EXPECT_EQ(p.resolved.at("a.x"), "0.2");
  EXPECT_EQ(p.resolved.at("a.y"), "-0.7");
  EXPECT_EQ(p.resolved.at("a.n"), "7");
  EXPECT_EQ(std::stod(p.resolved.at("a.z")), 1.0 / 3.0);  // round trip exact
  const ParsedOptions q = parse_options("test", "", d, {}, {});
  EXPECT_EQ(q.resolved.at("a.y"), "5e-6");
}

}  // namespace
}  // namespace skerry::test
