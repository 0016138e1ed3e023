// The `skerry` command: dispatches to the sub-commands registered in cmd_*.cpp.
#include <algorithm>
#include <csignal>
#include <cstdio>
#include <exception>
#include <iostream>
#include <new>
#include <string>
#include <vector>

#include "app/command.h"
#include "app/console.h"
#include "app/errors.h"
#include "io/fits_image.h"
#include "app/version.h"

namespace {
void usage(std::ostream& os) {
  auto cmds = skerry::command_registry();
  std::sort(cmds.begin(), cmds.end(), [](auto& a, auto& b) { return a.name < b.name; });
  os << "skerry " << SKERRY_VERSION << ": radio continuum images to source catalogues\n\n"
     << "usage: skerry <sub-command> [options]     (skerry <sub-command> --help, or skerry help <sub-command>,\n"
     << "                                            for its options; skerry --version or -V for the version)\n\n"
     << "sub-commands:\n";
  for (const auto& c : cmds) {
    os << "  " << c.name << std::string(c.name.size() < 14 ? 14 - c.name.size() : 1, ' ') << c.summary
       << "\n";
  }
  os << "\nbefore or after the sub-command: -q, --quiet (errors and warnings only) or -v, --verbose\n"
        "(a line per stage with its wall time, progress also into logs)\n";
  os << "\nexit codes: 0 ok, 1 internal error, 2 bad usage or configuration, 3 bad input file,\n"
        "            4 output not written, 5 nothing to do, 6 some tiles failed, 7 busy,\n"
        "            8 input holds no usable data\n";
}
}  // namespace

int main(int argc, char** argv) {
  // A file-size limit (ulimit -f, RLIMIT_FSIZE) must not kill the process with
  // SIGXFSZ: ignored, a write past the limit fails with EFBIG, the writer throws
  // OutputError and the command exits 4 (output not written) with a message
  // naming the file. Inherited by the child processes of `skerry survey`.
  std::signal(SIGXFSZ, SIG_IGN);
  std::vector<std::string> args(argv + 1, argv + argc);
  // Verbosity given before the sub-command (skerry -q extract ...); after it,
  // each sub-command takes the same options (app/options.cpp).
  bool quiet = false, verbose = false;
  while (!args.empty() && (args[0] == "-q" || args[0] == "--quiet" || args[0] == "-v" || args[0] == "--verbose")) {
    (args[0] == "-q" || args[0] == "--quiet" ? quiet : verbose) = true;
    args.erase(args.begin());
  }
  if (quiet && verbose) {
    std::cerr << "skerry: error: --quiet and --verbose: give one of them\n";
    return skerry::kExitUsage;
  }
  if (quiet) skerry::set_verbosity(skerry::Verbosity::Quiet);
  if (verbose) skerry::set_verbosity(skerry::Verbosity::Verbose);
  // `skerry help CMD` is `skerry CMD --help`.
  if (args.size() == 2 && args[0] == "help") args = {args[1], "--help"};
  if (args.empty() || args[0] == "--help" || args[0] == "-h" || args[0] == "help") {
    usage(std::cout);
    return args.empty() ? skerry::kExitUsage : skerry::kExitOk;
  }
  if (args[0] == "--version" || args[0] == "-V") {
    std::cout << "skerry " << SKERRY_VERSION << " (" << SKERRY_GIT_REVISION << ")\n";
    return 0;
  }
  const auto& reg = skerry::command_registry();
  auto it = std::find_if(reg.begin(), reg.end(), [&](auto& c) { return c.name == args[0]; });
  if (it == reg.end()) {
    std::cerr << "skerry: error: unknown sub-command '" << args[0] << "' (see skerry --help)\n";
    return skerry::kExitUsage;
  }
  std::vector<std::string> rest(args.begin() + 1, args.end());
  skerry::initialise_cfitsio();  // before any thread exists (see io/fits_image.h)
  skerry::set_console_command(it->name);
  try {
    try {
      return it->run(rest);
    } catch (...) {
      skerry::end_stage_line();  // the error starts a line of its own
      throw;
    }
  } catch (const skerry::UsageError& e) {
    std::cerr << "skerry " << it->name << ": error: " << e.what() << "\n";
    return skerry::kExitUsage;
  } catch (const skerry::InputError& e) {
    std::cerr << "skerry " << it->name << ": error: " << e.what() << "\n";
    return skerry::kExitBadInput;
  } catch (const skerry::NoDataError& e) {
    std::cerr << "skerry " << it->name << ": error: " << e.what() << "\n";
    return skerry::kExitNoData;
  } catch (const skerry::OutputError& e) {
    std::cerr << "skerry " << it->name << ": error: " << e.what() << "\n";
    return skerry::kExitOutput;
  } catch (const skerry::ExitError& e) {
    std::cerr << "skerry " << it->name << ": " << e.what() << "\n";
    return e.code;
  } catch (const std::bad_alloc&) {
    std::cerr << "skerry " << it->name << ": error: out of memory\n";
    return skerry::kExitInternal;
  } catch (const std::exception& e) {
    std::cerr << "skerry " << it->name << ": internal error: " << e.what() << "\n";
    return skerry::kExitInternal;
  }
}
