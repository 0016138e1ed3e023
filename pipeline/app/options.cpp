#include "app/options.h"

#include "app/console.h"

#include <oneapi/tbb/global_control.h>
#include <oneapi/tbb/info.h>

#include <cctype>
#include <charconv>
#include <cstdlib>
#include <fstream>
#include <iostream>
#include <sstream>

#include "app/errors.h"

namespace skerry {

namespace {

/// The shortest decimal that reads back as the same double (std::to_chars,
/// C++17): 0.2, not 0.20000000000000001.
std::string shortest(double v) {
  char buf[64];
  const auto r = std::to_chars(buf, buf + sizeof buf, v);
  std::string s(buf, r.ptr);
  // 5e-06 -> 5e-6: the exponent without leading zeros, as people write it.
  const std::size_t e = s.find('e');
  if (e != std::string::npos && e + 2 < s.size() && (s[e + 1] == '-' || s[e + 1] == '+')) {
    std::size_t z = e + 2;
    while (z + 1 < s.size() && s[z] == '0') ++z;
    s.erase(e + 2, z - (e + 2));
    if (s[e + 1] == '+') s.erase(e + 1, 1);
  }
  return s;
}

/// Boost prints a double default with 17 significant digits ("(=0.20000000000000001)").
/// Rewrites each "(=NUMBER)" of a --help text in its shortest form and pads
/// with spaces so that the description column stays where Boost put it.
std::string defaults_as_written(const std::string& help) {
  std::string out;
  std::size_t i = 0;
  while (true) {
    const std::size_t a = help.find("(=", i);
    if (a == std::string::npos) break;
    const std::size_t b = help.find(')', a);
    if (b == std::string::npos) break;
    const std::string num = help.substr(a + 2, b - a - 2);
    char* end = nullptr;
    const double v = std::strtod(num.c_str(), &end);
    out.append(help, i, a - i);
    if (!num.empty() && end == num.c_str() + num.size() && num.find_first_of(".eE") != std::string::npos) {
      const std::string s = shortest(v);
      out += "(=" + s + ")";
      if (b + 1 < help.size() && help[b + 1] == ' ' && s.size() < num.size()) out.append(num.size() - s.size(), ' ');
    } else {
      out.append(help, a, b + 1 - a);
    }
    i = b + 1;
  }
  out.append(help, i, std::string::npos);
  return out;
}

std::string value_text(const po::variable_value& v) {
  const boost::any& a = v.value();
  if (a.empty()) return "";
  std::ostringstream os;
  os.precision(17);
  if (auto p = boost::any_cast<std::string>(&a)) return *p;
  if (auto p = boost::any_cast<double>(&a)) return shortest(*p);
  if (auto p = boost::any_cast<float>(&a)) return shortest(static_cast<double>(*p));
  if (auto p = boost::any_cast<int>(&a)) return std::to_string(*p);
  if (auto p = boost::any_cast<long>(&a)) return std::to_string(*p);
  if (auto p = boost::any_cast<long long>(&a)) return std::to_string(*p);
  if (auto p = boost::any_cast<unsigned>(&a)) return std::to_string(*p);
  if (auto p = boost::any_cast<std::size_t>(&a)) return std::to_string(*p);
  if (auto p = boost::any_cast<bool>(&a)) return *p ? "true" : "false";
  if (auto p = boost::any_cast<std::vector<std::string>>(&a)) {
    for (std::size_t i = 0; i < p->size(); ++i) os << (i ? "," : "") << (*p)[i];
    return os.str();
  }
  if (auto p = boost::any_cast<std::vector<double>>(&a)) {
    for (std::size_t i = 0; i < p->size(); ++i) os << (i ? "," : "") << (*p)[i];
    return os.str();
  }
  return "?";
}

}  // namespace

ParsedOptions parse_options(const std::string& command, const std::string& usage_line,
                            const po::options_description& desc,
                            const std::vector<std::pair<std::string, int>>& positional,
                            const std::vector<std::string>& args, const CommonOptions& common_options) {
  po::options_description common("General");
  common.add_options()("help,h", "show this help and exit");
  if (common_options.config)
    common.add_options()("config", po::value<std::string>(),
                         "configuration file ([section] key = value); the command line overrides it");
  common.add_options()("threads", po::value<int>()->default_value(0),
                       common_options.threads_help.empty()
                           ? "worker threads (0 = all cores); results do not depend on it"
                           : common_options.threads_help.c_str());
  common.add_options()("quiet,q", po::bool_switch(), "errors and warnings only (no summary, notes or progress)")(
      "verbose,v", po::bool_switch(), "a line per stage with its wall time, and progress also into logs (stderr)");
  po::options_description all;
  all.add(desc).add(common);

  po::positional_options_description pos;
  for (const auto& [name, count] : positional) pos.add(name.c_str(), count);

  // Boost.Program_options 1.74 builds its error messages by replacing
  // placeholders such as %value% until none is left; a token that itself holds
  // "%name%" makes that loop endless (found by fuzz_config). Such text is refused
  // before Boost sees it.
  auto has_placeholder = [](const std::string& t) {
    for (std::size_t a = t.find('%'); a != std::string::npos; a = t.find('%', a + 1)) {
      std::size_t b = a + 1;
      while (b < t.size() && (std::isalnum(static_cast<unsigned char>(t[b])) || t[b] == '_')) ++b;
      if (b > a + 1 && b < t.size() && t[b] == '%') return true;
    }
    return false;
  };
  for (const auto& a : args)
    if (has_placeholder(a)) throw UsageError("argument '" + a.substr(0, 60) + "': text of the form %name% is not accepted");

  ParsedOptions out;
  try {
    // No abbreviations: a misspelt or shortened option is an error naming it.
    po::store(po::command_line_parser(args).options(all).positional(pos)
                  .style(po::command_line_style::default_style & ~po::command_line_style::allow_guessing)
                  .run(),
              out.vm);
    if (out.vm.count("help")) {
      std::ostringstream help;
      help << all;
      std::cout << "usage: skerry " << command << " " << usage_line << "\n\n" << defaults_as_written(help.str()) << "\n";
      out.help = true;
      return out;
    }
    if (out.vm.count("config")) {
      out.config_file = out.vm["config"].as<std::string>();
      std::ifstream in(out.config_file);
      if (!in) throw InputError(out.config_file, "cannot open configuration file");
      std::stringstream text;
      text << in.rdbuf();
      {
        std::string line;
        for (int n = 1; std::getline(text, line); ++n)
          if (has_placeholder(line))
            throw UsageError(out.config_file + ": line " + std::to_string(n) +
                             ": text of the form %name% is not accepted");
        text.clear();
        text.seekg(0);
      }
      try {
        po::store(po::parse_config_file(text, all, /*allow_unregistered=*/false), out.vm);
      } catch (const po::error& e) {
        throw UsageError(out.config_file + ": " + e.what());
      }
    }
    po::notify(out.vm);
  } catch (const po::error& e) {
    throw UsageError(e.what());
  }
  // --quiet / --verbose set the console's verbosity (app/console.h); not given,
  // the verbosity stays as it is (main() may have set it from options before the
  // sub-command). They change what is printed, not what is computed, so they are
  // not part of the resolved configuration.
  const bool quiet = out.vm["quiet"].as<bool>(), verbose = out.vm["verbose"].as<bool>();
  if (quiet && verbose) throw UsageError("--quiet and --verbose: give one of them");
  if (quiet) set_verbosity(Verbosity::Quiet);
  if (verbose) set_verbosity(Verbosity::Verbose);
  for (const auto& opt : all.options()) {
    const std::string& n = opt->long_name();
    if (n == "help" || n == "config" || n == "quiet" || n == "verbose") continue;
    auto it = out.vm.find(n);
    if (it != out.vm.end()) out.resolved[n] = value_text(it->second);
  }
  return out;
}

ThreadLimit::ThreadLimit(int threads) {
  if (threads < 0) throw UsageError("threads = " + std::to_string(threads) + " breaks threads >= 0");
  threads_ = threads == 0 ? oneapi::tbb::info::default_concurrency() : threads;
  control_ = new oneapi::tbb::global_control(oneapi::tbb::global_control::max_allowed_parallelism,
                                             static_cast<std::size_t>(threads_));
}

ThreadLimit::~ThreadLimit() { delete static_cast<oneapi::tbb::global_control*>(control_); }

void require(bool ok, const std::string& option, const std::string& value, const std::string& rule) {
  if (!ok) throw UsageError(option + " = " + value + " breaks " + rule);
}

}  // namespace skerry
