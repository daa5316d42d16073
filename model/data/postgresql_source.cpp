#include "model/data/postgresql_source.hpp"

#include <fmt/format.h>
#include <libpq-fe.h>

#include "model/error.hpp"

namespace credence {

namespace {

using Result = std::unique_ptr<PGresult, void (*)(PGresult*)>;

Result wrap(PGresult* r) { return Result(r, &PQclear); }

// libpq's messages end with a line break.
std::string message_of(const char* text) {
    std::string m = text ? text : "";
    while (!m.empty() && (m.back() == '\n' || m.back() == ' ')) m.pop_back();
    return m;
}

// The URI's settings; throws OptionError when libpq cannot parse it or it
// holds a password.
std::string database_of(const std::string& uri) {
    char* error = nullptr;
    PQconninfoOption* options = PQconninfoParse(uri.c_str(), &error);
    if (!options) {
        const std::string m = message_of(error);
        PQfreemem(error);
        throw OptionError(fmt::format("--ratings {}: not a PostgreSQL connection URI: {}", uri, m));
    }
    std::string database;
    bool password = false;
    for (PQconninfoOption* o = options; o->keyword; ++o) {
        if (!o->val) continue;
        if (std::string_view(o->keyword) == "password") password = true;
        if (std::string_view(o->keyword) == "dbname") database = o->val;
    }
    PQconninfoFree(options);
    if (password)
        throw OptionError("--ratings: the PostgreSQL URI holds a password; never put one on the command line (it "
                          "shows in the process list and the shell history): drop it from the URI and set "
                          "PGPASSWORD, or use a password file (~/.pgpass, PGPASSFILE or passfile= in the URI)");
    return database;
}

class PostgresqlSource final : public RowSource {
public:
    PostgresqlSource(const std::string& uri, const std::string& query, std::function<void(uint64_t, uint64_t)> progress)
        : name_(uri), progress_(std::move(progress)) {
        database_of(uri);
        // Keywords before dbname are defaults the URI may override.
        const char* keywords[] = {"connect_timeout", "fallback_application_name", "dbname", nullptr};
        const char* values[] = {"10", "credence", uri.c_str(), nullptr};
        conn_.reset(PQconnectdbParams(keywords, values, 1));
        if (!conn_) throw std::bad_alloc();
        if (PQstatus(conn_.get()) != CONNECTION_OK)
            throw FileError(fmt::format("{}: cannot connect: {}; check the URI, that the server runs, and the password "
                                        "(PGPASSWORD or a password file)",
                                        name_, message_of(PQerrorMessage(conn_.get()))));
        PQsetClientEncoding(conn_.get(), "UTF8");
        Result set = wrap(PQexec(conn_.get(), "SET default_transaction_read_only = on"));
        if (PQresultStatus(set.get()) != PGRES_COMMAND_OK)
            throw FileError(fmt::format("{}: cannot make the session read-only: {}", name_,
                                        message_of(PQerrorMessage(conn_.get()))));
        if (!PQsendQueryParams(conn_.get(), query.c_str(), 0, nullptr, nullptr, nullptr, nullptr, 0))
            throw DataError(fmt::format("{}: cannot send the query: {}; check --query", name_,
                                        message_of(PQerrorMessage(conn_.get()))));
        PQsetSingleRowMode(conn_.get());
        fetch();  // the first row (or the empty result) carries the column names
        std::vector<std::string> columns;
        for (int c = 0; c < PQnfields(current_.get()); ++c) columns.emplace_back(PQfname(current_.get(), c));
        rows_ = std::make_unique<QueryRowBuilder>(std::move(columns), progress_);
    }

    const std::string& name() const override { return name_; }
    const char* position_unit() const override { return "row"; }
    std::optional<std::vector<std::string>> column_names() override { return rows_->columns(); }

    bool next(SourceRow& row) override {
        if (!pending_) fetch();
        pending_ = false;
        if (PQresultStatus(current_.get()) != PGRES_SINGLE_TUPLE) return false;
        rows_->begin_row();
        for (int c = 0; c < int(rows_->columns().size()); ++c) {
            if (PQgetisnull(current_.get(), 0, c)) rows_->add_null();
            else rows_->add_text(std::string_view(PQgetvalue(current_.get(), 0, c), size_t(PQgetlength(current_.get(), 0, c))));
        }
        rows_->finish_row(row);
        return true;
    }

    SourceFacts facts() const override { return {rows_->fingerprint(), std::nullopt}; }

private:
    // The next result: one row, or the end (then the rest is drained, so the
    // connection is left idle). Throws DataError when the server reports an error.
    void fetch() {
        if (done_) {
            current_.reset();
            return;
        }
        current_ = wrap(PQgetResult(conn_.get()));
        const ExecStatusType status = current_ ? PQresultStatus(current_.get()) : PGRES_COMMAND_OK;
        if (status == PGRES_SINGLE_TUPLE) return;
        if (status != PGRES_TUPLES_OK && status != PGRES_COMMAND_OK)
            throw DataError(fmt::format("{}: the query failed: {}; check --query", name_,
                                        message_of(PQresultErrorMessage(current_.get()))));
        if (status == PGRES_COMMAND_OK && rows_ == nullptr && (!current_ || PQnfields(current_.get()) == 0))
            throw DataError(fmt::format("{}: --query returned no rows and no columns; give a SELECT", name_));
        done_ = true;
        while (Result rest = wrap(PQgetResult(conn_.get()))) {
        }
    }

    std::string name_;
    std::function<void(uint64_t, uint64_t)> progress_;
    std::unique_ptr<PGconn, void (*)(PGconn*)> conn_{nullptr, &PQfinish};
    Result current_{nullptr, &PQclear};
    bool pending_ = true;  // current_ holds a row next() has not returned yet
    bool done_ = false;
    std::unique_ptr<QueryRowBuilder> rows_;
};

}  // namespace

bool is_postgresql_source(const std::string& path) {
    return path.starts_with("postgresql://") || path.starts_with("postgres://");
}

std::string postgresql_rejects_path(const std::string& uri) {
    std::string database;
    try {
        database = database_of(uri);
    } catch (const OptionError&) {
        // The source refuses the URI itself, with the reason.
    }
    for (char& c : database)
        if (c == '/' || c == '\\') c = '_';
    return (database.empty() ? std::string("postgresql") : database) + ".rejects.tsv";
}

std::unique_ptr<RowSource> open_postgresql_source(const std::string& uri, const std::string& query,
                                                  std::function<void(uint64_t, uint64_t)> progress) {
    return std::make_unique<PostgresqlSource>(uri, query, std::move(progress));
}

}  // namespace credence
