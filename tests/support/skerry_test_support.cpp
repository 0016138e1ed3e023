#include "skerry_test_support.h"

#include <fcntl.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <fstream>
#include <sstream>
#include <stdexcept>

namespace skerry::test {

std::string skerry_binary() { return SKERRY_BINARY; }
std::string data_dir() { return SKERRY_TEST_DATA_DIR; }
std::string python3() { return fs::exists("/usr/bin/python3") ? "/usr/bin/python3" : "python3"; }

std::string slurp(const fs::path& path) {
  std::ifstream in(path, std::ios::binary);
  std::ostringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

void write_file(const fs::path& path, const std::string& content) {
  std::ofstream out(path, std::ios::binary | std::ios::trunc);
  out << content;
}

std::string shell_quote(const std::string& s) {
  std::string q = "'";
  for (char c : s) {
    if (c == '\'') q += "'\\''";
    else q += c;
  }
  return q + "'";
}

int exit_code(int wait_status) { return WIFEXITED(wait_status) ? WEXITSTATUS(wait_status) : -1; }

int shell(const std::string& cmd) { return exit_code(std::system(cmd.c_str())); }

int shell_quiet(const std::string& cmd) { return shell(cmd + " >/dev/null 2>&1 </dev/null"); }

int shell_capture(const std::string& cmd, std::string* out) {
  FILE* p = ::popen((cmd + " 2>&1").c_str(), "r");
  if (!p) return -1;
  std::string o;
  char buf[4096];
  while (std::size_t n = std::fread(buf, 1, sizeof buf, p)) o.append(buf, n);
  const int st = ::pclose(p);
  if (out) *out = o;
  return exit_code(st);
}

pid_t spawn(const std::vector<std::string>& argv_in, const std::string& out_file, const std::string& err_file) {
  std::vector<std::string> args = argv_in;
  std::vector<char*> argv;
  for (auto& a : args) argv.push_back(a.data());
  argv.push_back(nullptr);
  const pid_t pid = ::fork();
  if (pid == 0) {
    const int o = ::open(out_file.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
    const int e = ::open(err_file.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
    const int nul = ::open("/dev/null", O_RDONLY);
    if (o < 0 || e < 0 || nul < 0) ::_exit(127);
    ::dup2(o, 1);
    ::dup2(e, 2);
    ::dup2(nul, 0);
    ::execvp(argv[0], argv.data());
    ::_exit(127);
  }
  return pid;
}

int wait_exit(pid_t pid) {
  int st = 0;
  if (::waitpid(pid, &st, 0) < 0) return -1;
  if (WIFEXITED(st)) return WEXITSTATUS(st);
  if (WIFSIGNALED(st)) return 128 + WTERMSIG(st);
  return -1;
}

namespace {
// Private folder for captured output of this test process.
std::string capture_root() {
  static const std::string root = [] {
    const fs::path p = fs::temp_directory_path() / ("skerry-test-run-" + std::to_string(::getpid()));
    fs::remove_all(p);
    fs::create_directories(p);
    return p.string();
  }();
  return root;
}
}  // namespace

RunResult run(const std::vector<std::string>& argv, const std::string& capture_dir) {
  static std::atomic<int> counter{0};
  const std::string dir = capture_dir.empty() ? capture_root() : capture_dir;
  const std::string base = dir + "/.run-" + std::to_string(counter++);
  const auto t0 = std::chrono::steady_clock::now();
  RunResult r;
  const pid_t pid = spawn(argv, base + ".stdout", base + ".stderr");
  r.code = pid < 0 ? -1 : wait_exit(pid);
  r.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  r.out = slurp(base + ".stdout");
  r.err = slurp(base + ".stderr");
  std::error_code ec;
  fs::remove(base + ".stdout", ec);
  fs::remove(base + ".stderr", ec);
  return r;
}

RunResult run_skerry(std::vector<std::string> args, const std::string& capture_dir) {
  args.insert(args.begin(), skerry_binary());
  return run(args, capture_dir);
}

std::vector<std::string> list_files(const std::string& dir) {
  std::vector<std::string> v;
  if (!fs::exists(dir)) return v;
  for (const auto& e : fs::directory_iterator(dir)) v.push_back(e.path().filename().string());
  std::sort(v.begin(), v.end());
  return v;
}

TempDir::TempDir(const std::string& tag) {
  std::string tmpl = (fs::temp_directory_path() / ("skerry-" + tag + "-XXXXXX")).string();
  std::vector<char> buf(tmpl.begin(), tmpl.end());
  buf.push_back('\0');
  if (!::mkdtemp(buf.data())) throw std::runtime_error("mkdtemp failed for " + tmpl);
  path_ = buf.data();
}

TempDir::~TempDir() {
  std::error_code ec;
  fs::remove_all(path_, ec);
}

}  // namespace skerry::test
