// The posterior file writer and reader. The byte layout is specified in
// model/posterior/FORMAT.md; keep the two in step. In short: a 40-byte header, a table
// of 40-byte section entries, then the sections, each starting at the next
// 64-byte boundary with zero padding in between. Every byte of the file is
// covered by a checksum (header + table, each section) or must be zero
// (padding), so any corruption is detected.
#include "model/posterior/posterior_file.hpp"

#include <fcntl.h>
#include <signal.h>
#include <sys/stat.h>
#include <unistd.h>
#include <xxhash.h>

#include <atomic>
#include <bit>
#include <cctype>
#include <cerrno>
#include <cstdint>
#include <csignal>
#include <cstring>
#include <mutex>
#include <filesystem>
#include <limits>
#include <optional>
#include <stdexcept>
#include <string_view>
#include <unordered_set>
#include <utility>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/error.hpp"
#include "model/posterior/huge_pages.hpp"

// The format is little-endian and stores IEEE-754 binary32; on such a host
// the in-memory arrays are the file bytes, which is what lets big arrays be
// written and read in one call. A big-endian port must byte-swap here.
static_assert(std::endian::native == std::endian::little, "posterior file I/O assumes a little-endian host");
static_assert(std::numeric_limits<float>::is_iec559 && sizeof(float) == 4, "posterior file stores IEEE-754 float32");

namespace credence {
namespace {

constexpr char kMagic[8] = {'C', 'R', 'E', 'D', 'P', 'O', 'S', 'T'};
constexpr uint64_t kHeaderBytes = 40;
constexpr uint64_t kEntryBytes = 40;
constexpr uint64_t kSectionAlignBytes = 64;
constexpr uint64_t kMetadataBytes = 40;
constexpr uint32_t kFlagBiases = 1u << 0;
constexpr uint32_t kFlagScaleDeclared = 1u << 1;

enum class ElementType : uint32_t { bytes = 1, u32 = 2, u64 = 3, f32 = 4, strings = 5, record = 6 };

enum SectionId : uint32_t {
    kMetadata = 1,
    kUserIds = 2,
    kItemIds = 3,
    kSampleChain = 4,
    kUserFactors = 5,
    kItemFactors = 6,
    kUserBias = 7,
    kItemBias = 8,
    kNoisePrecision = 9,
    kUserMu = 10,
    kUserLambda = 11,
    kItemMu = 12,
    kItemLambda = 13,
    kUserBiasPrecision = 14,
    kItemBiasPrecision = 15,
    kRatedOffsets = 16,
    kRatedItems = 17,
    kFitMetadata = 18,
    kDiagnostics = 19,
    kItemNames = 20,       // version 2
    kItemCategories = 21,  // version 2
    kLastKnownSection = 21,
};

const char* section_name(uint32_t id) {
    static constexpr const char* names[] = {
        "?",           "metadata",         "user_ids",     "item_ids",        "sample_chain",
        "user_factors", "item_factors",    "user_bias",    "item_bias",       "noise_precision",
        "user_mu",     "user_lambda",      "item_mu",      "item_lambda",     "user_bias_precision",
        "item_bias_precision", "rated_offsets", "rated_items", "fit_metadata", "diagnostics",
        "item_names", "item_categories"};
    return id >= 1 && id <= kLastKnownSection ? names[id] : "unknown";
}

uint64_t element_bytes(ElementType t) {
    switch (t) {
        case ElementType::bytes: return 1;
        case ElementType::u32: return 4;
        case ElementType::u64: return 8;
        case ElementType::f32: return 4;
        default: return 0;  // strings, record: length is not count * size
    }
}

uint64_t align_up(uint64_t x) { return (x + kSectionAlignBytes - 1) / kSectionAlignBytes * kSectionAlignBytes; }

void put_u32(unsigned char* p, uint32_t v) { std::memcpy(p, &v, 4); }
void put_u64(unsigned char* p, uint64_t v) { std::memcpy(p, &v, 8); }
void put_f32(unsigned char* p, float v) { std::memcpy(p, &v, 4); }
uint32_t get_u32(const unsigned char* p) { uint32_t v; std::memcpy(&v, p, 4); return v; }
uint64_t get_u64(const unsigned char* p) { uint64_t v; std::memcpy(&v, p, 8); return v; }
float get_f32(const unsigned char* p) { float v; std::memcpy(&v, p, 4); return v; }

// XXH3-64 of the header's first 32 bytes followed by the section table.
uint64_t header_checksum(const unsigned char* header, const unsigned char* table, size_t table_bytes) {
    XXH3_state_t* state = XXH3_createState();
    if (!state) throw std::bad_alloc();
    XXH3_64bits_reset(state);
    XXH3_64bits_update(state, header, 32);
    XXH3_64bits_update(state, table, table_bytes);
    const uint64_t h = XXH3_64bits_digest(state);
    XXH3_freeState(state);
    return h;
}

std::string errno_text(int err) { return std::strerror(err); }

// Ids must be unique so a reader can rebuild its id -> index maps.
std::optional<std::string> first_duplicate(const std::vector<std::string>& ids) {
    std::unordered_set<std::string_view> seen;
    seen.reserve(ids.size());
    for (const auto& id : ids)
        if (!seen.insert(id).second) return id;
    return std::nullopt;
}

// ============================================================== writing

struct OutSection {
    uint32_t id;
    ElementType type;
    uint64_t count;
    const void* data;
    uint64_t length_bytes;
    uint64_t offset = 0;
    uint64_t checksum = 0;
};

std::string encode_strings(const std::vector<std::string>& ids) {
    std::string out;
    size_t total = 0;
    for (const auto& s : ids) total += 4 + s.size();
    out.resize(total);
    auto* p = reinterpret_cast<unsigned char*>(out.data());
    for (const auto& s : ids) {
        put_u32(p, static_cast<uint32_t>(s.size()));
        std::memcpy(p + 4, s.data(), s.size());
        p += 4 + s.size();
    }
    return out;
}

std::string encode_metadata(const Posterior& p) {
    std::string out(kMetadataBytes, '\0');
    auto* b = reinterpret_cast<unsigned char*>(out.data());
    put_u32(b + 0, p.rank);
    put_u32(b + 4, p.num_users);
    put_u32(b + 8, p.num_items);
    put_u32(b + 12, p.num_samples);
    put_u32(b + 16, p.num_chains);
    put_u32(b + 20, (p.has_biases ? kFlagBiases : 0u) | (p.scale.declared ? kFlagScaleDeclared : 0u));
    put_f32(b + 24, p.global_mean);
    put_f32(b + 28, p.scale.min);
    put_f32(b + 32, p.scale.max);
    // bytes 36..39 reserved, zero
    return out;
}

// ---- temporary files and signals
//
// While a temporary file exists its path sits in one of these slots; SIGINT
// and SIGTERM then unlink every listed file before the signal takes its
// usual effect (re-raised with the handler that was there before). The
// handler only reads the slots and calls unlink, sigaction and raise, which
// are async-signal-safe (POSIX.1-2017 section 2.4.3).
constexpr int kTempSlots = 16;
std::atomic<const char*> g_temp_paths[kTempSlots];
std::mutex g_signal_mutex;       // guards g_temp_files_open and the saved actions
int g_temp_files_open = 0;
struct sigaction g_previous_int {};
struct sigaction g_previous_term {};

extern "C" void remove_temporaries_then_reraise(int sig) {
    for (auto& slot : g_temp_paths)
        if (const char* path = slot.exchange(nullptr)) ::unlink(path);
    ::sigaction(sig, sig == SIGINT ? &g_previous_int : &g_previous_term, nullptr);
    ::raise(sig);
}

// Lists `path` for the handler (installing it for the first file); returns
// the slot, or -1 when every slot is taken (the file is then only removed by
// the destructor or by a later write to the same target).
int watch_temporary(const char* path) {
    std::lock_guard lock(g_signal_mutex);
    int slot = -1;
    for (int k = 0; k < kTempSlots && slot < 0; ++k) {
        const char* empty = nullptr;
        if (g_temp_paths[k].compare_exchange_strong(empty, path)) slot = k;
    }
    if (slot >= 0 && g_temp_files_open++ == 0) {
        struct sigaction ours {};
        ours.sa_handler = remove_temporaries_then_reraise;
        sigemptyset(&ours.sa_mask);
        ::sigaction(SIGINT, &ours, &g_previous_int);
        ::sigaction(SIGTERM, &ours, &g_previous_term);
    }
    return slot;
}

void unwatch_temporary(int slot) {
    if (slot < 0) return;
    std::lock_guard lock(g_signal_mutex);
    g_temp_paths[slot].store(nullptr);
    if (--g_temp_files_open == 0) {
        ::sigaction(SIGINT, &g_previous_int, nullptr);
        ::sigaction(SIGTERM, &g_previous_term, nullptr);
    }
}

std::string temporary_prefix(const std::string& base) { return "." + base + ".tmp-"; }

// Owns the temporary file until commit; removes it on destruction otherwise.
class TempFile {
public:
    TempFile(const std::filesystem::path& dir, const std::string& base) {
        static std::atomic<uint64_t> counter{0};
        for (int attempt = 0; attempt < 64; ++attempt) {
            const uint64_t n = counter.fetch_add(1);
            path_ = dir / (temporary_prefix(base) + std::to_string(::getpid()) + "-" + std::to_string(n));
            path_text_ = path_.string();
            slot_ = watch_temporary(path_text_.c_str());
            // 0666 so the final file gets the usual umask-derived permissions.
            fd_ = ::open(path_.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0666);
            if (fd_ >= 0) return;
            const int err = errno;
            unwatch_temporary(std::exchange(slot_, -1));
            if (err != EEXIST) break;
        }
        throw FileError("cannot create a temporary file in " + dir.string() + ": " + errno_text(errno));
    }
    TempFile(const TempFile&) = delete;
    TempFile& operator=(const TempFile&) = delete;
    ~TempFile() {
        if (fd_ >= 0) ::close(fd_);
        if (!committed_) ::unlink(path_.c_str());
        unwatch_temporary(slot_);
    }

    void write_all(const void* data, uint64_t bytes) {
        const auto* p = static_cast<const unsigned char*>(data);
        while (bytes > 0) {
            // One call per array; the loop only continues after a partial write.
            const size_t chunk = static_cast<size_t>(std::min<uint64_t>(bytes, 1ull << 30));
            const ssize_t n = ::write(fd_, p, chunk);
            if (n < 0) {
                if (errno == EINTR) continue;
                throw FileError("write to " + path_.string() + " failed: " + errno_text(errno));
            }
            p += n;
            bytes -= static_cast<uint64_t>(n);
        }
    }

    void sync_and_close() {
        if (::fsync(fd_) != 0) throw FileError("fsync of " + path_.string() + " failed: " + errno_text(errno));
        const int fd = fd_;
        fd_ = -1;
        if (::close(fd) != 0) throw FileError("closing " + path_.string() + " failed: " + errno_text(errno));
    }

    void rename_to(const std::filesystem::path& target) {
        if (::rename(path_.c_str(), target.c_str()) != 0)
            throw FileError("cannot rename the temporary file over it: " + errno_text(errno));
        committed_ = true;
    }

private:
    std::filesystem::path path_;
    std::string path_text_;  // the path the signal handler sees (stable while listed)
    int fd_ = -1;
    int slot_ = -1;
    bool committed_ = false;
};

// A temporary file of `base` (".<base>.tmp-<pid>-<n>") and the process that
// wrote it; nullopt for any other name.
std::optional<pid_t> temporary_writer(const std::string& name, const std::string& base) {
    const std::string prefix = temporary_prefix(base);
    if (name.rfind(prefix, 0) != 0) return std::nullopt;
    const std::string rest = name.substr(prefix.size());
    const size_t dash = rest.find('-');
    if (dash == 0 || dash == std::string::npos) return std::nullopt;
    for (size_t k = 0; k < rest.size(); ++k)
        if (k != dash && !std::isdigit(static_cast<unsigned char>(rest[k]))) return std::nullopt;
    return static_cast<pid_t>(std::stoll(rest.substr(0, dash)));
}

void sync_directory(const std::filesystem::path& dir) {
    const int fd = ::open(dir.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (fd < 0) throw FileError("cannot open directory " + dir.string() + " to sync it: " + errno_text(errno));
    const int rc = ::fsync(fd);
    const int err = errno;
    ::close(fd);
    // EINVAL: the filesystem cannot sync directories; nothing more can be done.
    if (rc != 0 && err != EINVAL)
        throw FileError("the new file is in place but syncing directory " + dir.string() +
                        " failed (" + errno_text(err) + "); it may not survive a crash");
}

// The posterior comes from the sampler (or a test), never from a user's
// file, so an inconsistent one is a bug in the caller.
void check_writable(const Posterior& p) {
    const auto refuse = [](const std::string& what) {
        throw std::invalid_argument("write_posterior: refusing to write an inconsistent posterior: " + what);
    };
    try {
        p.validate();
    } catch (const FormatError& e) {
        refuse(e.what());
    }
    if (auto dup = first_duplicate(p.user_ids)) refuse("user id '" + *dup + "' appears twice");
    if (auto dup = first_duplicate(p.item_ids)) refuse("item id '" + *dup + "' appears twice");
    if (!nlohmann::json::accept(p.fit_metadata_json)) refuse("fit metadata is not valid JSON");
    if (!nlohmann::json::accept(p.diagnostics_json)) refuse("diagnostics are not valid JSON");
    for (const auto* ids : {&p.user_ids, &p.item_ids})
        for (const auto& id : *ids)
            if (id.size() > std::numeric_limits<uint32_t>::max()) refuse("an id is longer than 4 GiB");
}

// The encoded sections the OutSections point into; must outlive them.
struct Encoded {
    std::string metadata, user_ids, item_ids, item_names, item_categories;
};

// The sections of `p` in file order (the bias sections only with biases).
std::vector<OutSection> sections_of(const Posterior& p, const Encoded& encoded) {
    const std::string& metadata = encoded.metadata;
    const std::string& user_ids = encoded.user_ids;
    const std::string& item_ids = encoded.item_ids;
    std::vector<OutSection> sections;
    auto add_raw = [&](uint32_t id, ElementType type, uint64_t count, const void* data, uint64_t bytes) {
        sections.push_back(OutSection{id, type, count, data, bytes});
    };
    auto add_f32 = [&](uint32_t id, const std::vector<float>& v) {
        add_raw(id, ElementType::f32, v.size(), v.data(), v.size() * 4);
    };
    add_raw(kMetadata, ElementType::record, 1, metadata.data(), metadata.size());
    add_raw(kUserIds, ElementType::strings, p.user_ids.size(), user_ids.data(), user_ids.size());
    add_raw(kItemIds, ElementType::strings, p.item_ids.size(), item_ids.data(), item_ids.size());
    add_raw(kSampleChain, ElementType::u32, p.sample_chain.size(), p.sample_chain.data(), p.sample_chain.size() * 4);
    add_f32(kUserFactors, p.user_factors);
    add_f32(kItemFactors, p.item_factors);
    if (p.has_biases) {
        add_f32(kUserBias, p.user_bias);
        add_f32(kItemBias, p.item_bias);
    }
    add_f32(kNoisePrecision, p.noise_precision);
    add_f32(kUserMu, p.user_mu);
    add_f32(kUserLambda, p.user_lambda);
    add_f32(kItemMu, p.item_mu);
    add_f32(kItemLambda, p.item_lambda);
    if (p.has_biases) {
        add_f32(kUserBiasPrecision, p.user_bias_precision);
        add_f32(kItemBiasPrecision, p.item_bias_precision);
    }
    add_raw(kRatedOffsets, ElementType::u64, p.rated_offsets.size(), p.rated_offsets.data(), p.rated_offsets.size() * 8);
    add_raw(kRatedItems, ElementType::u32, p.rated_items.size(), p.rated_items.data(), p.rated_items.size() * 4);
    add_raw(kFitMetadata, ElementType::bytes, p.fit_metadata_json.size(), p.fit_metadata_json.data(),
            p.fit_metadata_json.size());
    add_raw(kDiagnostics, ElementType::bytes, p.diagnostics_json.size(), p.diagnostics_json.data(),
            p.diagnostics_json.size());
    if (p.has_catalogue()) {
        add_raw(kItemNames, ElementType::strings, p.item_names.size(), encoded.item_names.data(),
                encoded.item_names.size());
        add_raw(kItemCategories, ElementType::strings, p.item_categories.size(), encoded.item_categories.data(),
                encoded.item_categories.size());
    }
    return sections;
}

// Layout and checksums, all computed before the first byte is written: sets
// each section's offset and checksum, and returns the header and section
// table bytes. `file_bytes` receives the size of the whole file.
std::vector<unsigned char> lay_out(std::vector<OutSection>& sections, uint64_t& file_bytes) {
    const uint64_t table_end = kHeaderBytes + kEntryBytes * sections.size();
    uint64_t end = table_end;
    for (auto& s : sections) {
        s.offset = align_up(end);
        s.checksum = XXH3_64bits(s.data, s.length_bytes);
        end = s.offset + s.length_bytes;
    }
    file_bytes = end;

    std::vector<unsigned char> head(table_end, 0);
    std::memcpy(head.data(), kMagic, 8);
    put_u32(&head[8], kPosteriorFormatVersion);
    put_u32(&head[12], static_cast<uint32_t>(sections.size()));
    put_u64(&head[16], file_bytes);
    // bytes 24..31 reserved, zero
    for (size_t k = 0; k < sections.size(); ++k) {
        unsigned char* e = &head[kHeaderBytes + k * kEntryBytes];
        put_u32(e + 0, sections[k].id);
        put_u32(e + 4, static_cast<uint32_t>(sections[k].type));
        put_u64(e + 8, sections[k].offset);
        put_u64(e + 16, sections[k].length_bytes);
        put_u64(e + 24, sections[k].count);
        put_u64(e + 32, sections[k].checksum);
    }
    put_u64(&head[32], header_checksum(head.data(), head.data() + kHeaderBytes, table_end - kHeaderBytes));
    return head;
}

// Writes the header and the sections, zero-padded to their offsets, to a
// temporary file beside `path`, syncs it and renames it over `path`.
void write_atomically(const std::string& path, const std::vector<unsigned char>& head,
                      const std::vector<OutSection>& sections) {
    const std::filesystem::path target(path);
    std::filesystem::path dir = target.parent_path();
    if (dir.empty()) dir = ".";
    const std::string base = target.filename().string();
    if (base.empty() || base == "." || base == "..") throw FileError("the path does not name a file");

    TempFile tmp(dir, base);
    tmp.write_all(head.data(), head.size());
    static constexpr unsigned char zeros[kSectionAlignBytes] = {};
    uint64_t at = head.size();  // the end of the section table
    for (const auto& s : sections) {
        tmp.write_all(zeros, s.offset - at);
        tmp.write_all(s.data, s.length_bytes);
        at = s.offset + s.length_bytes;
    }
    tmp.sync_and_close();
    tmp.rename_to(target);
    sync_directory(dir);
}

uint64_t write_posterior_unchecked(const Posterior& p, const std::string& path) {
    const Encoded encoded{encode_metadata(p), encode_strings(p.user_ids), encode_strings(p.item_ids),
                          encode_strings(p.item_names), encode_strings(p.item_categories)};
    std::vector<OutSection> sections = sections_of(p, encoded);
    uint64_t file_bytes = 0;
    const std::vector<unsigned char> head = lay_out(sections, file_bytes);
    write_atomically(path, head, sections);
    return file_bytes;
}

// ============================================================== reading

struct InEntry {
    uint32_t id;
    ElementType type;
    uint64_t offset;
    uint64_t length_bytes;
    uint64_t count;
    uint64_t checksum;
};

class Reader {
public:
    explicit Reader(std::string path) : path_(std::move(path)) {
        fd_ = ::open(path_.c_str(), O_RDONLY | O_CLOEXEC);
        if (fd_ < 0) unreadable("cannot open: " + errno_text(errno) + "; check the path");
        struct stat st {};
        if (::fstat(fd_, &st) != 0) unreadable("cannot stat: " + errno_text(errno));
        if (!S_ISREG(st.st_mode)) unreadable("not a regular file; pass a posterior file written by credence fit");
        size_bytes_ = static_cast<uint64_t>(st.st_size);
    }
    Reader(const Reader&) = delete;
    Reader& operator=(const Reader&) = delete;
    ~Reader() {
        if (fd_ >= 0) ::close(fd_);
    }

    uint64_t size_bytes() const { return size_bytes_; }

    // The bytes are not a valid posterior file (FormatError).
    [[noreturn]] void fail(const std::string& problem) const { throw FormatError(path_ + ": " + problem); }
    // The file cannot be opened or read at all (FileError).
    [[noreturn]] void unreadable(const std::string& problem) const { throw FileError(path_ + ": " + problem); }
    [[noreturn]] void corrupt(const std::string& what) const {
        fail(what + ": file is corrupt; refit or restore it");
    }
    [[noreturn]] void truncated(uint64_t needed_bytes) const {
        fail("file is truncated (" + std::to_string(size_bytes_) + " bytes, needs " +
             std::to_string(needed_bytes) + "); refit or restore it");
    }

    // Reads exactly `bytes` at `offset`; callers have already bounded the
    // range by the file size, so a short read means the file shrank.
    void read_at(uint64_t offset, void* dst, uint64_t bytes) const {
        auto* p = static_cast<unsigned char*>(dst);
        while (bytes > 0) {
            const size_t chunk = static_cast<size_t>(std::min<uint64_t>(bytes, 1ull << 30));
            const ssize_t n = ::pread(fd_, p, chunk, static_cast<off_t>(offset));
            if (n < 0) {
                if (errno == EINTR) continue;
                unreadable("read failed: " + errno_text(errno));
            }
            if (n == 0) unreadable("file shrank while being read; was it replaced? try again");
            p += n;
            offset += static_cast<uint64_t>(n);
            bytes -= static_cast<uint64_t>(n);
        }
    }

    // Reads a section into `dst` (exactly e.length_bytes) and checks its checksum.
    void read_section(const InEntry& e, void* dst) const {
        read_at(e.offset, dst, e.length_bytes);
        if (XXH3_64bits(dst, e.length_bytes) != e.checksum)
            corrupt(std::string("section ") + section_name(e.id) + " checksum mismatch");
    }

    // Checks an unknown section's checksum without keeping its bytes.
    void verify_skipped(const InEntry& e) const {
        std::vector<unsigned char> buf(static_cast<size_t>(std::min<uint64_t>(e.length_bytes, 1u << 20)));
        XXH3_state_t* state = XXH3_createState();
        if (!state) throw std::bad_alloc();
        XXH3_64bits_reset(state);
        for (uint64_t done = 0; done < e.length_bytes;) {
            const uint64_t n = std::min<uint64_t>(buf.size(), e.length_bytes - done);
            try {
                read_at(e.offset + done, buf.data(), n);
            } catch (...) {
                XXH3_freeState(state);
                throw;
            }
            XXH3_64bits_update(state, buf.data(), n);
            done += n;
        }
        const uint64_t h = XXH3_64bits_digest(state);
        XXH3_freeState(state);
        if (h != e.checksum) corrupt("section " + std::to_string(e.id) + " (unknown to this build) checksum mismatch");
    }

private:
    std::string path_;
    int fd_ = -1;
    uint64_t size_bytes_ = 0;
};

bool mul_overflows(uint64_t a, uint64_t b, uint64_t& out) { return __builtin_mul_overflow(a, b, &out); }

// a * b * c, or UINT64_MAX when that overflows (no section can hold that many).
uint64_t product(uint64_t a, uint64_t b, uint64_t c = 1) {
    uint64_t ab = 0, abc = 0;
    if (mul_overflows(a, b, ab) || mul_overflows(ab, c, abc)) return UINT64_MAX;
    return abc;
}

struct Shape {
    uint64_t S, U, I, K;
};

// Expected element count of a typed-array section, from the metadata.
// Returns false for sections whose count is not fixed by the shape.
bool expected_count(uint32_t id, const Shape& sh, uint64_t& out) {
    switch (id) {
        case kSampleChain:
        case kNoisePrecision:
        case kUserBiasPrecision:
        case kItemBiasPrecision: out = sh.S; return true;
        case kUserFactors: out = product(sh.S, sh.U, sh.K); return true;
        case kItemFactors: out = product(sh.S, sh.I, sh.K); return true;
        case kUserBias: out = product(sh.S, sh.U); return true;
        case kItemBias: out = product(sh.S, sh.I); return true;
        case kUserMu:
        case kItemMu: out = product(sh.S, sh.K); return true;
        case kUserLambda:
        case kItemLambda: out = product(sh.S, sh.K, sh.K); return true;
        case kRatedOffsets: out = sh.U + 1; return true;
        default: return false;
    }
}

ElementType expected_type(uint32_t id) {
    switch (id) {
        case kMetadata: return ElementType::record;
        case kUserIds:
        case kItemIds:
        case kItemNames:
        case kItemCategories: return ElementType::strings;
        case kSampleChain:
        case kRatedItems: return ElementType::u32;
        case kRatedOffsets: return ElementType::u64;
        case kFitMetadata:
        case kDiagnostics: return ElementType::bytes;
        default: return ElementType::f32;
    }
}

template <typename T>
void read_array(const Reader& r, const InEntry& e, std::vector<T>& out) {
    size_for_reading(out, static_cast<size_t>(e.count));
    r.read_section(e, out.data());
}

void decode_strings(const Reader& r, const InEntry& e, std::vector<std::string>& out) {
    // Each string costs at least its 4-byte length prefix, so the count is
    // bounded by the section length before anything is allocated.
    if (e.count > e.length_bytes / 4)
        r.corrupt(std::string("section ") + section_name(e.id) + " declares more strings than it can hold");
    std::vector<unsigned char> raw(static_cast<size_t>(e.length_bytes));
    r.read_section(e, raw.data());
    out.clear();
    out.reserve(static_cast<size_t>(e.count));
    uint64_t at = 0;
    for (uint64_t k = 0; k < e.count; ++k) {
        if (e.length_bytes - at < 4) r.corrupt(std::string("section ") + section_name(e.id) + " ends inside a string");
        const uint32_t n = get_u32(&raw[at]);
        at += 4;
        if (e.length_bytes - at < n) r.corrupt(std::string("section ") + section_name(e.id) + " ends inside a string");
        out.emplace_back(reinterpret_cast<const char*>(&raw[at]), n);
        at += n;
    }
    if (at != e.length_bytes)
        r.corrupt(std::string("section ") + section_name(e.id) + " has bytes after its last string");
}

// What the header tells: where the section table ends, the table's bytes
// and the declared file size.
struct HeaderInfo {
    uint32_t version = 0;
    uint64_t table_end = 0;
    uint64_t file_bytes = 0;
    std::vector<unsigned char> table;
};

// Magic and version first: they are the only bytes every version shares.
// Then the section table, the header checksum and the declared size.
HeaderInfo read_header(const Reader& r) {
    const uint64_t size = r.size_bytes();
    unsigned char header[kHeaderBytes] = {};
    r.read_at(0, header, std::min<uint64_t>(size, kHeaderBytes));
    if (std::memcmp(header, kMagic, std::min<uint64_t>(size, 8)) != 0)
        r.fail("not a Credence posterior file (wrong magic bytes)");
    if (size < 12) r.truncated(kHeaderBytes);
    const uint32_t version = get_u32(header + 8);
    if (version < kOldestReadableFormatVersion || version > kPosteriorFormatVersion)
        r.fail("format version " + std::to_string(version) + " is not supported (this build reads versions " +
               std::to_string(kOldestReadableFormatVersion) + " to " + std::to_string(kPosteriorFormatVersion) +
               "); use a matching credence build or refit");
    if (size < kHeaderBytes) r.truncated(kHeaderBytes);

    HeaderInfo h;
    h.version = version;
    const uint64_t section_count = get_u32(header + 12);
    h.table_end = kHeaderBytes + kEntryBytes * section_count;
    if (size < h.table_end) r.truncated(h.table_end);
    h.table.resize(static_cast<size_t>(h.table_end - kHeaderBytes));
    r.read_at(kHeaderBytes, h.table.data(), h.table.size());
    if (header_checksum(header, h.table.data(), h.table.size()) != get_u64(header + 32))
        r.corrupt("header checksum mismatch");
    if (get_u64(header + 24) != 0) r.corrupt("header reserved bytes are not zero");
    h.file_bytes = get_u64(header + 16);
    if (size < h.file_bytes) r.truncated(h.file_bytes);
    if (size > h.file_bytes)
        r.corrupt(std::to_string(size - h.file_bytes) + " unexpected bytes after the declared end of file");
    return h;
}

// The parsed section table. `known` points into `entries` (by section id),
// so a SectionTable is filled in place and never copied or moved.
struct SectionTable {
    std::vector<InEntry> entries;
    const InEntry* known[kLastKnownSection + 1] = {};
    SectionTable() = default;
    SectionTable(const SectionTable&) = delete;
    SectionTable& operator=(const SectionTable&) = delete;
};

// Section table: canonical layout, each section at the next 64-byte
// boundary after the previous one, the last one ending the file.
void read_section_table(const Reader& r, const HeaderInfo& h, SectionTable& t) {
    t.entries.resize(h.table.size() / kEntryBytes);
    uint64_t end = h.table_end;
    for (size_t k = 0; k < t.entries.size(); ++k) {
        const unsigned char* p = &h.table[k * kEntryBytes];
        InEntry& e = t.entries[k];
        e = InEntry{get_u32(p), static_cast<ElementType>(get_u32(p + 4)), get_u64(p + 8), get_u64(p + 16),
                    get_u64(p + 24), get_u64(p + 32)};
        const std::string name = e.id >= 1 && e.id <= kLastKnownSection ? section_name(e.id) : std::to_string(e.id);
        if (e.offset != align_up(end)) r.corrupt("section " + name + " is not where the layout puts it");
        if (e.offset > h.file_bytes || e.length_bytes > h.file_bytes - e.offset) r.corrupt("section " + name + " extends past the end of file");
        end = e.offset + e.length_bytes;
        // Ids 20 and up were free in version 1, so there they are unknown sections.
        const uint32_t last_known = h.version >= 2 ? kLastKnownSection : kDiagnostics;
        if (e.id >= 1 && e.id <= last_known) {
            if (t.known[e.id]) r.corrupt("section " + name + " appears twice");
            if (e.type != expected_type(e.id)) r.corrupt("section " + name + " has the wrong element type");
            const uint64_t unit = element_bytes(e.type);
            uint64_t length = 0;
            if (unit != 0 && (mul_overflows(e.count, unit, length) || length != e.length_bytes))
                r.corrupt("section " + name + " length does not match its element count");
            t.known[e.id] = &e;
        }
        // else: a section added by a later revision of version 1; skipped below.
    }
    if (end != h.file_bytes) r.corrupt("sections do not end at the declared end of file");
}

// Padding between header, table and sections must be zero.
void check_padding(const Reader& r, const HeaderInfo& h, const SectionTable& t) {
    uint64_t at = h.table_end;
    unsigned char pad[kSectionAlignBytes];
    for (const auto& e : t.entries) {
        const uint64_t gap = e.offset - at;
        r.read_at(at, pad, gap);
        for (uint64_t b = 0; b < gap; ++b)
            if (pad[b] != 0) r.corrupt("padding before offset " + std::to_string(e.offset) + " is not zero");
        at = e.offset + e.length_bytes;
    }
}

// The metadata section: the shape, flags, scale and global mean.
void read_metadata(const Reader& r, const SectionTable& t, Posterior& p) {
    if (!t.known[kMetadata]) r.fail("required section metadata is missing; refit or restore it");
    const InEntry& me = *t.known[kMetadata];
    if (me.length_bytes != kMetadataBytes) r.corrupt("section metadata has the wrong length");
    unsigned char meta[kMetadataBytes];
    r.read_section(me, meta);
    p.rank = get_u32(meta + 0);
    p.num_users = get_u32(meta + 4);
    p.num_items = get_u32(meta + 8);
    p.num_samples = get_u32(meta + 12);
    p.num_chains = get_u32(meta + 16);
    const uint32_t flags = get_u32(meta + 20);
    if (flags & ~(kFlagBiases | kFlagScaleDeclared)) r.corrupt("section metadata has unknown flags set");
    if (get_u32(meta + 36) != 0) r.corrupt("section metadata reserved bytes are not zero");
    p.has_biases = flags & kFlagBiases;
    p.scale.declared = flags & kFlagScaleDeclared;
    p.global_mean = get_f32(meta + 24);
    p.scale.min = get_f32(meta + 28);
    p.scale.max = get_f32(meta + 32);
}

// Every required section is present (bias sections exactly when the
// metadata says so), and every typed array holds what the shape needs.
void check_sections_against_shape(const Reader& r, const SectionTable& t, const Posterior& p) {
    const Shape shape{p.num_samples, p.num_users, p.num_items, p.rank};
    for (uint32_t id = 1; id <= kLastKnownSection; ++id) {
        const bool bias_section = id == kUserBias || id == kItemBias || id == kUserBiasPrecision ||
                                  id == kItemBiasPrecision;
        if (id == kItemNames || id == kItemCategories) continue;  // optional, checked below
        const bool required = !bias_section || p.has_biases;
        if (required && !t.known[id])
            r.fail(std::string("required section ") + section_name(id) + " is missing; refit or restore it");
        if (!required && t.known[id])
            r.corrupt(std::string("section ") + section_name(id) + " is present but metadata says no biases");
        uint64_t count = 0;
        if (t.known[id] && expected_count(id, shape, count) && t.known[id]->count != count)
            r.corrupt(std::string("section ") + section_name(id) + " holds " + std::to_string(t.known[id]->count) +
                      " values but the shape needs " + std::to_string(count));
    }
    if (t.known[kUserIds]->count != p.num_users) r.corrupt("section user_ids count does not match the shape");
    if (t.known[kItemIds]->count != p.num_items) r.corrupt("section item_ids count does not match the shape");
    if (!t.known[kItemNames] != !t.known[kItemCategories])
        r.corrupt("sections item_names and item_categories must be present together");
    for (uint32_t id : {kItemNames, kItemCategories})
        if (t.known[id] && t.known[id]->count != p.num_items)
            r.corrupt(std::string("section ") + section_name(id) + " count does not match the shape");
}

// Bulk reads, in file order (the writer's order), straight into place.
void read_contents(const Reader& r, const SectionTable& t, Posterior& p) {
    for (const auto& e : t.entries) {
        switch (e.id) {
            case kMetadata: break;
            case kUserIds: decode_strings(r, e, p.user_ids); break;
            case kItemIds: decode_strings(r, e, p.item_ids); break;
            case kItemNames:
            case kItemCategories:
                if (t.known[e.id] == &e)
                    decode_strings(r, e, e.id == kItemNames ? p.item_names : p.item_categories);
                else
                    r.verify_skipped(e);  // id 20/21 in a version-1 file: not ours
                break;
            case kSampleChain: read_array(r, e, p.sample_chain); break;
            case kUserFactors: read_array(r, e, p.user_factors); break;
            case kItemFactors: read_array(r, e, p.item_factors); break;
            case kUserBias: read_array(r, e, p.user_bias); break;
            case kItemBias: read_array(r, e, p.item_bias); break;
            case kNoisePrecision: read_array(r, e, p.noise_precision); break;
            case kUserMu: read_array(r, e, p.user_mu); break;
            case kUserLambda: read_array(r, e, p.user_lambda); break;
            case kItemMu: read_array(r, e, p.item_mu); break;
            case kItemLambda: read_array(r, e, p.item_lambda); break;
            case kUserBiasPrecision: read_array(r, e, p.user_bias_precision); break;
            case kItemBiasPrecision: read_array(r, e, p.item_bias_precision); break;
            case kRatedOffsets: read_array(r, e, p.rated_offsets); break;
            case kRatedItems: read_array(r, e, p.rated_items); break;
            case kFitMetadata:
                p.fit_metadata_json.resize(static_cast<size_t>(e.length_bytes));
                r.read_section(e, p.fit_metadata_json.data());
                break;
            case kDiagnostics:
                p.diagnostics_json.resize(static_cast<size_t>(e.length_bytes));
                r.read_section(e, p.diagnostics_json.data());
                break;
            default: r.verify_skipped(e); break;
        }
    }
}

// What the checksums cannot vouch for: valid JSON, unique ids, CSR rows
// inside rated_items, and Posterior::validate().
void check_contents(const Reader& r, const Posterior& p) {
    if (!nlohmann::json::accept(p.fit_metadata_json)) r.corrupt("section fit_metadata is not valid JSON");
    if (!nlohmann::json::accept(p.diagnostics_json)) r.corrupt("section diagnostics is not valid JSON");
    if (auto dup = first_duplicate(p.user_ids)) r.corrupt("user id '" + *dup + "' appears twice");
    if (auto dup = first_duplicate(p.item_ids)) r.corrupt("item id '" + *dup + "' appears twice");
    // Posterior::validate walks each user's CSR row; make sure every row lies
    // inside rated_items before it does.
    for (size_t u = 0; u + 1 < p.rated_offsets.size(); ++u)
        if (p.rated_offsets[u] > p.rated_offsets[u + 1] || p.rated_offsets[u + 1] > p.rated_items.size())
            r.corrupt("section rated_offsets does not describe rows of rated_items (user " + std::to_string(u) + ")");
    try {
        p.validate();
    } catch (const FormatError& e) {
        std::string what = e.what();
        if (what.rfind("posterior: ", 0) == 0) what.erase(0, 11);
        r.corrupt("inconsistent contents (" + what + ")");
    }
}

Posterior read_posterior_file(const std::string& path) {
    Reader r(path);
    const HeaderInfo header = read_header(r);
    SectionTable table;
    read_section_table(r, header, table);
    check_padding(r, header, table);
    Posterior p;
    read_metadata(r, table, p);
    check_sections_against_shape(r, table, p);
    read_contents(r, table, p);
    check_contents(r, p);
    return p;
}

}  // namespace

std::vector<std::string> prepare_posterior_output(const std::string& path) {
    namespace fs = std::filesystem;
    const fs::path target(path);
    fs::path dir = target.parent_path();
    if (dir.empty()) dir = ".";
    const std::string base = target.filename().string();
    const auto refuse = [&](const std::string& why) {
        throw FileError("cannot write " + path + ": " + why + "; choose another --out");
    };
    if (base.empty() || base == "." || base == "..") refuse("the path does not name a file");
    std::error_code ec;
    if (!fs::is_directory(dir, ec)) refuse("directory " + dir.string() + " does not exist");
    if (fs::exists(target, ec) && !fs::is_regular_file(target, ec)) refuse("it exists and is not a regular file");

    // Temporary files of this target left by processes that no longer run.
    std::vector<std::string> notes;
    for (const auto& entry : fs::directory_iterator(dir, ec)) {
        const auto writer = temporary_writer(entry.path().filename().string(), base);
        if (!writer || *writer == ::getpid()) continue;
        const uint64_t bytes = entry.is_regular_file(ec) ? entry.file_size(ec) : 0;
        if (::kill(*writer, 0) == 0 || errno != ESRCH) {
            notes.push_back("left " + entry.path().string() + ": process " + std::to_string(*writer) +
                            " that is writing it still runs");
        } else if (fs::remove(entry.path(), ec)) {
            notes.push_back("removed " + entry.path().string() + " (" + std::to_string(bytes) +
                            " bytes), a temporary file left by an interrupted write (process " +
                            std::to_string(*writer) + ")");
        } else {
            notes.push_back("could not remove " + entry.path().string() + ", a temporary file left by an "
                            "interrupted write: " + ec.message());
        }
    }
    // Can a file be created (and so renamed) in the directory? Try it.
    const fs::path probe = dir / (temporary_prefix(base) + std::to_string(::getpid()) + "-probe");
    const int fd = ::open(probe.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0600);
    if (fd < 0) refuse("cannot create files in " + dir.string() + " (" + errno_text(errno) + ")");
    ::close(fd);
    ::unlink(probe.c_str());
    return notes;
}

uint64_t write_posterior(const Posterior& posterior, const std::string& path) {
    check_writable(posterior);
    try {
        return write_posterior_unchecked(posterior, path);
    } catch (const FileError& e) {
        throw FileError("cannot write " + path + ": " + e.what());
    } catch (const std::filesystem::filesystem_error& e) {
        throw FileError("cannot write " + path + ": " + e.what());
    }
}

Posterior read_posterior(const std::string& path) { return read_posterior_file(path); }

}  // namespace credence
