// Fuzz target: the FITS binary-table reader (CFITSIO). Expected outcomes: a
// table, or an InputError naming the file.
#include <cstdint>

#include "app/errors.h"
#include "fuzz_util.h"
#include "io/table_io.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  skerry::fuzz::TempInput in(data, size, ".fits");
  try {
    skerry::Table t = skerry::read_table(in.path());
    t.check_consistent();
  } catch (const skerry::InputError&) {
  }
  return 0;
}
