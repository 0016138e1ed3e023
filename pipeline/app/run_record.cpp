// The JSON run record and a small SHA-256 (FIPS PUB 180-4, Secure Hash Standard).
#include "app/run_record.h"

#include <immintrin.h>
#include <unistd.h>

#include <array>
#include <cstdio>
#include <cstring>
#include <ctime>
#include <exception>
#include <filesystem>
#include <fstream>
#include <nlohmann/json.hpp>

#include "app/console.h"
#include "app/errors.h"
#include "io/atomic_file.h"
#include "app/version.h"

namespace skerry {

namespace {

// SHA-256 round constants: first 32 bits of the fractional parts of the cube
// roots of the first 64 primes (FIPS PUB 180-4, section 4.2.2).
constexpr std::array<std::uint32_t, 64> kK = {
    0x428a2f98, 0x71374491, 0xb5c0fbcf, 0xe9b5dba5, 0x3956c25b, 0x59f111f1, 0x923f82a4, 0xab1c5ed5,
    0xd807aa98, 0x12835b01, 0x243185be, 0x550c7dc3, 0x72be5d74, 0x80deb1fe, 0x9bdc06a7, 0xc19bf174,
    0xe49b69c1, 0xefbe4786, 0x0fc19dc6, 0x240ca1cc, 0x2de92c6f, 0x4a7484aa, 0x5cb0a9dc, 0x76f988da,
    0x983e5152, 0xa831c66d, 0xb00327c8, 0xbf597fc7, 0xc6e00bf3, 0xd5a79147, 0x06ca6351, 0x14292967,
    0x27b70a85, 0x2e1b2138, 0x4d2c6dfc, 0x53380d13, 0x650a7354, 0x766a0abb, 0x81c2c92e, 0x92722c85,
    0xa2bfe8a1, 0xa81a664b, 0xc24b8b70, 0xc76c51a3, 0xd192e819, 0xd6990624, 0xf40e3585, 0x106aa070,
    0x19a4c116, 0x1e376c08, 0x2748774c, 0x34b0bcb5, 0x391c0cb3, 0x4ed8aa4a, 0x5b9cca4f, 0x682e6ff3,
    0x748f82ee, 0x78a5636f, 0x84c87814, 0x8cc70208, 0x90befffa, 0xa4506ceb, 0xbef9a3f7, 0xc67178f2};

class Sha256 {
 public:
  void update(const unsigned char* p, std::size_t n) {
    total_ += n;
    while (n > 0) {
      if (fill_ == 0 && n >= 64) {  // whole blocks straight from the input
        const std::size_t nb = n / 64;
        blocks(p, nb);
        p += 64 * nb;
        n -= 64 * nb;
        continue;
      }
      const std::size_t take = std::min(n, 64 - fill_);
      std::memcpy(buf_ + fill_, p, take);
      fill_ += take;
      p += take;
      n -= take;
      if (fill_ == 64) { blocks(buf_, 1); fill_ = 0; }
    }
  }
  std::string hex() {
    // Padding (section 5.1.1): 0x80, zeros, then the message length in bits, big-endian.
    const std::uint64_t bits = total_ * 8;
    const unsigned char one = 0x80, zero = 0;
    update(&one, 1);
    while (fill_ != 56) update(&zero, 1);
    unsigned char len[8];
    for (int i = 0; i < 8; ++i) len[i] = static_cast<unsigned char>(bits >> (56 - 8 * i));
    update(len, 8);
    static const char* digits = "0123456789abcdef";
    std::string out;
    for (std::uint32_t v : h_)
      for (int s = 28; s >= 0; s -= 4) out += digits[(v >> s) & 0xf];
    return out;
  }

 private:
  static std::uint32_t rotr(std::uint32_t x, int n) { return (x >> n) | (x << (32 - n)); }
  void blocks(const unsigned char* b, std::size_t nb) {
    static const bool have_sha_ext = __builtin_cpu_supports("sha") && __builtin_cpu_supports("sse4.1");
    if (have_sha_ext) {
      blocks_sha_ext(h_, b, nb);
      return;
    }
    for (std::size_t i = 0; i < nb; ++i) block(b + 64 * i);
  }
  // The same compression function (section 6.2.2) with the x86 SHA extensions
  // (Intel, "Intel SHA Extensions", 2013: SHA256RNDS2 does two rounds on the
  // state held as ABEF/CDGH, SHA256MSG1/MSG2 the message schedule of 4.1.2);
  // used when the processor has them, bit for bit the same digest.
  __attribute__((target("sha,sse4.1"))) static void blocks_sha_ext(std::uint32_t h[8], const unsigned char* b,
                                                                    std::size_t nb) {
    const __m128i kByteSwap = _mm_set_epi64x(0x0c0d0e0f08090a0bULL, 0x0405060700010203ULL);
    __m128i tmp = _mm_loadu_si128(reinterpret_cast<const __m128i*>(&h[0]));  // DCBA
    __m128i st1 = _mm_loadu_si128(reinterpret_cast<const __m128i*>(&h[4]));  // HGFE
    tmp = _mm_shuffle_epi32(tmp, 0xB1);                                       // CDAB
    st1 = _mm_shuffle_epi32(st1, 0x1B);                                       // EFGH
    __m128i st0 = _mm_alignr_epi8(tmp, st1, 8);                               // ABEF
    st1 = _mm_blend_epi16(st1, tmp, 0xF0);                                    // CDGH
    for (std::size_t blk = 0; blk < nb; ++blk, b += 64) {
      const __m128i abef = st0, cdgh = st1;
      __m128i w[4];
      for (int i = 0; i < 4; ++i)
        w[i] = _mm_shuffle_epi8(_mm_loadu_si128(reinterpret_cast<const __m128i*>(b + 16 * i)), kByteSwap);
      for (int i = 0; i < 16; ++i) {  // rounds 4i .. 4i+3
        if (i >= 4) {
          // W[t] = s1(W[t-2]) + W[t-7] + s0(W[t-15]) + W[t-16] for four t at once.
          const __m128i s0 = _mm_sha256msg1_epu32(w[(i - 4) & 3], w[(i - 3) & 3]);
          const __m128i w7 = _mm_alignr_epi8(w[(i - 1) & 3], w[(i - 2) & 3], 4);
          w[i & 3] = _mm_sha256msg2_epu32(_mm_add_epi32(s0, w7), w[(i - 1) & 3]);
        }
        __m128i msg = _mm_add_epi32(w[i & 3], _mm_loadu_si128(reinterpret_cast<const __m128i*>(&kK[4 * i])));
        st1 = _mm_sha256rnds2_epu32(st1, st0, msg);
        msg = _mm_shuffle_epi32(msg, 0x0E);
        st0 = _mm_sha256rnds2_epu32(st0, st1, msg);
      }
      st0 = _mm_add_epi32(st0, abef);
      st1 = _mm_add_epi32(st1, cdgh);
    }
    tmp = _mm_shuffle_epi32(st0, 0x1B);    // FEBA
    st1 = _mm_shuffle_epi32(st1, 0xB1);    // DCHG
    st0 = _mm_blend_epi16(tmp, st1, 0xF0); // DCBA
    st1 = _mm_alignr_epi8(st1, tmp, 8);    // HGFE
    _mm_storeu_si128(reinterpret_cast<__m128i*>(&h[0]), st0);
    _mm_storeu_si128(reinterpret_cast<__m128i*>(&h[4]), st1);
  }
  void block(const unsigned char* b) {
    std::uint32_t w[64];
    for (int i = 0; i < 16; ++i)
      w[i] = (std::uint32_t(b[4 * i]) << 24) | (std::uint32_t(b[4 * i + 1]) << 16) |
             (std::uint32_t(b[4 * i + 2]) << 8) | std::uint32_t(b[4 * i + 3]);
    for (int i = 16; i < 64; ++i) {
      const std::uint32_t s0 = rotr(w[i - 15], 7) ^ rotr(w[i - 15], 18) ^ (w[i - 15] >> 3);
      const std::uint32_t s1 = rotr(w[i - 2], 17) ^ rotr(w[i - 2], 19) ^ (w[i - 2] >> 10);
      w[i] = w[i - 16] + s0 + w[i - 7] + s1;
    }
    std::uint32_t a = h_[0], b2 = h_[1], c = h_[2], d = h_[3], e = h_[4], f = h_[5], g = h_[6], h = h_[7];
    for (int i = 0; i < 64; ++i) {
      const std::uint32_t S1 = rotr(e, 6) ^ rotr(e, 11) ^ rotr(e, 25);
      const std::uint32_t ch = (e & f) ^ (~e & g);
      const std::uint32_t t1 = h + S1 + ch + kK[i] + w[i];
      const std::uint32_t S0 = rotr(a, 2) ^ rotr(a, 13) ^ rotr(a, 22);
      const std::uint32_t maj = (a & b2) ^ (a & c) ^ (b2 & c);
      const std::uint32_t t2 = S0 + maj;
      h = g; g = f; f = e; e = d + t1; d = c; c = b2; b2 = a; a = t1 + t2;
    }
    h_[0] += a; h_[1] += b2; h_[2] += c; h_[3] += d; h_[4] += e; h_[5] += f; h_[6] += g; h_[7] += h;
  }
  // Initial hash value (section 5.3.3).
  std::uint32_t h_[8] = {0x6a09e667, 0xbb67ae85, 0x3c6ef372, 0xa54ff53a,
                         0x510e527f, 0x9b05688c, 0x1f83d9ab, 0x5be0cd19};
  unsigned char buf_[64] = {};
  std::size_t fill_ = 0;
  std::uint64_t total_ = 0;
};

std::string iso_time_utc(std::chrono::system_clock::time_point t) {
  const std::time_t tt = std::chrono::system_clock::to_time_t(t);
  std::tm tm{};
  gmtime_r(&tt, &tm);
  char buf[32];
  std::strftime(buf, sizeof buf, "%Y-%m-%dT%H:%M:%SZ", &tm);
  return buf;
}

std::string host_name() {
  char buf[256] = {};
  if (gethostname(buf, sizeof buf - 1) != 0) return "unknown";
  return buf;
}

}  // namespace

std::string sha256_hex(const void* data, std::size_t size) {
  Sha256 s;
  s.update(static_cast<const unsigned char*>(data), size);
  return s.hex();
}

std::string sha256_file(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw InputError(path, "cannot open file to compute its checksum");
  Sha256 s;
  std::vector<char> buf(1 << 20);
  while (in) {
    in.read(buf.data(), static_cast<std::streamsize>(buf.size()));
    const std::streamsize got = in.gcount();
    if (got > 0) s.update(reinterpret_cast<const unsigned char*>(buf.data()), static_cast<std::size_t>(got));
  }
  if (in.bad()) throw InputError(path, "read error while computing its checksum");
  return s.hex();
}

RunRecord::RunRecord(std::string command)
    : command_(std::move(command)),
      started_(std::chrono::system_clock::now()),
      t0_(std::chrono::steady_clock::now()) {}

void RunRecord::set_configuration(const std::map<std::string, std::string>& resolved,
                                  const std::string& config_file) {
  config_ = resolved;
  config_file_ = config_file;
}

std::string RunRecord::add_input(const std::string& role, const std::string& path,
                                 const std::string& sha256) {
  Input in;
  in.role = role;
  in.path = path;
  std::error_code ec;
  in.bytes = std::filesystem::file_size(path, ec);
  if (ec) throw InputError(path, "cannot read file size: " + ec.message());
  in.sha256 = sha256.empty() ? sha256_file(path) : sha256;
  inputs_.push_back(in);
  return in.sha256;
}

void RunRecord::add_output(const std::string& path) { outputs_.push_back(path); }

std::vector<std::string> outputs_listed_in(const std::string& run_record_path) {
  std::vector<std::string> out;
  std::ifstream in(run_record_path);
  if (!in) return out;
  const nlohmann::json j = nlohmann::json::parse(in, nullptr, /*allow_exceptions=*/false);
  if (!j.is_object() || !j.contains("outputs") || !j["outputs"].is_array()) return out;
  for (const auto& o : j["outputs"])
    if (o.is_string()) out.push_back(o.get<std::string>());
  return out;
}
void RunRecord::set_count(const std::string& key, std::int64_t value) { counts_[key] = value; }
void RunRecord::set_value(const std::string& key, const std::string& value) { values_[key] = value; }
void RunRecord::add_stage(const std::string& name, double seconds) { stages_.emplace_back(name, seconds); }

double RunRecord::total_seconds() const {
  return std::chrono::duration<double>(std::chrono::steady_clock::now() - t0_).count();
}

std::string RunRecord::to_json() const {
  nlohmann::ordered_json j;
  j["tool"] = "skerry";
  j["command"] = command_;
  j["version"] = SKERRY_VERSION;
  j["git_revision"] = SKERRY_GIT_REVISION;
  j["started_utc"] = iso_time_utc(started_);
  j["host"] = host_name();
  j["threads"] = threads_;
  j["config_file"] = config_file_;
  nlohmann::ordered_json cfg = nlohmann::ordered_json::object();
  for (const auto& [k, v] : config_) cfg[k] = v;  // std::map: sorted by name
  j["configuration"] = cfg;
  nlohmann::ordered_json ins = nlohmann::ordered_json::array();
  for (const auto& in : inputs_)
    ins.push_back({{"role", in.role}, {"path", in.path}, {"bytes", in.bytes}, {"sha256", in.sha256}});
  j["inputs"] = ins;
  j["outputs"] = outputs_;
  nlohmann::ordered_json counts = nlohmann::ordered_json::object();
  for (const auto& [k, v] : counts_) counts[k] = v;
  j["counts"] = counts;
  nlohmann::ordered_json vals = nlohmann::ordered_json::object();
  for (const auto& [k, v] : values_) vals[k] = v;
  j["values"] = vals;
  nlohmann::ordered_json st = nlohmann::ordered_json::array();
  for (const auto& [name, s] : stages_) st.push_back({{"stage", name}, {"seconds", s}});
  j["stages"] = st;
  j["total_seconds"] = total_seconds();
  return j.dump(2) + "\n";
}

void RunRecord::write(const std::string& path) const { write_text_atomic(path, to_json()); }

StageTimer::StageTimer(RunRecord& record, std::string name)
    : record_(record), name_(std::move(name)), t0_(std::chrono::steady_clock::now()) {
  stage_started(name_);
}

StageTimer::~StageTimer() {
  if (stopped_) return;
  if (std::uncaught_exceptions() > 0) {
    // The stage failed: recorded, but not announced as done.
    record_.add_stage(name_, std::chrono::duration<double>(std::chrono::steady_clock::now() - t0_).count());
    stopped_ = true;
    return;
  }
  stop();
}

double StageTimer::stop() {
  const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0_).count();
  if (!stopped_) {
    record_.add_stage(name_, s);
    stage_ended(name_, s);
  }
  stopped_ = true;
  return s;
}

}  // namespace skerry
