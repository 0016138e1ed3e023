// Fuzz target: the configuration-file parser (pipeline/options, Boost.Program_options)
// with a description of the same kinds of options the sub-commands use.
// Expected outcomes: parsed options, or a UsageError / InputError naming the problem.
#include <cstdint>

#include "app/errors.h"
#include "fuzz_util.h"
#include "app/options.h"

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  skerry::fuzz::TempInput in(data, size, ".ini");
  namespace po = skerry::po;
  po::options_description d("fuzz");
  d.add_options()
      ("image", po::value<std::string>(), "input")
      ("noise.window_beams", po::value<double>()->default_value(30.0), "window")
      ("noise.second_pass", po::value<bool>()->default_value(true), "second pass")
      ("detect.peak_snr", po::value<double>()->default_value(5.0), "peak")
      ("detect.min_pixels", po::value<long>()->default_value(3), "min pixels")
      ("fit.max_components", po::value<int>()->default_value(5), "max components")
      ("output.formats", po::value<std::string>()->default_value("csv,fits,vot"), "formats")
      ("bands.freq_mhz", po::value<std::vector<double>>()->multitoken(), "frequencies");
  try {
    skerry::ParsedOptions p =
        skerry::parse_options("fuzz", "[options]", d, {}, {"--config", in.path()});
    (void)p;
  } catch (const skerry::UsageError&) {
  } catch (const skerry::InputError&) {
  }
  return 0;
}
