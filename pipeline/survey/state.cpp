// `skerry survey`: the SQLite state record (controller only).
#include <sqlite3.h>

#include <unistd.h>

#include <cerrno>
#include <cstring>

#include "app/errors.h"
#include "survey/engine.h"

namespace skerry::surveyrun {

namespace {
sqlite3* H(void* p) { return static_cast<sqlite3*>(p); }

struct Stmt {
  Stmt(sqlite3* db, const char* sql, const std::string& path) {
    if (sqlite3_prepare_v2(db, sql, -1, &s, nullptr) != SQLITE_OK)
      throw OutputError(path, std::string("state record: ") + sqlite3_errmsg(db));
  }
  ~Stmt() { sqlite3_finalize(s); }
  void text(int i, const std::string& v) { sqlite3_bind_text(s, i, v.c_str(), static_cast<int>(v.size()), SQLITE_TRANSIENT); }
  void i64(int i, std::int64_t v) { sqlite3_bind_int64(s, i, v); }
  void f64(int i, double v) { sqlite3_bind_double(s, i, v); }
  std::string col_text(int i) {
    const unsigned char* p = sqlite3_column_text(s, i);
    return p ? reinterpret_cast<const char*>(p) : "";
  }
  sqlite3_stmt* s = nullptr;
};
}  // namespace

namespace {
/// True for the SQLite errors that mean the file itself is damaged.
bool damaged_code(int rc) {
  const int primary = rc & 0xff;
  return primary == SQLITE_CORRUPT || primary == SQLITE_NOTADB || primary == SQLITE_FORMAT;
}
struct Damaged {
  std::string why;
};
}  // namespace

void StateRecord::open_checked() {
  sqlite3* db = nullptr;
  if (sqlite3_open_v2(path_.c_str(), &db, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_FULLMUTEX,
                      nullptr) != SQLITE_OK) {
    std::string msg = db ? sqlite3_errmsg(db) : "cannot open";
    const int rc = db ? sqlite3_extended_errcode(db) : SQLITE_CANTOPEN;
    sqlite3_close(db);
    if (damaged_code(rc)) throw Damaged{msg};
    throw OutputError(path_, "cannot open the state record: " + msg);
  }
  db_ = db;
  sqlite3_busy_timeout(db, 5000);
  auto run = [&](const char* sql) {
    char* err = nullptr;
    const int rc = sqlite3_exec(db, sql, nullptr, nullptr, &err);
    if (rc == SQLITE_OK) return;
    std::string msg = err ? err : sqlite3_errmsg(db);
    sqlite3_free(err);
    if (damaged_code(sqlite3_extended_errcode(db)) || damaged_code(rc)) throw Damaged{msg};
    throw OutputError(path_, "state record: " + msg);
  };
  run("PRAGMA journal_mode=DELETE");
  run("PRAGMA synchronous=FULL");
  // Integrity check at open (SQLite's quick_check: every page, record and index
  // entry well formed; linear in the file size).
  {
    sqlite3_stmt* st = nullptr;
    if (sqlite3_prepare_v2(db, "PRAGMA quick_check", -1, &st, nullptr) != SQLITE_OK) {
      const std::string msg = sqlite3_errmsg(db);
      const int rc = sqlite3_extended_errcode(db);
      if (damaged_code(rc)) throw Damaged{msg};
      throw OutputError(path_, "state record: " + msg);
    }
    std::string first;
    int rc;
    while ((rc = sqlite3_step(st)) == SQLITE_ROW) {
      const unsigned char* t = sqlite3_column_text(st, 0);
      if (first.empty() && t) first = reinterpret_cast<const char*>(t);
    }
    const int ext = sqlite3_extended_errcode(db);
    sqlite3_finalize(st);
    if (rc != SQLITE_DONE) {
      if (damaged_code(rc) || damaged_code(ext)) throw Damaged{sqlite3_errstr(rc)};
      throw OutputError(path_, std::string("state record: ") + sqlite3_errstr(rc));
    }
    if (first != "ok") throw Damaged{"integrity check: " + first};
  }
  run("CREATE TABLE IF NOT EXISTS inputs(path TEXT PRIMARY KEY, size INTEGER, mtime_ns INTEGER, inode INTEGER, sha256 TEXT)");
  run("CREATE TABLE IF NOT EXISTS tiles(name TEXT PRIMARY KEY, image TEXT, status TEXT, inputs_sha256 TEXT, "
      "config_sha256 TEXT, tool_version TEXT, components_sha256 TEXT, message TEXT, centre_ra_deg REAL, "
      "centre_dec_deg REAL, seconds REAL, rows INTEGER, updated_utc TEXT)");
  run("CREATE TABLE IF NOT EXISTS state(key TEXT PRIMARY KEY, value TEXT)");
  // The tables must have the columns this version reads.
  {
    sqlite3_stmt* st = nullptr;
    const char* probe = "SELECT name, image, status, inputs_sha256, config_sha256, tool_version, components_sha256, "
                        "message, centre_ra_deg, centre_dec_deg, seconds, rows, updated_utc FROM tiles LIMIT 0";
    const int rc = sqlite3_prepare_v2(db, probe, -1, &st, nullptr);
    sqlite3_finalize(st);
    if (rc != SQLITE_OK) throw Damaged{std::string("tiles table: ") + sqlite3_errmsg(db)};
  }
}

StateRecord::StateRecord(const std::string& path) : path_(path) {
  try {
    open_checked();
    return;
  } catch (const Damaged& d) {
    sqlite3_close(H(db_));
    db_ = nullptr;
    // Moved aside (with its rollback journal), never deleted: the operator may
    // want to look at it. A fresh record is made; the caller rebuilds it.
    const std::string stamp = utc_now();
    std::string aside = path + ".damaged-" + stamp;
    for (int k = 1; ::access(aside.c_str(), F_OK) == 0; ++k) aside = path + ".damaged-" + stamp + "-" + std::to_string(k);
    if (::rename(path.c_str(), aside.c_str()) != 0)
      throw OutputError(path, "the state record is damaged (" + d.why + ") and cannot be moved aside: " +
                                  std::strerror(errno));
    const std::string journal = path + "-journal";
    if (::access(journal.c_str(), F_OK) == 0) ::rename(journal.c_str(), (aside + "-journal").c_str());
    recovered_from_ = aside;
    recovery_reason_ = d.why;
  }
  try {
    open_checked();
  } catch (const Damaged& d) {
    throw OutputError(path, "a new state record is damaged at once (" + d.why + ")");
  }
}

StateRecord::~StateRecord() { sqlite3_close(H(db_)); }

void StateRecord::exec(const std::string& sql) {
  char* err = nullptr;
  if (sqlite3_exec(H(db_), sql.c_str(), nullptr, nullptr, &err) != SQLITE_OK) {
    std::string msg = err ? err : "error";
    sqlite3_free(err);
    throw OutputError(path_, "state record: " + msg);
  }
}

void StateRecord::begin() { exec("BEGIN IMMEDIATE"); }
void StateRecord::commit() { exec("COMMIT"); }

std::optional<StateRecord::InputKey> StateRecord::input(const std::string& path) const {
  Stmt st(H(db_), "SELECT size, mtime_ns, inode, sha256 FROM inputs WHERE path = ?", path_);
  st.text(1, path);
  if (sqlite3_step(st.s) != SQLITE_ROW) return std::nullopt;
  InputKey k;
  k.size = sqlite3_column_int64(st.s, 0);
  k.mtime_ns = sqlite3_column_int64(st.s, 1);
  k.inode = sqlite3_column_int64(st.s, 2);
  k.sha256 = st.col_text(3);
  return k;
}

void StateRecord::set_input(const std::string& path, const InputKey& k) {
  Stmt st(H(db_), "INSERT OR REPLACE INTO inputs(path, size, mtime_ns, inode, sha256) VALUES (?, ?, ?, ?, ?)", path_);
  st.text(1, path);
  st.i64(2, k.size);
  st.i64(3, k.mtime_ns);
  st.i64(4, k.inode);
  st.text(5, k.sha256);
  if (sqlite3_step(st.s) != SQLITE_DONE) throw OutputError(path_, std::string("state record: ") + sqlite3_errmsg(H(db_)));
}

std::map<std::string, StateRecord::TileState> StateRecord::tiles() const {
  Stmt st(H(db_),
          "SELECT name, image, status, inputs_sha256, config_sha256, tool_version, components_sha256, message, "
          "centre_ra_deg, centre_dec_deg, seconds, rows, updated_utc FROM tiles",
          path_);
  std::map<std::string, TileState> out;
  while (sqlite3_step(st.s) == SQLITE_ROW) {
    TileState t;
    t.name = st.col_text(0);
    t.image = st.col_text(1);
    t.status = st.col_text(2);
    t.inputs_sha256 = st.col_text(3);
    t.config_sha256 = st.col_text(4);
    t.tool_version = st.col_text(5);
    t.components_sha256 = st.col_text(6);
    t.message = st.col_text(7);
    t.centre_ra_deg = sqlite3_column_double(st.s, 8);
    t.centre_dec_deg = sqlite3_column_double(st.s, 9);
    t.seconds = sqlite3_column_double(st.s, 10);
    t.rows = sqlite3_column_int64(st.s, 11);
    t.updated_utc = st.col_text(12);
    out[t.name] = t;
  }
  return out;
}

void StateRecord::set_tile(const TileState& t) {
  Stmt st(H(db_),
          "INSERT OR REPLACE INTO tiles(name, image, status, inputs_sha256, config_sha256, tool_version, "
          "components_sha256, message, centre_ra_deg, centre_dec_deg, seconds, rows, updated_utc) "
          "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
          path_);
  st.text(1, t.name);
  st.text(2, t.image);
  st.text(3, t.status);
  st.text(4, t.inputs_sha256);
  st.text(5, t.config_sha256);
  st.text(6, t.tool_version);
  st.text(7, t.components_sha256);
  st.text(8, t.message);
  st.f64(9, t.centre_ra_deg);
  st.f64(10, t.centre_dec_deg);
  st.f64(11, t.seconds);
  st.i64(12, t.rows);
  st.text(13, t.updated_utc);
  if (sqlite3_step(st.s) != SQLITE_DONE) throw OutputError(path_, std::string("state record: ") + sqlite3_errmsg(H(db_)));
}

std::string StateRecord::get(const std::string& key) const {
  Stmt st(H(db_), "SELECT value FROM state WHERE key = ?", path_);
  st.text(1, key);
  if (sqlite3_step(st.s) != SQLITE_ROW) return "";
  return st.col_text(0);
}

void StateRecord::set(const std::string& key, const std::string& value) {
  Stmt st(H(db_), "INSERT OR REPLACE INTO state(key, value) VALUES (?, ?)", path_);
  st.text(1, key);
  st.text(2, value);
  if (sqlite3_step(st.s) != SQLITE_DONE) throw OutputError(path_, std::string("state record: ") + sqlite3_errmsg(H(db_)));
}

}  // namespace skerry::surveyrun
