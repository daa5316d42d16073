#include "model/data/sqlite_source.hpp"

#include <charconv>
#include <filesystem>

#include <fmt/format.h>
#include <sqlite3.h>

#include "model/error.hpp"

namespace credence {

namespace {

constexpr std::string_view kPrefix = "sqlite:";

std::string file_of(const std::string& path) { return path.substr(kPrefix.size()); }

class SqliteSource final : public RowSource {
public:
    SqliteSource(const std::string& path, const std::string& query, std::function<void(uint64_t, uint64_t)> progress)
        : name_(path) {
        const std::string file = file_of(path);
        if (file.empty()) throw OptionError("--ratings sqlite: names no database file; write sqlite:PATH");
        std::error_code ec;
        if (!std::filesystem::is_regular_file(file, ec))
            throw FileError(fmt::format("{}: no such database file; check the path after sqlite:", path));
        sqlite3* db = nullptr;
        const int opened = sqlite3_open_v2(file.c_str(), &db, SQLITE_OPEN_READONLY, nullptr);
        db_.reset(db);
        if (opened != SQLITE_OK)
            throw FileError(fmt::format("{}: cannot open the database: {}", path, db ? sqlite3_errmsg(db) : "out of memory"));
        const char* tail = nullptr;
        sqlite3_stmt* statement = nullptr;
        const int prepared = sqlite3_prepare_v2(db, query.c_str(), int(query.size()), &statement, &tail);
        statement_.reset(statement);
        if (prepared != SQLITE_OK) {
            const std::string message = sqlite3_errmsg(db);
            // "file is not a database" comes from preparing the first statement.
            if (sqlite3_errcode(db) == SQLITE_NOTADB)
                throw FileError(fmt::format("{}: {} (not a SQLite database?)", path, message));
            throw DataError(fmt::format("{}: the query failed: {}; check --query", path, message));
        }
        if (!statement_) throw OptionError(fmt::format("{}: --query holds no statement; give the SELECT", path));
        if (tail && std::string_view(tail).find_first_not_of(" \t\r\n;") != std::string_view::npos)
            throw OptionError(fmt::format("{}: --query holds more than one statement; give one SELECT", path));
        std::vector<std::string> columns;
        for (int c = 0; c < sqlite3_column_count(statement); ++c) {
            const char* n = sqlite3_column_name(statement, c);
            columns.emplace_back(n ? n : "");
        }
        rows_ = std::make_unique<QueryRowBuilder>(std::move(columns), std::move(progress));
    }

    const std::string& name() const override { return name_; }
    const char* position_unit() const override { return "row"; }
    std::optional<std::vector<std::string>> column_names() override { return rows_->columns(); }

    bool next(SourceRow& row) override {
        sqlite3_stmt* statement = statement_.get();
        const int rc = sqlite3_step(statement);
        if (rc == SQLITE_DONE) return false;
        if (rc != SQLITE_ROW)
            throw DataError(fmt::format("{}: reading the query's rows failed: {}; check --query", name_,
                                        sqlite3_errmsg(db_.get())));
        rows_->begin_row();
        for (int c = 0; c < int(rows_->columns().size()); ++c) {
            switch (sqlite3_column_type(statement, c)) {
                case SQLITE_NULL: rows_->add_null(); break;
                case SQLITE_INTEGER: add_number(sqlite3_column_int64(statement, c)); break;
                case SQLITE_FLOAT: add_number(sqlite3_column_double(statement, c)); break;
                default: {  // text, or a blob read as its bytes
                    const auto* text = static_cast<const char*>(sqlite3_column_blob(statement, c));
                    rows_->add_text(std::string_view(text ? text : "", size_t(sqlite3_column_bytes(statement, c))));
                }
            }
        }
        rows_->finish_row(row);
        return true;
    }

    SourceFacts facts() const override { return {rows_->fingerprint(), std::nullopt}; }

private:
    template <class T>
    void add_number(T value) {
        char buffer[64];
        const auto [end, ec] = std::to_chars(buffer, buffer + sizeof buffer, value);
        rows_->add_text(std::string_view(buffer, ec == std::errc() ? size_t(end - buffer) : 0));
    }

    std::string name_;
    std::unique_ptr<sqlite3, int (*)(sqlite3*)> db_{nullptr, &sqlite3_close};
    std::unique_ptr<sqlite3_stmt, int (*)(sqlite3_stmt*)> statement_{nullptr, &sqlite3_finalize};
    std::unique_ptr<QueryRowBuilder> rows_;
};

}  // namespace

bool is_sqlite_source(const std::string& path) { return path.starts_with(kPrefix); }

std::string sqlite_rejects_path(const std::string& path) { return file_of(path) + ".rejects.tsv"; }

std::unique_ptr<RowSource> open_sqlite_source(const std::string& path, const std::string& query,
                                              std::function<void(uint64_t, uint64_t)> progress) {
    return std::make_unique<SqliteSource>(path, query, std::move(progress));
}

}  // namespace credence
