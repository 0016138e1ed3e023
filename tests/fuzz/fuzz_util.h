#pragma once
// Shared by the fuzz targets: the input bytes written to a private temporary
// file, for the readers that take a path (CFITSIO, the configuration parser).
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <string>

namespace skerry::fuzz {

class TempInput {
 public:
  TempInput(const std::uint8_t* data, std::size_t size, const char* suffix) {
    const char* dir = ::access("/dev/shm", W_OK) == 0 ? "/dev/shm" : "/tmp";
    path_ = std::string(dir) + "/skerry-fuzz-" + std::to_string(::getpid()) + suffix;
    if (std::FILE* f = std::fopen(path_.c_str(), "wb")) {
      if (size) std::fwrite(data, 1, size, f);
      std::fclose(f);
    }
  }
  ~TempInput() { std::remove(path_.c_str()); }
  const std::string& path() const { return path_; }

 private:
  std::string path_;
};

}  // namespace skerry::fuzz
