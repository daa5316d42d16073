#include "model/data/ingest.hpp"

#include <algorithm>
#include <array>
#include <cctype>
#include <cerrno>
#include <charconv>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <memory>
#include <optional>
#include <string_view>
#include <type_traits>
#include <vector>

#include <sys/mman.h>

#include <fmt/format.h>
#include <xxhash.h>

#include "model/data/csv_source.hpp"
#include "model/data/postgresql_source.hpp"
#include "model/data/sqlite_source.hpp"
#include "model/error.hpp"

namespace credence {

std::string_view trim_field(std::string_view s) {
    while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
    while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
    return s;
}

namespace {

// Past this many rejects, with more than half of all rows rejected, the file
// is read wrongly (delimiter, columns) and reading on would only fill the rejects file.
constexpr uint64_t kEarlyAbortRejects = 1000;

// What to do when the rejects path names a file that is not a rejects file.
constexpr const char* kRejectsRemedy =
    "pass another --rejects-path (or move that file away to use this one)";

// A field as shown in a reason: quoted, cut to a readable length.
std::string shown(std::string_view s) {
    constexpr size_t max_chars = 40;
    if (s.size() <= max_chars) return fmt::format("'{}'", s);
    return fmt::format("'{}...'", s.substr(0, max_chars));
}

bool all_digits(std::string_view s) {
    return !s.empty() && std::all_of(s.begin(), s.end(), [](unsigned char c) { return std::isdigit(c); });
}

// A 0-based column index given as digits; absurdly long ones saturate (and
// then fail the range check with a clear message).
size_t column_index(std::string_view digits) {
    size_t value = 0;
    for (char c : digits) value = std::min<size_t>(value * 10 + size_t(c - '0'), size_t{1} << 30);
    return value;
}

// A decimal number, whole field (surrounding blanks allowed). NaN and
// infinity parse (the caller rejects them with their own reason).
std::optional<double> parse_number(std::string_view s) {
    s = trim_field(s);
    if (s.size() > 1 && s.front() == '+' && s[1] != '-') s.remove_prefix(1);
    if (s.empty()) return std::nullopt;
    double value = 0.0;
    const auto [end, ec] = std::from_chars(s.data(), s.data() + s.size(), value);
    if (ec != std::errc() || end != s.data() + s.size()) return std::nullopt;
    return value;
}

// Reads exactly `n` digits at s[pos..] into out.
bool fixed_digits(std::string_view s, size_t pos, size_t n, int& out) {
    if (pos + n > s.size()) return false;
    out = 0;
    for (size_t i = pos; i < pos + n; ++i) {
        if (!std::isdigit(static_cast<unsigned char>(s[i]))) return false;
        out = out * 10 + (s[i] - '0');
    }
    return true;
}

// ISO-8601 calendar date or date-time in UTC seconds: YYYY-MM-DD, optionally
// followed by 'T' or ' ' and hh:mm[:ss[.fff]], optionally followed by 'Z' or
// an offset +hh[:mm] / -hh[:mm]. A date without a time means midnight UTC.
std::optional<double> parse_iso8601(std::string_view s) {
    int year = 0, month = 0, day = 0;
    if (!fixed_digits(s, 0, 4, year) || s.size() < 10 || s[4] != '-' || !fixed_digits(s, 5, 2, month) ||
        s[7] != '-' || !fixed_digits(s, 8, 2, day))
        return std::nullopt;
    const std::chrono::year_month_day ymd{std::chrono::year{year}, std::chrono::month{static_cast<unsigned>(month)},
                                          std::chrono::day{static_cast<unsigned>(day)}};
    if (!ymd.ok()) return std::nullopt;
    double seconds = static_cast<double>(std::chrono::sys_days{ymd}.time_since_epoch().count()) * 86400.0;
    size_t pos = 10;
    if (pos == s.size()) return seconds;
    if (s[pos] != 'T' && s[pos] != ' ') return std::nullopt;
    int hour = 0, minute = 0, second = 0;
    if (!fixed_digits(s, pos + 1, 2, hour) || pos + 3 >= s.size() || s[pos + 3] != ':' ||
        !fixed_digits(s, pos + 4, 2, minute) || hour > 23 || minute > 59)
        return std::nullopt;
    pos += 6;
    double fraction = 0.0;
    if (pos < s.size() && s[pos] == ':') {
        if (!fixed_digits(s, pos + 1, 2, second) || second > 60) return std::nullopt;  // 60: leap second
        pos += 3;
        if (pos < s.size() && (s[pos] == '.' || s[pos] == ',')) {
            size_t digits_end = pos + 1;
            while (digits_end < s.size() && std::isdigit(static_cast<unsigned char>(s[digits_end]))) ++digits_end;
            if (digits_end == pos + 1) return std::nullopt;
            std::string frac = "0." + std::string(s.substr(pos + 1, digits_end - pos - 1));
            fraction = std::strtod(frac.c_str(), nullptr);
            pos = digits_end;
        }
    }
    seconds += hour * 3600.0 + minute * 60.0 + second + fraction;
    if (pos == s.size()) return seconds;
    if (s[pos] == 'Z' && pos + 1 == s.size()) return seconds;
    if (s[pos] != '+' && s[pos] != '-') return std::nullopt;
    const double sign = s[pos] == '+' ? 1.0 : -1.0;
    int off_hour = 0, off_minute = 0;
    if (!fixed_digits(s, pos + 1, 2, off_hour) || off_hour > 23) return std::nullopt;
    pos += 3;
    if (pos < s.size() && s[pos] == ':') ++pos;
    if (pos < s.size()) {
        if (!fixed_digits(s, pos, 2, off_minute) || off_minute > 59) return std::nullopt;
        pos += 2;
    }
    if (pos != s.size()) return std::nullopt;
    return seconds - sign * (off_hour * 3600.0 + off_minute * 60.0);
}

// Epoch seconds (any finite number) or an ISO-8601 date / date-time.
std::optional<double> parse_timestamp(std::string_view s) {
    s = trim_field(s);
    if (auto n = parse_number(s)) {
        if (!std::isfinite(*n)) return std::nullopt;
        return n;
    }
    return parse_iso8601(s);
}

// Grows in fixed blocks, so appending never copies what is already stored
// and drain() needs only one block of slack on top of the exact result.
// Blocks are mapped straight from the kernel so that freeing one during
// drain() really returns its memory (heap-allocated blocks of this size
// would stay in the allocator's free lists and double the peak).
template <class T>
class BlockVector {
public:
    BlockVector() = default;
    BlockVector(const BlockVector&) = delete;
    BlockVector& operator=(const BlockVector&) = delete;
    ~BlockVector() {
        for (T* block : blocks_) release(block);
    }
    void push_back(const T& value) {
        if ((size_ & (kBlock - 1)) == 0) blocks_.push_back(acquire());
        blocks_.back()[size_ & (kBlock - 1)] = value;
        ++size_;
    }
    size_t size() const { return size_; }
    // Moves everything into one exactly sized vector, freeing blocks as it goes.
    std::vector<T> drain() {
        std::vector<T> out;
        out.reserve(size_);
        size_t left = size_;
        for (T*& block : blocks_) {
            const size_t n = std::min(left, kBlock);
            out.insert(out.end(), block, block + n);
            release(block);
            block = nullptr;
            left -= n;
        }
        blocks_.clear();
        size_ = 0;
        return out;
    }

private:
    static_assert(std::is_trivially_copyable_v<T>);
    static constexpr size_t kBlock = size_t{1} << 18;  // 3 MiB of ratings, 2 MiB of timestamps
    static T* acquire() {
        void* p = ::mmap(nullptr, kBlock * sizeof(T), PROT_READ | PROT_WRITE, MAP_PRIVATE | MAP_ANONYMOUS | MAP_POPULATE, -1, 0);
        if (p == MAP_FAILED) throw std::bad_alloc();
        return static_cast<T*>(p);
    }
    static void release(T* block) {
        if (block) ::munmap(block, kBlock * sizeof(T));
    }
    std::vector<T*> blocks_;
    size_t size_ = 0;
};

// A fast front for IdMap::intern: open addressing with short ids (up to 27
// bytes, the usual case) stored in the slot itself, so a lookup costs one
// cache miss rather than two; longer ids keep part of their hash in the slot
// and are confirmed against the map's copy. A one-entry cache serves files
// grouped by user. The map itself sees each distinct id once.
class Interner {
public:
    explicit Interner(IdMap& map) : map_(map), slots_(1024) {}
    uint32_t intern(std::string_view id) {
        if (last_ != kEmpty && map_.name(last_) == id) return last_;
        const uint64_t hash = XXH3_64bits(id.data(), id.size());
        const size_t mask = slots_.size() - 1;
        for (size_t i = hash & mask;; i = (i + 1) & mask) {
            Slot& slot = slots_[i];
            if (slot.index == kEmpty) {
                fill_slot(slot, id, hash, map_.intern(id));
                last_ = slot.index;
                if (++used_ * 2 > slots_.size()) grow();
                return last_;
            }
            if (matches(slot, id, hash)) return last_ = slot.index;
        }
    }

private:
    static constexpr uint32_t kEmpty = UINT32_MAX;
    static constexpr size_t kInline = 27;
    static constexpr uint8_t kLong = 255;  // length mark: text holds the hash, the name is in the map
    struct Slot {
        uint32_t index = kEmpty;
        uint8_t length = 0;
        char text[kInline] = {};
    };
    static_assert(sizeof(Slot) == 32);
    static void fill_slot(Slot& slot, std::string_view id, uint64_t hash, uint32_t index) {
        slot.index = index;
        if (id.size() <= kInline) {
            slot.length = static_cast<uint8_t>(id.size());
            std::memcpy(slot.text, id.data(), id.size());
        } else {
            slot.length = kLong;
            std::memcpy(slot.text, &hash, sizeof hash);
        }
    }
    bool matches(const Slot& slot, std::string_view id, uint64_t hash) const {
        if (id.size() <= kInline) return slot.length == id.size() && std::memcmp(slot.text, id.data(), id.size()) == 0;
        return slot.length == kLong && std::memcmp(slot.text, &hash, sizeof hash) == 0 && map_.name(slot.index) == id;
    }
    void grow() {
        std::vector<Slot> bigger(slots_.size() * 2);
        const size_t mask = bigger.size() - 1;
        for (const Slot& slot : slots_) {
            if (slot.index == kEmpty) continue;
            const auto& name = map_.name(slot.index);
            size_t i = XXH3_64bits(name.data(), name.size()) & mask;
            while (bigger[i].index != kEmpty) i = (i + 1) & mask;
            bigger[i] = slot;
        }
        slots_.swap(bigger);
    }
    IdMap& map_;
    std::vector<Slot> slots_;
    size_t used_ = 0;
    uint32_t last_ = kEmpty;
};

// Rejected rows as TSV: line, reason, record. Tabs, line breaks and
// backslashes inside a value are written as \t, \n, \r and \\ so that one
// reject is always one line.
class RejectsFile {
public:
    explicit RejectsFile(std::string path) : path_(std::move(path)) {}
    // "line" for a file, "row" for a query: the first column's name.
    void set_position_unit(const char* unit) { unit_ = unit; }
    RejectsFile(const RejectsFile&) = delete;
    RejectsFile& operator=(const RejectsFile&) = delete;
    ~RejectsFile() {
        if (file_) std::fclose(file_);
    }
    const std::string& path() const { return path_; }
    void write(uint64_t line, std::string_view reason, std::string_view raw) {
        if (path_.empty()) return;
        if (!file_) open();
        line_.clear();
        line_ += std::to_string(line);
        line_ += '\t';
        append_escaped(reason);
        line_ += '\t';
        append_escaped(raw);
        line_ += '\n';
        std::fwrite(line_.data(), 1, line_.size(), file_);
    }
    void close() {
        if (file_ && std::fclose(file_) != 0) {
            file_ = nullptr;
            throw FileError(fmt::format("could not finish writing the rejects file {}; check the disk", path_));
        }
        file_ = nullptr;
    }

private:
    // Opens the file on the first reject. An existing file is overwritten
    // only when it is a rejects file (checked again here: the file may have
    // appeared since the run began); a new one is created exclusively, so a
    // file that appears meanwhile is never truncated. The header goes out at
    // once, so even an interrupted run leaves a file recognisable as rejects.
    void open() {
        std::error_code ec;
        const bool existed = std::filesystem::exists(path_, ec);
        check_rejects_target(path_, kRejectsRemedy);
        errno = 0;
        file_ = std::fopen(path_.c_str(), existed ? "wb" : "wbx");
        if (!file_)
            throw FileError(fmt::format("cannot write the rejects file {}: {}; pass a writable --rejects-path", path_,
                                        errno == EEXIST ? "a file appeared there meanwhile" : std::strerror(errno)));
        std::fputs(unit_, file_);
        std::fputs("\treason\trecord\n", file_);
        std::fflush(file_);
    }
    void append_escaped(std::string_view s) {
        for (char c : s) {
            switch (c) {
                case '\t': line_ += "\\t"; break;
                case '\n': line_ += "\\n"; break;
                case '\r': line_ += "\\r"; break;
                case '\\': line_ += "\\\\"; break;
                case '\0': line_ += "\\0"; break;
                default: line_ += c;
            }
        }
    }
    std::string path_;
    const char* unit_ = "line";
    std::FILE* file_ = nullptr;
    std::string line_;
};

// ---- columns

struct ColumnRole {
    const char* what;    // "customer", "product", ... (the shop's words, as the flags)
    const char* option;  // the command-line option that sets it
    std::vector<std::string_view> exact;     // normalized names that match outright
    std::vector<std::string_view> contains;  // normalized fragments that match otherwise
};

const ColumnRole kUserRole{"customer", "--customer-column",
                           {"user", "userid", "customer", "customerid", "client", "clientid", "buyer", "buyerid",
                            "shopper", "shopperid", "member", "memberid", "account", "accountid", "uid"},
                           {"user", "customer"}};
const ColumnRole kItemRole{"product", "--product-column",
                           {"item", "itemid", "product", "productid", "sku", "article", "articleid", "movie",
                            "movieid", "book", "bookid", "iid"},
                           {"item", "product", "sku"}};
const ColumnRole kRatingRole{"rating", "--rating-column",
                             {"rating", "score", "stars", "star", "grade", "rate", "value"},
                             {"rating", "score"}};
const ColumnRole kTimestampRole{"timestamp", "--timestamp-column",
                                {"timestamp", "time", "date", "datetime", "ts", "ratedat", "createdat"},
                                {"timestamp"}};

// Lower case, letters and digits only: "User_ID" and "user id" both become "userid".
std::string normalized(std::string_view name) {
    std::string out;
    for (unsigned char c : name)
        if (std::isalnum(c)) out += static_cast<char>(std::tolower(c));
    return out;
}

std::string header_list(const std::vector<std::string>& header) {
    std::string out;
    for (size_t i = 0; i < header.size(); ++i) out += (i ? ", " : "") + header[i];
    return out;
}

// " (a, b, c)" for a header; nothing for a first row of data, whose fields
// may hold a customer id and so stay out of messages.
std::string header_names(const std::vector<std::string>& first, bool has_header) {
    return has_header ? " (" + header_list(first) + ")" : std::string();
}

// Finds a default column by name; skips columns already taken by another role.
std::optional<size_t> match_default(const ColumnRole& role, const std::vector<std::string>& header,
                                    const std::vector<size_t>& taken) {
    auto free = [&](size_t i) { return std::find(taken.begin(), taken.end(), i) == taken.end(); };
    for (size_t i = 0; i < header.size(); ++i) {
        const auto n = normalized(header[i]);
        if (free(i) && std::find(role.exact.begin(), role.exact.end(), n) != role.exact.end()) return i;
    }
    for (size_t i = 0; i < header.size(); ++i) {
        const auto n = normalized(header[i]);
        if (!free(i)) continue;
        for (auto fragment : role.contains)
            if (n.find(fragment) != std::string::npos) return i;
    }
    return std::nullopt;
}

// Whether the first row is a header: as declared; yes when a column is
// named; otherwise yes when its rating field is not a number.
bool detect_header(const IngestOptions& options, const std::vector<std::string>& first) {
    if (options.has_header) return *options.has_header;
    const auto named = [](const std::string& s) { return !s.empty() && !all_digits(s); };
    if (named(options.user_column) || named(options.item_column) || named(options.rating_column) ||
        named(options.timestamp_column))
        return true;
    const size_t rating_index = options.rating_column.empty() ? 2 : column_index(options.rating_column);
    return rating_index < first.size() && !parse_number(first[rating_index]).has_value();
}

// One role's column: by index (digits), by name (exact, else normalized),
// by default name with a header, else `fallback_index`; none for an absent
// optional timestamp. Records the choice in `taken`.
std::optional<size_t> resolve(const std::string& spec, const ColumnRole& role, const std::vector<std::string>& first,
                              bool has_header, size_t fallback_index, std::vector<size_t>& taken,
                              const std::string& where) {
    std::optional<size_t> index;
    if (all_digits(spec)) {
        index = column_index(spec);
        if (*index >= first.size())
            throw DataError(fmt::format("{}: {} column index {} is out of range: the {} has {} fields{}; "
                                        "pass {} with a 0-based index below {}",
                                        where, role.what, spec, has_header ? "header" : "first row",
                                        first.size(), header_names(first, has_header), role.option, first.size()));
    } else if (!spec.empty()) {
        if (!has_header)
            throw DataError(fmt::format("{}: {} column '{}' is a name but the file has no header; "
                                        "pass {} as a 0-based index, or declare the header",
                                        where, role.what, spec, role.option));
        for (size_t i = 0; i < first.size() && !index; ++i)
            if (first[i] == spec) index = i;
        for (size_t i = 0; i < first.size() && !index; ++i)
            if (normalized(first[i]) == normalized(spec)) index = i;
        if (!index)
            throw DataError(fmt::format("{}: column '{}' not found; header has: {}; pass {}", where, spec,
                                        header_list(first), role.option));
    } else if (has_header) {
        index = match_default(role, first, taken);
        if (!index && &role != &kTimestampRole)
            throw DataError(fmt::format("{}: no {} column recognised; header has: {}; pass {} with a header name "
                                        "or 0-based index",
                                        where, role.what, header_list(first), role.option));
    } else if (&role != &kTimestampRole) {
        index = fallback_index;
        if (*index >= first.size())
            throw DataError(fmt::format("{}: the first row has {} field(s) but the {} column defaults to index {}; "
                                        "check the delimiter (--delimiter) or pass {}",
                                        where, first.size(), role.what, *index, role.option));
    }
    if (index) {
        if (std::find(taken.begin(), taken.end(), *index) != taken.end())
            throw DataError(fmt::format("{}: column {}{} is chosen for two roles; pass distinct columns with "
                                        "--customer-column, --product-column, --rating-column, --timestamp-column",
                                        where, *index, has_header ? " ('" + first[*index] + "')" : std::string()));
        taken.push_back(*index);
    }
    return index;
}

struct Columns {
    size_t user = 0, item = 1, rating = 2;
    std::optional<size_t> timestamp;
};

// Each role's column (rating, user, item, timestamp), explicit choices first
// so that a default never takes a column named elsewhere. With
// `customer_only`, a role other than the user that cannot be resolved is
// left out (nullopt) instead of failing; it then takes no column.
std::array<std::optional<size_t>, 4> resolve_roles(const IngestOptions& options, const std::vector<std::string>& first,
                                                   bool has_header, const std::string& where, bool customer_only) {
    std::vector<size_t> taken;
    struct Slot {
        const std::string& spec;
        const ColumnRole& role;
        size_t fallback;
        std::optional<size_t> result;
    };
    std::array<Slot, 4> slots{Slot{options.rating_column, kRatingRole, 2, {}},
                              Slot{options.user_column, kUserRole, 0, {}},
                              Slot{options.item_column, kItemRole, 1, {}},
                              Slot{options.timestamp_column, kTimestampRole, 0, {}}};
    for (int pass = 0; pass < 2; ++pass)
        for (auto& s : slots) {
            if (s.spec.empty() != (pass == 1)) continue;
            if (!customer_only || &s.role == &kUserRole) {
                s.result = resolve(s.spec, s.role, first, has_header, s.fallback, taken, where);
                continue;
            }
            try {
                s.result = resolve(s.spec, s.role, first, has_header, s.fallback, taken, where);
            } catch (const DataError&) {
                // Not the customer column's problem: ingest reports it when it reads the file.
            }
        }
    return {slots[0].result, slots[1].result, slots[2].result, slots[3].result};
}

Columns resolve_columns(const IngestOptions& options, const std::vector<std::string>& first, bool has_header,
                        const std::string& where) {
    const auto roles = resolve_roles(options, first, has_header, where, false);
    Columns c;
    c.rating = *roles[0];
    c.user = *roles[1];
    c.item = *roles[2];
    c.timestamp = roles[3];
    return c;
}

// ---- the ingest pass

class Ingest {
public:
    explicit Ingest(const IngestOptions& options) : options_(options), rejects_(rejects_path(options)) {}

    IngestResult run();

private:
    static std::string rejects_path(const IngestOptions& o) {
        if (!o.rejects_path.empty()) return o.rejects_path;
        if (is_sqlite_source(o.path)) return sqlite_rejects_path(o.path);
        if (is_postgresql_source(o.path)) return postgresql_rejects_path(o.path);
        return o.path == "-" ? std::string() : o.path + ".rejects.tsv";
    }
    // Position 0 stands for the column names a query declares.
    std::string where(uint64_t position) const {
        if (position == 0) return fmt::format("{} (the query's columns)", display_path());
        return fmt::format("{}, {} {}", display_path(), source_->position_unit(), position);
    }
    std::string display_path() const {
        if (source_) return source_->name();
        return options_.path == "-" ? std::string("standard input") : options_.path;
    }

    void check_options() const;
    std::unique_ptr<RowSource> open_source() const;
    void read_rows(RowSource& source);
    void check_outcome() const;
    IngestResult finish();
    void take_row(const SourceRow& row);
    void clear_stale_rejects();
    void reject(uint64_t line, const std::string& reason, std::string_view raw);
    void merge_and_sort(std::vector<Rating>& ratings, std::vector<double> timestamps);

    const IngestOptions& options_;
    std::unique_ptr<RowSource> source_;
    RejectsFile rejects_;
    IngestSummary summary_;
    RatingSet set_;
    Columns columns_;
    size_t expected_fields_ = 0;
    bool keep_timestamps_ = false;
    BlockVector<Rating> ratings_;
    BlockVector<double> timestamps_;
    Interner users_{set_.users};
    Interner items_{set_.items};
    std::string first_reject_;  // "line 12: rating 'x' is not a number", for error messages
};

void Ingest::check_options() const {
    if (options_.path.empty()) throw OptionError("no ratings file given; pass a path, or - for standard input");
    const bool database = is_sqlite_source(options_.path) || is_postgresql_source(options_.path);
    if (database && options_.query.empty())
        throw OptionError(fmt::format("{} is a database: pass --query with the SELECT that returns the ratings",
                                      options_.path));
    if (!database && !options_.query.empty())
        throw OptionError(fmt::format("--query applies to a database (sqlite:PATH or postgresql://...), not to the "
                                      "file {}; drop --query or name the database",
                                      options_.path));
    if (options_.delimiter && (*options_.delimiter == '"' || *options_.delimiter == '\r' || *options_.delimiter == '\n'))
        throw OptionError("--delimiter cannot be a quote or a line break; pass one of , tab ; |");
    if (!(options_.max_reject_fraction >= 0.0 && options_.max_reject_fraction <= 1.0))
        throw OptionError(fmt::format("--max-reject-fraction must be between 0 and 1, got {}", options_.max_reject_fraction));
    if (options_.scale) {
        const auto& s = *options_.scale;
        if (!std::isfinite(s.min) || !std::isfinite(s.max) || !(s.min < s.max))
            throw OptionError(fmt::format("the declared scale {} to {} is empty or not finite; pass --scale MIN:MAX with MIN < MAX",
                                          s.min, s.max));
    }
    // Before any row is read: a rejects path that would destroy another file.
    if (!rejects_.path().empty()) check_rejects_target(rejects_.path(), kRejectsRemedy);
}

void Ingest::reject(uint64_t line, const std::string& reason, std::string_view raw) {
    ++summary_.rejected;
    if (first_reject_.empty()) first_reject_ = fmt::format("line {}: {}", line, reason);
    rejects_.write(line, reason, raw);
    if (options_.max_reject_fraction < 0.5 && summary_.rejected >= kEarlyAbortRejects &&
        summary_.rejected * 2 > summary_.rows_read) {
        rejects_.close();
        throw DataError(fmt::format(
            "{}: stopped after rejecting {} of the first {} rows (first {}); {} are probably wrong{}; pass {}",
            where(line), summary_.rejected, summary_.rows_read, first_reject_,
            summary_.delimiter == 0 ? std::string("the columns or the query")
                                    : fmt::format("the delimiter ('{}') or the columns",
                                                  summary_.delimiter == '\t' ? std::string("\\t")
                                                                              : std::string(1, summary_.delimiter)),
            rejects_.path().empty() ? std::string() : "; see " + rejects_.path(),
            summary_.delimiter == 0 ? "the column options or another --query"
                                    : "--delimiter, --header/--no-header or the column options"));
    }
}

void Ingest::take_row(const SourceRow& row) {
    const auto& fields = row.fields;
    const std::string_view raw = row.raw;
    const uint64_t line = row.position;
    const uint64_t lines = row.end_position - row.position + 1;
    ++summary_.rows_read;
    summary_.row_lines += lines;
    // A rejected row over several lines names them all, and counts them.
    const std::string span = lines > 1 ? fmt::format(" (lines {}-{})", row.position, row.end_position) : std::string();
    auto reject_row = [&](const std::string& reason) {
        summary_.rejected_lines += lines;
        reject(line, reason + span, raw);
    };
    if (!row.problem.empty()) return reject_row(std::string(row.problem));
    if (fields.size() != expected_fields_)
        return reject_row(fmt::format("expected {} fields, found {}", expected_fields_, fields.size()));
    auto null = [&](size_t column) { return !row.is_null.empty() && row.is_null[column]; };
    if (null(columns_.user)) return reject_row("NULL user id");
    const auto user = trim_field(fields[columns_.user]);
    if (user.empty()) return reject_row("empty user id");
    if (null(columns_.item)) return reject_row("NULL item id");
    const auto item = trim_field(fields[columns_.item]);
    if (item.empty()) return reject_row("empty item id");
    // An id never holds a line break or a quote: in a file such a field is a
    // stray quote swallowing the lines after it. The rule holds for every
    // source, so the same rows are kept whatever they came from.
    for (const auto& [what, id] : {std::pair{"user", user}, std::pair{"item", item}}) {
        if (id.find_first_of("\r\n") != std::string_view::npos)
            return reject_row(fmt::format("{} id holds a line break (a stray quote?)", what));
        if (id.find('"') != std::string_view::npos)
            return reject_row(fmt::format("{} id holds a double quote (a stray quote?)", what));
        if (id.find('\0') != std::string_view::npos) return reject_row(fmt::format("{} id holds a NUL byte", what));
    }
    if (null(columns_.rating)) return reject_row("NULL rating");
    const auto rating_text = trim_field(fields[columns_.rating]);
    if (rating_text.empty()) return reject_row("empty rating");
    const auto rating = parse_number(rating_text);
    if (!rating) {
        std::string with_point(rating_text);
        std::replace(with_point.begin(), with_point.end(), ',', '.');
        const bool decimal_comma = with_point != rating_text && parse_number(with_point).has_value();
        return reject_row(fmt::format("rating {} is not a number{}", shown(rating_text),
                                      decimal_comma ? " (decimal comma? write 4.5, not 4,5)" : ""));
    }
    const auto value = static_cast<float>(*rating);
    if (!std::isfinite(*rating) || !std::isfinite(value))
        return reject_row(fmt::format("rating {} is not finite", shown(rating_text)));
    if (options_.scale && (value < options_.scale->min || value > options_.scale->max))
        return reject_row(fmt::format("rating {} is outside the declared scale {} to {}", shown(rating_text),
                                      options_.scale->min, options_.scale->max));
    double timestamp = 0.0;
    if (columns_.timestamp) {
        if (null(*columns_.timestamp)) return reject_row("NULL timestamp");
        const auto text = trim_field(fields[*columns_.timestamp]);
        if (text.empty()) return reject_row("empty timestamp");
        const auto parsed = parse_timestamp(text);
        if (!parsed)
            return reject_row(
                fmt::format("timestamp {} is neither a number of epoch seconds nor an ISO-8601 date", shown(text)));
        timestamp = *parsed;
    }
    // Ids are interned only for kept rows, so rejects never create users or items.
    ratings_.push_back(Rating{users_.intern(user), items_.intern(item), value});
    if (keep_timestamps_) timestamps_.push_back(timestamp);
}

// Sorts by (user, item) and folds duplicate pairs by the policy, in place.
// Row indices are grouped by user with a counting sort, then ordered by
// (item, timestamp, file position) within each user: small groups keep the
// sort cache-friendly. Each run of equal pairs leaves one row holding the
// run's result; the rows are then permuted into that order in place and the
// folded rows squeezed out. Peak memory: the rows (12 bytes each), the order
// (4) and the timestamps (8, latest policy with a timestamp column only).
void Ingest::merge_and_sort(std::vector<Rating>& ratings, std::vector<double> timestamps) {
    constexpr uint32_t kFolded = UINT32_MAX;  // never a valid user index
    const size_t n = ratings.size();
    std::vector<uint32_t> order(n);
    {
        std::vector<uint32_t> next(set_.users.size() + 1, 0);
        for (const auto& r : ratings) ++next[r.user + 1];
        for (size_t u = 1; u < next.size(); ++u) next[u] += next[u - 1];
        const bool by_time = !timestamps.empty();
        auto before = [&](uint32_t a, uint32_t b) {
            if (ratings[a].item != ratings[b].item) return ratings[a].item < ratings[b].item;
            if (by_time && timestamps[a] != timestamps[b]) return timestamps[a] < timestamps[b];
            return a < b;
        };
        std::vector<uint32_t> group_start(next.begin(), next.end());
        for (uint32_t i = 0; i < n; ++i) order[next[ratings[i].user]++] = i;
        for (size_t u = 0; u + 1 < group_start.size(); ++u)
            std::sort(order.begin() + group_start[u], order.begin() + group_start[u + 1], before);
    }
    std::vector<double>().swap(timestamps);

    for (size_t run = 0; run < n;) {
        const Rating head = ratings[order[run]];
        size_t run_end = run + 1;
        while (run_end < n && ratings[order[run_end]].user == head.user && ratings[order[run_end]].item == head.item)
            ++run_end;
        if (run_end - run > 1) {
            summary_.merged_duplicates += run_end - run - 1;
            if (options_.duplicates == DuplicatePolicy::mean) {
                double sum = 0.0;
                for (size_t k = run; k < run_end; ++k) sum += ratings[order[k]].value;
                ratings[order[run_end - 1]].value = static_cast<float>(sum / static_cast<double>(run_end - run));
            }
            for (size_t k = run; k + 1 < run_end; ++k) ratings[order[k]].user = kFolded;  // the last one stays
        }
        run = run_end;
    }

    // ratings[j] must become ratings[order[j]]: follow each cycle once,
    // marking finished positions by pointing them at themselves.
    for (size_t i = 0; i < n; ++i) {
        if (order[i] == i) continue;
        const Rating first = ratings[i];
        size_t j = i;
        for (;;) {
            const size_t k = order[j];
            order[j] = static_cast<uint32_t>(j);
            if (k == i) {
                ratings[j] = first;
                break;
            }
            ratings[j] = ratings[k];
            j = k;
        }
    }
    std::vector<uint32_t>().swap(order);
    if (summary_.merged_duplicates > 0) {
        ratings.erase(std::remove_if(ratings.begin(), ratings.end(), [](const Rating& r) { return r.user == kFolded; }),
                      ratings.end());
        if (ratings.capacity() > ratings.size() + ratings.size() / 8) ratings.shrink_to_fit();
    }
}

// The source the path names: sqlite:PATH, a postgresql:// URI, else a file
// ("-": standard input).
std::unique_ptr<RowSource> Ingest::open_source() const {
    if (is_sqlite_source(options_.path)) return open_sqlite_source(options_.path, options_.query, options_.progress);
    if (is_postgresql_source(options_.path))
        return open_postgresql_source(options_.path, options_.query, options_.progress);
    return std::make_unique<CsvSource>(options_.path, options_.delimiter, options_.progress);
}

// A rejects file at the rejects path was written by an earlier run when this
// run rejected nothing: remove it, or say why it stays. Only a rejects file
// (is_rejects_file) is ever removed: a rejects path naming a device
// (/dev/null), a pipe, a folder or any other file is the caller's to keep.
// check_options refused any other regular file; one that appeared since is
// left and reported.
void Ingest::clear_stale_rejects() {
    const std::string& path = rejects_.path();
    std::error_code ec;
    if (summary_.rejected > 0 || path.empty()) return;
    const auto status = std::filesystem::status(path, ec);
    if (std::filesystem::is_directory(status)) {
        summary_.stale_rejects = fmt::format("left {} (a folder, not a rejects file)", path);
        return;
    }
    if (!std::filesystem::is_regular_file(status)) return;
    if (!is_rejects_file(path)) {
        summary_.stale_rejects = fmt::format("left {} (not a rejects file)", path);
        return;
    }
    if (std::filesystem::remove(path, ec)) summary_.stale_rejects = "removed " + path;
    else summary_.stale_rejects = fmt::format("left {} ({})", path, ec ? ec.message() : "not removed");
}

// The columns come from the names a query declares, or from a file's first
// non-blank row (data unless it is a header); every later row is kept,
// rejected or merged.
void Ingest::read_rows(RowSource& source) {
    SourceRow row;
    std::vector<std::string> first;
    uint64_t first_position = 0;
    bool has_header = true;
    const auto names = source.column_names();
    if (names) {
        first = *names;
    } else {
        bool got = false;
        while ((got = source.next(row)) && row.blank) ++summary_.blank_lines;
        if (!got) throw DataError(fmt::format("{} has no rows; check the path", display_path()));
        if (!row.problem.empty())
            throw DataError(fmt::format("{}: {}; the first row must be readable to find the columns; fix that line",
                                        where(row.position), row.problem));
        for (auto f : row.fields) first.emplace_back(trim_field(f));
        has_header = detect_header(options_, first);
        first_position = row.position;
    }
    summary_.had_header = has_header;
    columns_ = resolve_columns(options_, first, has_header, where(first_position));
    expected_fields_ = first.size();
    keep_timestamps_ = columns_.timestamp.has_value() && options_.duplicates == DuplicatePolicy::latest;

    if (!names && has_header) summary_.header_lines = row.end_position - row.position + 1;
    if (!names && !has_header) take_row(row);
    while (source.next(row)) {
        if (row.blank) {
            ++summary_.blank_lines;
            continue;
        }
        take_row(row);
    }
    summary_.lines_read = summary_.header_lines + summary_.blank_lines + summary_.row_lines;
}

// After the last row: too many rejects, nothing kept, or too many ratings.
void Ingest::check_outcome() const {
    const double fraction = summary_.rows_read ? double(summary_.rejected) / double(summary_.rows_read) : 0.0;
    if (fraction > options_.max_reject_fraction)
        throw DataError(fmt::format(
            "{}: rejected {} of {} rows ({:.2f}%), above the limit of {:.2f}%; first {}; {}; fix those rows or raise "
            "--max-reject-fraction",
            display_path(), summary_.rejected, summary_.rows_read, 100.0 * fraction,
            100.0 * options_.max_reject_fraction, first_reject_,
            summary_.rejects_path.empty() ? std::string("rejects were not saved (standard input, no --rejects-path)")
                                          : "all rejects are in " + summary_.rejects_path));
    if (ratings_.size() == 0)
        throw DataError(fmt::format("{}: no ratings kept out of {} rows; check the file and the column options",
                                    display_path(), summary_.rows_read));
    if (ratings_.size() >= UINT32_MAX)
        throw DataError(fmt::format("{}: more than 4 billion ratings; split the file", display_path()));
}

// Sorted, merged ratings and their scale: the declared one or the observed range.
IngestResult Ingest::finish() {
    auto ratings = ratings_.drain();
    merge_and_sort(ratings, timestamps_.drain());
    summary_.kept = ratings.size();

    if (options_.scale) {
        set_.scale = RatingScale{options_.scale->min, options_.scale->max, true};
    } else {
        const auto [lo, hi] = std::minmax_element(ratings.begin(), ratings.end(),
                                                  [](const Rating& a, const Rating& b) { return a.value < b.value; });
        set_.scale = RatingScale{lo->value, hi->value, false};
    }
    set_.ratings = std::move(ratings);
    return IngestResult{std::move(set_), summary_};
}

IngestResult Ingest::run() {
    check_options();
    source_ = open_source();
    rejects_.set_position_unit(source_->position_unit());
    summary_.delimiter = source_->facts().delimiter.value_or(0);
    read_rows(*source_);
    rejects_.close();
    if (summary_.rejected > 0) summary_.rejects_path = rejects_.path();
    clear_stale_rejects();
    const SourceFacts facts = source_->facts();
    summary_.fingerprint = facts.fingerprint;

    check_outcome();
    return finish();
}

}  // namespace

IngestResult ingest_ratings(const IngestOptions& options) { return Ingest(options).run(); }

CustomerColumn choose_customer_column(const IngestOptions& options, const std::vector<std::string>& first,
                                      const std::string& where) {
    const bool has_header = detect_header(options, first);
    return CustomerColumn{has_header, *resolve_roles(options, first, has_header, where, true)[1]};
}

bool is_rejects_file(const std::string& path) {
    std::unique_ptr<std::FILE, int (*)(std::FILE*)> file(std::fopen(path.c_str(), "rb"), &std::fclose);
    if (!file) return false;
    char start[32] = {};
    const size_t got = std::fread(start, 1, sizeof start, file.get());
    const std::string_view head(start, got);
    return head.starts_with("line\treason\trecord\n") || head.starts_with("row\treason\trecord\n");
}

void check_rejects_target(const std::string& path, const std::string& remedy) {
    std::error_code ec;
    if (!std::filesystem::is_regular_file(path, ec) || is_rejects_file(path)) return;
    throw FileError(fmt::format("the rejects path {} names an existing file that is not a rejects file (its first "
                                "line is not 'line<TAB>reason<TAB>record'); rejects are only ever written over an "
                                "earlier rejects file, so that file is left as it is; {}",
                                path, remedy));
}

std::string describe(const IngestSummary& s) {
    std::string out = fmt::format("read {} rows: kept {}, rejected {}, merged {} duplicates", s.rows_read, s.kept,
                                  s.rejected, s.merged_duplicates);
    if (s.rejected > 0)
        out += s.rejects_path.empty() ? " (rejects not saved: give --rejects-path to keep them)"
                                      : fmt::format(" (rejects in {})", s.rejects_path);
    if (s.blank_lines > 0) out += fmt::format("; skipped {} blank lines", s.blank_lines);
    if (s.row_lines != s.rows_read)
        out += fmt::format("; {} lines: {} header, {} blank, {} in rows ({} in rejected rows)", s.lines_read,
                           s.header_lines, s.blank_lines, s.row_lines, s.rejected_lines);
    if (!s.stale_rejects.empty())
        out += fmt::format("; {}: a rejects file from an earlier run", s.stale_rejects);
    return out;
}

}  // namespace credence
