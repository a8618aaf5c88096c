// SqliteStore: the Store kept in one SQLite database, <directory>/mdpserve.db, through the
// sqlite3 C API. One connection serves every thread, one call at a time under a mutex; every
// write is one BEGIN IMMEDIATE ... COMMIT transaction, so a crash leaves each logical change
// either wholly applied or not at all. The schema and its version are in kMigrations below.
#include <sqlite3.h>

#include <algorithm>
#include <charconv>
#include <cstdint>
#include <filesystem>
#include <iterator>
#include <memory>
#include <mutex>
#include <new>
#include <optional>
#include <string>
#include <string_view>
#include <system_error>
#include <unordered_map>
#include <utility>
#include <vector>

#include "server/store.h"

namespace mdp::server {
namespace {

constexpr char kDatabaseFile[] = "mdpserve.db";
constexpr int kBusyTimeoutMs = 5000;

// kMigrations[i] takes a database from schema version i (PRAGMA user_version) to i + 1; a
// new database runs them all. Append a step for every schema change and never edit one that
// has shipped: databases in the field are at every version.
//
// Version 1. Each table's `seq` is its insertion order: AUTOINCREMENT never hands out a value
// twice, even after deletes, so "newest first" is well defined when timestamps tie. The big
// column (document, data) comes last in its row: SQLite reads the columns before it without
// walking the blob's overflow pages, which keeps listings cheap however big the blobs are.
// Solutions and jobs belong to a model and go with it (ON DELETE CASCADE).
constexpr const char* kMigrations[] = {
    R"sql(
CREATE TABLE models (
  seq INTEGER PRIMARY KEY AUTOINCREMENT,
  id TEXT NOT NULL UNIQUE,
  name TEXT NOT NULL,
  states INTEGER NOT NULL,
  actions INTEGER NOT NULL,
  state_actions INTEGER NOT NULL,
  outcomes INTEGER NOT NULL,
  warnings_json TEXT NOT NULL,
  created_at TEXT NOT NULL,
  document BLOB NOT NULL
);
CREATE TABLE solutions (
  seq INTEGER PRIMARY KEY AUTOINCREMENT,
  id TEXT NOT NULL UNIQUE,
  model_id TEXT NOT NULL REFERENCES models (id) ON DELETE CASCADE,
  options_json TEXT NOT NULL,
  report_json TEXT NOT NULL,
  created_at TEXT NOT NULL,
  data BLOB NOT NULL
);
CREATE INDEX solutions_by_model ON solutions (model_id, seq);
CREATE TABLE jobs (
  seq INTEGER PRIMARY KEY AUTOINCREMENT,
  id TEXT NOT NULL UNIQUE,
  kind TEXT NOT NULL,
  model_id TEXT NOT NULL REFERENCES models (id) ON DELETE CASCADE,
  status TEXT NOT NULL
      CHECK (status IN ('queued', 'running', 'succeeded', 'failed', 'cancelled')),
  created_at TEXT NOT NULL,
  started_at TEXT NOT NULL,
  finished_at TEXT NOT NULL,
  solution_id TEXT NOT NULL,
  error TEXT NOT NULL,
  request_json TEXT NOT NULL,
  result_json TEXT NOT NULL
);
CREATE INDEX jobs_by_model ON jobs (model_id, seq);
CREATE INDEX jobs_by_status ON jobs (status, seq);
)sql",
};

constexpr char kModelColumns[] =
    "id, name, states, actions, state_actions, outcomes, warnings_json, created_at";
constexpr char kSolutionColumns[] = "id, model_id, options_json, report_json, created_at";
constexpr char kJobColumns[] =
    "id, kind, model_id, status, created_at, started_at, finished_at, solution_id, error, "
    "request_json, result_json";

// The one mapping from an SQLite result code to a Status. BUSY and LOCKED mean another
// connection held the database past the busy timeout: the caller may try again.
Status SqliteError(sqlite3* db, int rc, std::string_view operation) {
  std::string message = "store: " + std::string(operation) + ": " +
                        (db != nullptr ? sqlite3_errmsg(db) : sqlite3_errstr(rc));
  switch (rc & 0xff) {
    case SQLITE_BUSY:
    case SQLITE_LOCKED:
      return Status(StatusCode::kUnavailable, std::move(message));
    case SQLITE_FULL:
    case SQLITE_NOMEM:
    case SQLITE_TOOBIG:
      return ResourceExhaustedError(std::move(message));
    default:
      return InternalError(std::move(message));
  }
}

// Binds parameters 1, 2, ... in order and keeps the first failure. Binds without copying
// (SQLITE_STATIC): the caller keeps each value alive until the statement is reset, which
// spares a copy of blobs that may be hundreds of MB.
class Binder {
 public:
  explicit Binder(sqlite3_stmt* stmt) : stmt_(stmt) {}

  Binder& Text(std::string_view value) {
    if (rc_ == SQLITE_OK) {
      rc_ = sqlite3_bind_text64(stmt_, ++index_, NotNull(value), value.size(), SQLITE_STATIC,
                                SQLITE_UTF8);
    }
    return *this;
  }
  Binder& Blob(std::string_view value) {
    if (rc_ == SQLITE_OK) {
      rc_ = sqlite3_bind_blob64(stmt_, ++index_, NotNull(value), value.size(), SQLITE_STATIC);
    }
    return *this;
  }
  Binder& Int(int64_t value) {
    if (rc_ == SQLITE_OK) rc_ = sqlite3_bind_int64(stmt_, ++index_, value);
    return *this;
  }
  int rc() const { return rc_; }

 private:
  // SQLite binds NULL for a null pointer; an empty value must stay an empty value.
  static const char* NotNull(std::string_view value) {
    return value.data() != nullptr ? value.data() : "";
  }

  sqlite3_stmt* stmt_;
  int index_ = 0;
  int rc_ = SQLITE_OK;
};

// Resets a cached statement and drops its bindings at scope exit, so that no bound buffer is
// referenced after the call that bound it returns.
class StatementUse {
 public:
  explicit StatementUse(sqlite3_stmt* stmt) : stmt_(stmt) {}
  ~StatementUse() {
    sqlite3_reset(stmt_);
    sqlite3_clear_bindings(stmt_);
  }
  StatementUse(const StatementUse&) = delete;
  StatementUse& operator=(const StatementUse&) = delete;

 private:
  sqlite3_stmt* stmt_;
};

std::string ColumnText(sqlite3_stmt* stmt, int column) {
  const auto* text = reinterpret_cast<const char*>(sqlite3_column_text(stmt, column));
  const int bytes = sqlite3_column_bytes(stmt, column);
  return text != nullptr ? std::string(text, static_cast<size_t>(bytes)) : std::string();
}

// Copies a BLOB column into *out. The copy may be hundreds of MB: failing to allocate it is
// kResourceExhausted, not an exception.
Status ColumnBlob(sqlite3* db, sqlite3_stmt* stmt, int column, std::string_view operation,
                  std::string* out) {
  const void* blob = sqlite3_column_blob(stmt, column);
  const int bytes = sqlite3_column_bytes(stmt, column);
  if (blob == nullptr && sqlite3_errcode(db) == SQLITE_NOMEM) {
    return SqliteError(db, SQLITE_NOMEM, operation);
  }
  try {
    out->assign(static_cast<const char*>(blob), blob != nullptr ? bytes : 0);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("store: " + std::string(operation) + ": cannot allocate " +
                                  std::to_string(bytes) + " bytes");
  }
  return Status::Ok();
}

// Reads the kModelColumns of the current row.
ModelRecord ReadModel(sqlite3_stmt* stmt) {
  ModelRecord model;
  model.id = ColumnText(stmt, 0);
  model.name = ColumnText(stmt, 1);
  model.states = sqlite3_column_int64(stmt, 2);
  model.actions = sqlite3_column_int64(stmt, 3);
  model.state_actions = sqlite3_column_int64(stmt, 4);
  model.outcomes = sqlite3_column_int64(stmt, 5);
  model.warnings_json = ColumnText(stmt, 6);
  model.created_at = ColumnText(stmt, 7);
  return model;
}

// Reads the kSolutionColumns of the current row.
SolutionRecord ReadSolution(sqlite3_stmt* stmt) {
  SolutionRecord solution;
  solution.id = ColumnText(stmt, 0);
  solution.model_id = ColumnText(stmt, 1);
  solution.options_json = ColumnText(stmt, 2);
  solution.report_json = ColumnText(stmt, 3);
  solution.created_at = ColumnText(stmt, 4);
  return solution;
}

// Reads the kJobColumns of the current row; kInternal if the stored status is not a name.
Result<JobRecord> ReadJob(sqlite3_stmt* stmt) {
  JobRecord job;
  job.id = ColumnText(stmt, 0);
  job.kind = ColumnText(stmt, 1);
  job.model_id = ColumnText(stmt, 2);
  const std::string status = ColumnText(stmt, 3);
  std::optional<JobStatus> parsed = ParseJobStatus(status);
  if (!parsed) return InternalError("store: job " + job.id + " has unknown status " + status);
  job.status = *parsed;
  job.created_at = ColumnText(stmt, 4);
  job.started_at = ColumnText(stmt, 5);
  job.finished_at = ColumnText(stmt, 6);
  job.solution_id = ColumnText(stmt, 7);
  job.error = ColumnText(stmt, 8);
  job.request_json = ColumnText(stmt, 9);
  job.result_json = ColumnText(stmt, 10);
  return job;
}

class SqliteStore final : public Store {
 public:
  // Takes ownership of `db`.
  explicit SqliteStore(sqlite3* db) : db_(db) {}
  ~SqliteStore() override;
  SqliteStore(const SqliteStore&) = delete;
  SqliteStore& operator=(const SqliteStore&) = delete;

  // Sets the connection's pragmas and brings the schema up to date. Called once, by
  // OpenSqliteStore, before the store is shared.
  Status Configure();

  int64_t MaxValueBytes() override;
  Status PutModel(const ModelRecord& model, bool* created) override;
  Result<ModelRecord> GetModel(const std::string& id, bool with_document) override;
  Result<std::vector<ModelRecord>> ListModels() override;
  Status DeleteModel(const std::string& id) override;
  Status PutSolution(const SolutionRecord& solution) override;
  Result<SolutionRecord> GetSolution(const std::string& id, bool with_data) override;
  Result<std::vector<SolutionRecord>> ListSolutions(const std::string& model_id) override;
  Status PutJob(const JobRecord& job) override;
  Result<JobRecord> GetJob(const std::string& id) override;
  Result<std::vector<JobRecord>> ListJobs(const std::string& model_id,
                                          std::optional<JobStatus> status, int64_t limit) override;

 private:
  // All REQUIRE mu_ held.
  Status Exec(const std::string& sql, std::string_view operation);
  // Runs `sql`, a SELECT of at most one row keyed by one text parameter `key`, and reads the
  // row with `read(stmt, &record)`. kNotFound naming `what` if there is no row.
  template <typename Record, typename Read>
  Result<Record> SelectOne(const std::string& sql, const std::string& key, std::string_view what,
                           const std::string& operation, Read read);
  Result<std::string> QueryText(const std::string& sql, std::string_view operation);
  Status Migrate();
  // The cached prepared statement for `sql` (prepared on first use; owned by the store).
  Result<sqlite3_stmt*> Prepare(const std::string& sql, std::string_view operation);
  // Runs `body` (returning Status) between BEGIN IMMEDIATE and COMMIT; rolls back if the
  // body or the commit fails.
  template <typename Body>
  Status InTransaction(std::string_view operation, Body&& body);
  // Steps a statement that returns no rows.
  Status StepToDone(sqlite3_stmt* stmt, std::string_view operation);
  // OK iff a model with this id is stored; kFailedPrecondition if not.
  Status RequireModel(const std::string& model_id, std::string_view operation);
  Status CheckBlobSize(std::string_view blob, std::string_view what, std::string_view operation);

  std::mutex mu_;
  sqlite3* const db_;  // Owned. GUARDED_BY(mu_): the connection runs one call at a time.
  std::unordered_map<std::string, sqlite3_stmt*> statements_;  // GUARDED_BY(mu_). Owned.
};

SqliteStore::~SqliteStore() {
  for (auto& [sql, stmt] : statements_) sqlite3_finalize(stmt);
  sqlite3_close_v2(db_);
}

Status SqliteStore::Configure() {
  std::lock_guard<std::mutex> lock(mu_);
  sqlite3_extended_result_codes(db_, 1);
  int rc = sqlite3_busy_timeout(db_, kBusyTimeoutMs);
  if (rc != SQLITE_OK) return SqliteError(db_, rc, "set busy timeout");
  // Enforced per connection, and only outside a transaction: set before anything else runs.
  MDP_RETURN_IF_ERROR(Exec("PRAGMA foreign_keys = ON", "enable foreign keys"));
  // WAL: readers do not block the writer, and a commit is one append to the log, which a
  // crash at any point leaves either complete (replayed on open) or ignored.
  Result<std::string> mode = QueryText("PRAGMA journal_mode = WAL", "set WAL journal mode");
  if (!mode.ok()) return mode.status();
  if (*mode != "wal") {
    return FailedPreconditionError("store: the file system refused WAL mode (journal_mode is " +
                                   *mode + ")");
  }
  // FULL, not NORMAL: in WAL mode NORMAL syncs the log only at checkpoints, so a commit
  // survives kill -9 (the OS still has the pages) but the last commits can vanish on power
  // loss or a kernel crash. FULL syncs the log on every commit, so a change the service has
  // acknowledged (a job accepted, a solution stored) is on disk. The price is one fsync per
  // write, small next to a solve.
  MDP_RETURN_IF_ERROR(Exec("PRAGMA synchronous = FULL", "set synchronous mode"));
  // Solution blobs of hundreds of MB pass through the log; without a limit the log file
  // stays at its largest size after each checkpoint. Truncate it back to 64 MiB.
  MDP_RETURN_IF_ERROR(Exec("PRAGMA journal_size_limit = 67108864", "set journal size limit"));
  return Migrate();
}

Status SqliteStore::Exec(const std::string& sql, std::string_view operation) {
  const int rc = sqlite3_exec(db_, sql.c_str(), nullptr, nullptr, nullptr);
  return rc == SQLITE_OK ? Status::Ok() : SqliteError(db_, rc, operation);
}

Result<std::string> SqliteStore::QueryText(const std::string& sql, std::string_view operation) {
  sqlite3_stmt* raw = nullptr;
  int rc = sqlite3_prepare_v2(db_, sql.c_str(), -1, &raw, nullptr);
  if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
  std::unique_ptr<sqlite3_stmt, int (*)(sqlite3_stmt*)> stmt(raw, sqlite3_finalize);
  rc = sqlite3_step(stmt.get());
  if (rc != SQLITE_ROW) return SqliteError(db_, rc, operation);
  return ColumnText(stmt.get(), 0);
}

Status SqliteStore::Migrate() {
  return InTransaction("migrate schema", [&]() -> Status {
    // Read inside the transaction: another process may have migrated since we opened.
    Result<std::string> version_text = QueryText("PRAGMA user_version", "read schema version");
    if (!version_text.ok()) return version_text.status();
    int64_t version = 0;
    const char* end = version_text->data() + version_text->size();
    if (std::from_chars(version_text->data(), end, version).ptr != end) {
      return InternalError("store: schema version '" + *version_text + "' is not a number");
    }
    const auto latest = static_cast<int64_t>(std::size(kMigrations));
    if (version > latest) {
      return FailedPreconditionError("store: database schema version " + std::to_string(version) +
                                     " is newer than this build's " + std::to_string(latest));
    }
    for (int64_t step = version; step < latest; ++step) {
      MDP_RETURN_IF_ERROR(
          Exec(kMigrations[step], "migrate schema to version " + std::to_string(step + 1)));
    }
    if (version == latest) return Status::Ok();
    return Exec("PRAGMA user_version = " + std::to_string(latest), "write schema version");
  });
}

Result<sqlite3_stmt*> SqliteStore::Prepare(const std::string& sql, std::string_view operation) {
  auto it = statements_.find(sql);
  if (it != statements_.end()) return it->second;
  sqlite3_stmt* stmt = nullptr;
  const int rc =
      sqlite3_prepare_v3(db_, sql.c_str(), -1, SQLITE_PREPARE_PERSISTENT, &stmt, nullptr);
  if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
  statements_.emplace(sql, stmt);
  return stmt;
}

template <typename Body>
Status SqliteStore::InTransaction(std::string_view operation, Body&& body) {
  // IMMEDIATE takes the write lock at BEGIN, where the busy timeout applies. A deferred
  // transaction would take it at its first write and could fail there with SQLITE_BUSY,
  // which the busy handler cannot wait out.
  MDP_RETURN_IF_ERROR(Exec("BEGIN IMMEDIATE", operation));
  Status status = body();
  if (status.ok()) status = Exec("COMMIT", operation);
  // SQLite has already rolled back after some errors (SQLITE_FULL, SQLITE_NOMEM, I/O).
  if (!status.ok() && sqlite3_get_autocommit(db_) == 0) {
    sqlite3_exec(db_, "ROLLBACK", nullptr, nullptr, nullptr);
  }
  return status;
}

Status SqliteStore::StepToDone(sqlite3_stmt* stmt, std::string_view operation) {
  const int rc = sqlite3_step(stmt);
  return rc == SQLITE_DONE ? Status::Ok() : SqliteError(db_, rc, operation);
}

Status SqliteStore::RequireModel(const std::string& model_id, std::string_view operation) {
  Result<sqlite3_stmt*> stmt = Prepare("SELECT 1 FROM models WHERE id = ?", operation);
  if (!stmt.ok()) return stmt.status();
  StatementUse use(*stmt);
  const int rc = Binder(*stmt).Text(model_id).rc();
  if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
  switch (const int step = sqlite3_step(*stmt)) {
    case SQLITE_ROW:
      return Status::Ok();
    case SQLITE_DONE:
      return FailedPreconditionError("store: " + std::string(operation) + ": model " + model_id +
                                     " is not stored");
    default:
      return SqliteError(db_, step, operation);
  }
}

Status SqliteStore::CheckBlobSize(std::string_view blob, std::string_view what,
                                  std::string_view operation) {
  const auto limit = static_cast<size_t>(sqlite3_limit(db_, SQLITE_LIMIT_LENGTH, -1));
  if (blob.size() < limit) return Status::Ok();
  return ResourceExhaustedError("store: " + std::string(operation) + ": " + std::string(what) +
                                " of " + std::to_string(blob.size()) +
                                " bytes is over the store's limit of " + std::to_string(limit));
}

// SQLite's largest string or BLOB (SQLITE_LIMIT_LENGTH) is one more than the largest value
// CheckBlobSize lets through.
int64_t SqliteStore::MaxValueBytes() {
  std::lock_guard<std::mutex> lock(mu_);
  return static_cast<int64_t>(sqlite3_limit(db_, SQLITE_LIMIT_LENGTH, -1)) - 1;
}

Status SqliteStore::PutModel(const ModelRecord& model, bool* created) {
  const std::string operation = "put model " + model.id;
  std::lock_guard<std::mutex> lock(mu_);
  MDP_RETURN_IF_ERROR(CheckBlobSize(model.document, "document", operation));
  return InTransaction(operation, [&]() -> Status {
    Result<sqlite3_stmt*> stmt =
        Prepare(std::string("INSERT INTO models (") + kModelColumns +
                    ", document) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (id) DO NOTHING",
                operation);
    if (!stmt.ok()) return stmt.status();
    StatementUse use(*stmt);
    const int rc = Binder(*stmt)
                       .Text(model.id)
                       .Text(model.name)
                       .Int(model.states)
                       .Int(model.actions)
                       .Int(model.state_actions)
                       .Int(model.outcomes)
                       .Text(model.warnings_json)
                       .Text(model.created_at)
                       .Blob(model.document)
                       .rc();
    if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
    MDP_RETURN_IF_ERROR(StepToDone(*stmt, operation));
    *created = sqlite3_changes(db_) == 1;
    return Status::Ok();
  });
}

template <typename Record, typename Read>
Result<Record> SqliteStore::SelectOne(const std::string& sql, const std::string& key,
                                      std::string_view what, const std::string& operation,
                                      Read read) {
  Result<sqlite3_stmt*> stmt = Prepare(sql, operation);
  if (!stmt.ok()) return stmt.status();
  StatementUse use(*stmt);
  int rc = Binder(*stmt).Text(key).rc();
  if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
  rc = sqlite3_step(*stmt);
  if (rc == SQLITE_DONE) {
    return NotFoundError("store: " + std::string(what) + " " + key + " not found");
  }
  if (rc != SQLITE_ROW) return SqliteError(db_, rc, operation);
  Record record;
  MDP_RETURN_IF_ERROR(read(*stmt, &record));
  return record;
}

Result<ModelRecord> SqliteStore::GetModel(const std::string& id, bool with_document) {
  const std::string operation = "get model " + id;
  std::lock_guard<std::mutex> lock(mu_);
  return SelectOne<ModelRecord>(
      std::string("SELECT ") + kModelColumns + (with_document ? ", document" : "") +
          " FROM models WHERE id = ?",
      id, "model", operation, [&](sqlite3_stmt* stmt, ModelRecord* model) -> Status {
        *model = ReadModel(stmt);
        if (!with_document) return Status::Ok();
        return ColumnBlob(db_, stmt, 8, operation, &model->document);
      });
}

Result<std::vector<ModelRecord>> SqliteStore::ListModels() {
  constexpr std::string_view kOperation = "list models";
  std::lock_guard<std::mutex> lock(mu_);
  Result<sqlite3_stmt*> stmt =
      Prepare(std::string("SELECT ") + kModelColumns + " FROM models ORDER BY seq", kOperation);
  if (!stmt.ok()) return stmt.status();
  StatementUse use(*stmt);
  std::vector<ModelRecord> models;
  int rc;
  while ((rc = sqlite3_step(*stmt)) == SQLITE_ROW) models.push_back(ReadModel(*stmt));
  if (rc != SQLITE_DONE) return SqliteError(db_, rc, kOperation);
  return models;
}

Status SqliteStore::DeleteModel(const std::string& id) {
  const std::string operation = "delete model " + id;
  std::lock_guard<std::mutex> lock(mu_);
  return InTransaction(operation, [&]() -> Status {
    // The model's solutions and jobs go in the same statement (ON DELETE CASCADE).
    Result<sqlite3_stmt*> stmt = Prepare("DELETE FROM models WHERE id = ?", operation);
    if (!stmt.ok()) return stmt.status();
    StatementUse use(*stmt);
    const int rc = Binder(*stmt).Text(id).rc();
    if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
    MDP_RETURN_IF_ERROR(StepToDone(*stmt, operation));
    // sqlite3_changes counts the model row only, not the cascaded ones.
    if (sqlite3_changes(db_) == 0) return NotFoundError("store: model " + id + " not found");
    return Status::Ok();
  });
}

Status SqliteStore::PutSolution(const SolutionRecord& solution) {
  const std::string operation = "put solution " + solution.id;
  std::lock_guard<std::mutex> lock(mu_);
  MDP_RETURN_IF_ERROR(CheckBlobSize(solution.data, "solution data", operation));
  return InTransaction(operation, [&]() -> Status {
    MDP_RETURN_IF_ERROR(RequireModel(solution.model_id, operation));
    // Delete, then insert: a replaced solution takes a new `seq` and lists as the newest.
    Result<sqlite3_stmt*> remove = Prepare("DELETE FROM solutions WHERE id = ?", operation);
    if (!remove.ok()) return remove.status();
    {
      StatementUse use(*remove);
      const int rc = Binder(*remove).Text(solution.id).rc();
      if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
      MDP_RETURN_IF_ERROR(StepToDone(*remove, operation));
    }
    Result<sqlite3_stmt*> insert =
        Prepare(std::string("INSERT INTO solutions (") + kSolutionColumns +
                    ", data) VALUES (?, ?, ?, ?, ?, ?)",
                operation);
    if (!insert.ok()) return insert.status();
    StatementUse use(*insert);
    const int rc = Binder(*insert)
                       .Text(solution.id)
                       .Text(solution.model_id)
                       .Text(solution.options_json)
                       .Text(solution.report_json)
                       .Text(solution.created_at)
                       .Blob(solution.data)
                       .rc();
    if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
    return StepToDone(*insert, operation);
  });
}

Result<SolutionRecord> SqliteStore::GetSolution(const std::string& id, bool with_data) {
  const std::string operation = "get solution " + id;
  std::lock_guard<std::mutex> lock(mu_);
  return SelectOne<SolutionRecord>(
      std::string("SELECT ") + kSolutionColumns + (with_data ? ", data" : "") +
          " FROM solutions WHERE id = ?",
      id, "solution", operation, [&](sqlite3_stmt* stmt, SolutionRecord* solution) -> Status {
        *solution = ReadSolution(stmt);
        if (!with_data) return Status::Ok();
        return ColumnBlob(db_, stmt, 5, operation, &solution->data);
      });
}

Result<std::vector<SolutionRecord>> SqliteStore::ListSolutions(const std::string& model_id) {
  const std::string operation = "list solutions of model " + model_id;
  std::lock_guard<std::mutex> lock(mu_);
  Result<sqlite3_stmt*> stmt = Prepare(std::string("SELECT ") + kSolutionColumns +
                                           " FROM solutions WHERE model_id = ? ORDER BY seq DESC",
                                       operation);
  if (!stmt.ok()) return stmt.status();
  StatementUse use(*stmt);
  int rc = Binder(*stmt).Text(model_id).rc();
  if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
  std::vector<SolutionRecord> solutions;
  while ((rc = sqlite3_step(*stmt)) == SQLITE_ROW) solutions.push_back(ReadSolution(*stmt));
  if (rc != SQLITE_DONE) return SqliteError(db_, rc, operation);
  return solutions;
}

Status SqliteStore::PutJob(const JobRecord& job) {
  const std::string operation = "put job " + job.id;
  std::lock_guard<std::mutex> lock(mu_);
  return InTransaction(operation, [&]() -> Status {
    MDP_RETURN_IF_ERROR(RequireModel(job.model_id, operation));
    // An update keeps the row, and with it the job's `seq`: its place is its submission.
    Result<sqlite3_stmt*> stmt =
        Prepare(std::string("INSERT INTO jobs (") + kJobColumns +
                    ") VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (id) DO UPDATE SET "
                    "kind = excluded.kind, model_id = excluded.model_id, status = excluded.status, "
                    "created_at = excluded.created_at, started_at = excluded.started_at, "
                    "finished_at = excluded.finished_at, solution_id = excluded.solution_id, "
                    "error = excluded.error, request_json = excluded.request_json, "
                    "result_json = excluded.result_json",
                operation);
    if (!stmt.ok()) return stmt.status();
    StatementUse use(*stmt);
    const int rc = Binder(*stmt)
                       .Text(job.id)
                       .Text(job.kind)
                       .Text(job.model_id)
                       .Text(JobStatusName(job.status))
                       .Text(job.created_at)
                       .Text(job.started_at)
                       .Text(job.finished_at)
                       .Text(job.solution_id)
                       .Text(job.error)
                       .Text(job.request_json)
                       .Text(job.result_json)
                       .rc();
    if (rc != SQLITE_OK) return SqliteError(db_, rc, operation);
    return StepToDone(*stmt, operation);
  });
}

Result<JobRecord> SqliteStore::GetJob(const std::string& id) {
  const std::string operation = "get job " + id;
  std::lock_guard<std::mutex> lock(mu_);
  return SelectOne<JobRecord>(std::string("SELECT ") + kJobColumns + " FROM jobs WHERE id = ?",
                              id, "job", operation, [](sqlite3_stmt* stmt, JobRecord* job) {
                                Result<JobRecord> read = ReadJob(stmt);
                                if (!read.ok()) return read.status();
                                *job = std::move(*read);
                                return Status::Ok();
                              });
}

Result<std::vector<JobRecord>> SqliteStore::ListJobs(const std::string& model_id,
                                                     std::optional<JobStatus> status,
                                                     int64_t limit) {
  constexpr std::string_view kOperation = "list jobs";
  if (limit < 0) {
    return InvalidArgumentError("store: list jobs: limit " + std::to_string(limit) +
                                " is negative");
  }
  std::lock_guard<std::mutex> lock(mu_);
  // One statement per combination of filters, rather than "(? = '' OR model_id = ?)", so
  // that each can use its index.
  std::string sql = std::string("SELECT ") + kJobColumns + " FROM jobs";
  if (!model_id.empty()) sql += " WHERE model_id = ?";
  if (status) sql += model_id.empty() ? " WHERE status = ?" : " AND status = ?";
  sql += " ORDER BY seq DESC LIMIT ?";
  Result<sqlite3_stmt*> stmt = Prepare(sql, kOperation);
  if (!stmt.ok()) return stmt.status();
  StatementUse use(*stmt);
  Binder binder(*stmt);
  if (!model_id.empty()) binder.Text(model_id);
  if (status) binder.Text(JobStatusName(*status));
  int rc = binder.Int(limit).rc();
  if (rc != SQLITE_OK) return SqliteError(db_, rc, kOperation);
  std::vector<JobRecord> jobs;
  while ((rc = sqlite3_step(*stmt)) == SQLITE_ROW) {
    Result<JobRecord> job = ReadJob(*stmt);
    if (!job.ok()) return job.status();
    jobs.push_back(*std::move(job));
  }
  if (rc != SQLITE_DONE) return SqliteError(db_, rc, kOperation);
  return jobs;
}

}  // namespace

Result<std::unique_ptr<Store>> OpenSqliteStore(const std::string& directory,
                                               int64_t max_value_bytes) {
  std::error_code error;
  std::filesystem::create_directories(directory, error);
  if (error) {
    return InternalError("store: cannot create directory " + directory + ": " + error.message());
  }
  const std::string path = (std::filesystem::path(directory) / kDatabaseFile).string();
  sqlite3* db = nullptr;
  // NOMUTEX: SqliteStore serialises all use of the connection under its own mutex.
  const int rc = sqlite3_open_v2(
      path.c_str(), &db, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_NOMUTEX, nullptr);
  if (rc != SQLITE_OK) {
    Status status = SqliteError(db, rc, "open " + path);
    sqlite3_close_v2(db);  // A handle is returned even on failure; closing nullptr is a no-op.
    return status;
  }
  if (max_value_bytes > 0) {  // SQLite's length limit is one more than the largest value.
    const int64_t current = sqlite3_limit(db, SQLITE_LIMIT_LENGTH, -1);
    const int64_t wanted = std::min(current, max_value_bytes + 1);
    sqlite3_limit(db, SQLITE_LIMIT_LENGTH, static_cast<int>(wanted));
  }
  auto store = std::make_unique<SqliteStore>(db);
  MDP_RETURN_IF_ERROR(store->Configure());
  return std::unique_ptr<Store>(std::move(store));
}

}  // namespace mdp::server
