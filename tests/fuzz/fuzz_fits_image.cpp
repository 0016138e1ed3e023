// Fuzz target: the FITS image reader (header and data) through CFITSIO and WCSLIB.
// Expected outcomes: an image, or an InputError / NoDataError naming the file.
// Anything else (a crash, a sanitizer report, another exception type) is a bug.
#include <cstdint>

#include "app/errors.h"
#include "fuzz_util.h"
#include "io/fits_image.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  skerry::fuzz::TempInput in(data, size, ".fits");
  skerry::ImageReadOptions opt;
  opt.require_beam = false;
  try {
    skerry::SkyImage img = skerry::read_sky_image(in.path(), opt);
    // Touch the data and the geometry the stages would use.
    volatile float sink = img.pixels.size() ? img.pixels(0, 0) : 0.0f;
    (void)sink;
    if (img.wcs) {
      double ra, dec;
      img.wcs->pix_to_sky(0.0, 0.0, ra, dec);
    }
  } catch (const skerry::InputError&) {
  } catch (const skerry::NoDataError&) {
  }
  return 0;
}
