// skerry completeness IMAGE --out DIR: completeness by injection and reliability
// from the negated image (report_injection.h). Exit codes: errors.h.
#include <iostream>

#include "app/console.h"
#include "app/command.h"
#include "app/errors.h"
#include "app/options.h"
#include "report/report_injection.h"

namespace skerry {
namespace {

int run_completeness(const std::vector<std::string>& args) {
  const InjectionOptions d;
  po::options_description desc("completeness options");
  desc.add_options()
      ("image", po::value<std::string>(), "FITS image (Jy/beam)")
      ("out", po::value<std::string>()->default_value("."), "output folder (the run folder of extract, for the report)")
      ("seed", po::value<long long>()->default_value(1), "random seed: the same seed gives the same tables for any thread count")
      ("completeness.name", po::value<std::string>()->default_value(""), "NAME of the outputs; default: the image's stem")
      ("completeness.extract_config", po::value<std::string>()->default_value(""), "configuration file for every skerry extract run")
      ("completeness.rounds", po::value<int>()->default_value(d.rounds), "injection rounds (run in parallel)")
      ("completeness.per_round", po::value<int>()->default_value(d.per_round), "point sources injected per round")
      ("completeness.snr_min", po::value<double>()->default_value(d.snr_min), "faintest injected peak [median rms]")
      ("completeness.snr_max", po::value<double>()->default_value(d.snr_max), "brightest injected peak [median rms]")
      ("completeness.levels", po::value<int>()->default_value(d.levels), "log-spaced flux-density levels")
      ("completeness.avoid_beams", po::value<double>()->default_value(d.avoid_beams), "distance from catalogued sources and other injections [beam FWHM]")
      ("completeness.match_beams", po::value<double>()->default_value(d.match_beams), "recovery radius [beam FWHM]")
      ("completeness.reliability", po::value<bool>()->default_value(true), "also measure reliability on the negated image");
  ParsedOptions p = parse_options("completeness", "IMAGE --out DIR [options]", desc, {{"image", 1}}, args);
  if (p.help) return kExitOk;
  if (!p.vm.count("image")) throw UsageError("completeness: give the image (skerry completeness IMAGE --out DIR)");
  InjectionOptions o;
  o.image = p.vm["image"].as<std::string>();
  o.out_dir = p.vm["out"].as<std::string>();
  o.name = p.vm["completeness.name"].as<std::string>();
  o.extract_config = p.vm["completeness.extract_config"].as<std::string>();
  o.rounds = p.vm["completeness.rounds"].as<int>();
  o.per_round = p.vm["completeness.per_round"].as<int>();
  o.snr_min = p.vm["completeness.snr_min"].as<double>();
  o.snr_max = p.vm["completeness.snr_max"].as<double>();
  o.levels = p.vm["completeness.levels"].as<int>();
  o.avoid_beams = p.vm["completeness.avoid_beams"].as<double>();
  o.match_beams = p.vm["completeness.match_beams"].as<double>();
  o.reliability = p.vm["completeness.reliability"].as<bool>();
  o.seed = static_cast<std::uint64_t>(p.vm["seed"].as<long long>());
  require(o.rounds >= 1 && o.rounds <= 1000, "completeness.rounds", std::to_string(o.rounds), "1 <= value <= 1000");
  require(o.per_round >= 1, "completeness.per_round", std::to_string(o.per_round), "value >= 1");
  require(o.levels >= 2, "completeness.levels", std::to_string(o.levels), "value >= 2");
  require(o.snr_min > 0 && o.snr_max > o.snr_min, "completeness.snr_max", std::to_string(o.snr_max), "0 < snr_min < snr_max");
  require(o.match_beams > 0 && o.avoid_beams >= 0, "completeness.match_beams", std::to_string(o.match_beams), "value > 0");
  ThreadLimit threads(p.vm["threads"].as<int>());
  const InjectionResult r = run_injection(o);
  say("completeness: " + std::to_string(r.recovered) + " of " + std::to_string(r.injected) +
      " injected point sources recovered; outputs in " + o.out_dir);
  return kExitOk;
}

const CommandRegistrar reg{"completeness", "image -> completeness by injection, reliability from the negated image", &run_completeness};

}  // namespace
}  // namespace skerry
