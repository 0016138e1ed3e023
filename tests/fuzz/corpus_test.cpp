// Regression test: every file of the committed fuzz corpora (valid and broken
// seeds, and any input a fuzz run once found to crash) goes through the same
// entry point as the fuzzer, in the normal and the sanitizer builds.
#include <gtest/gtest.h>

#include <cstdint>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <vector>

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size);

TEST(FuzzCorpus, EveryFileIsHandled) {
  const std::filesystem::path dir = std::filesystem::path(SKERRY_SOURCE_DIR) / "tests/fuzz/corpus" / FUZZ_CORPUS;
  ASSERT_TRUE(std::filesystem::is_directory(dir)) << dir;
  std::vector<std::filesystem::path> files;
  for (const auto& e : std::filesystem::directory_iterator(dir))
    if (e.is_regular_file()) files.push_back(e.path());
  std::sort(files.begin(), files.end());
  ASSERT_GE(files.size(), 3u) << "corpus " << dir << " should hold valid and broken seeds";
  for (const auto& f : files) {
    std::ifstream in(f, std::ios::binary);
    std::vector<char> bytes((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    SCOPED_TRACE(f.filename().string());
    EXPECT_EQ(LLVMFuzzerTestOneInput(reinterpret_cast<const std::uint8_t*>(bytes.data()), bytes.size()), 0);
  }
}
