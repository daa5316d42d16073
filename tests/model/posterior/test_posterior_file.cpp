// Tests for model/posterior_file: exact round trips, the byte layout promised
// by model/posterior/FORMAT.md, detection of every truncation and every single-bit
// corruption, forward compatibility (unknown sections skipped), atomic
// replacement on failure, and the inspect summary.
#include <catch2/catch.hpp>

#include <fcntl.h>
#include <signal.h>
#include <sys/resource.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>
#include <xxhash.h>

#include <algorithm>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <stdexcept>
#include <string>
#include <tuple>
#include <vector>

#include "model/error.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/posterior/posterior_summary.hpp"
#include "tests/support/simulate.hpp"
#include "tests/support/paths.hpp"

namespace fs = std::filesystem;
using credence::FileError;
using credence::FormatError;
using credence::Posterior;
using credence::read_posterior;
using credence::write_posterior;
using credence::prepare_posterior_output;
using credence::SimulatedPosteriorOptions;
using credence::testing::scratch_dir;

namespace {

using Bytes = std::vector<unsigned char>;

Bytes slurp(const fs::path& p) {
    std::ifstream in(p, std::ios::binary);
    return Bytes(std::istreambuf_iterator<char>(in), {});
}

void spit(const fs::path& p, const Bytes& b) {
    std::ofstream out(p, std::ios::binary | std::ios::trunc);
    out.write(reinterpret_cast<const char*>(b.data()), static_cast<std::streamsize>(b.size()));
}

template <typename T>
bool same_bits(const std::vector<T>& a, const std::vector<T>& b) {
    return a.size() == b.size() && (a.empty() || std::memcmp(a.data(), b.data(), a.size() * sizeof(T)) == 0);
}

void require_identical(const Posterior& a, const Posterior& b) {
    CHECK(a.rank == b.rank);
    CHECK(a.num_users == b.num_users);
    CHECK(a.num_items == b.num_items);
    CHECK(a.num_samples == b.num_samples);
    CHECK(a.num_chains == b.num_chains);
    CHECK(a.has_biases == b.has_biases);
    CHECK(a.user_ids == b.user_ids);
    CHECK(a.item_ids == b.item_ids);
    CHECK(std::memcmp(&a.global_mean, &b.global_mean, 4) == 0);
    CHECK(std::memcmp(&a.scale.min, &b.scale.min, 4) == 0);
    CHECK(std::memcmp(&a.scale.max, &b.scale.max, 4) == 0);
    CHECK(a.scale.declared == b.scale.declared);
    CHECK(a.sample_chain == b.sample_chain);
    CHECK(same_bits(a.user_factors, b.user_factors));
    CHECK(same_bits(a.item_factors, b.item_factors));
    CHECK(same_bits(a.user_bias, b.user_bias));
    CHECK(same_bits(a.item_bias, b.item_bias));
    CHECK(same_bits(a.noise_precision, b.noise_precision));
    CHECK(same_bits(a.user_mu, b.user_mu));
    CHECK(same_bits(a.user_lambda, b.user_lambda));
    CHECK(same_bits(a.item_mu, b.item_mu));
    CHECK(same_bits(a.item_lambda, b.item_lambda));
    CHECK(same_bits(a.user_bias_precision, b.user_bias_precision));
    CHECK(same_bits(a.item_bias_precision, b.item_bias_precision));
    CHECK(a.rated_offsets == b.rated_offsets);
    CHECK(a.rated_items == b.rated_items);
    CHECK(a.fit_metadata_json == b.fit_metadata_json);
    CHECK(a.diagnostics_json == b.diagnostics_json);
}

// Expects read_posterior(path) to throw FormatError naming the file and
// containing `fragment`; returns the message.
std::string require_format_error(const fs::path& path, const std::string& fragment) {
    try {
        (void)read_posterior(path.string());
    } catch (const FormatError& e) {
        const std::string what = e.what();
        INFO(what);
        CHECK(what.rfind(path.string() + ": ", 0) == 0);
        CHECK(what.find(fragment) != std::string::npos);
        return what;
    }
    FAIL("read_posterior accepted " << path);
    return {};
}

// Expects read_posterior(path) to throw FileError (the file cannot be opened
// or read) naming the file and containing `fragment`.
void require_file_error(const fs::path& path, const std::string& fragment) {
    try {
        (void)read_posterior(path.string());
    } catch (const FileError& e) {
        const std::string what = e.what();
        INFO(what);
        CHECK(what.rfind(path.string() + ": ", 0) == 0);
        CHECK(what.find(fragment) != std::string::npos);
        return;
    }
    FAIL("read_posterior did not report " << path << " as unreadable");
}

// ---- an independent reading of the layout in model/posterior/FORMAT.md

uint32_t u32_at(const Bytes& b, size_t at) { uint32_t v; std::memcpy(&v, &b[at], 4); return v; }
uint64_t u64_at(const Bytes& b, size_t at) { uint64_t v; std::memcpy(&v, &b[at], 8); return v; }
void set_u32(Bytes& b, size_t at, uint32_t v) { std::memcpy(&b[at], &v, 4); }
void set_u64(Bytes& b, size_t at, uint64_t v) { std::memcpy(&b[at], &v, 8); }

struct Section {
    uint32_t id, type;
    uint64_t count;
    Bytes data;
};

std::vector<Section> split_sections(const Bytes& file) {
    std::vector<Section> out;
    const uint32_t n = u32_at(file, 12);
    for (uint32_t k = 0; k < n; ++k) {
        const size_t e = 40 + 40 * size_t{k};
        const uint64_t off = u64_at(file, e + 8), len = u64_at(file, e + 16);
        out.push_back({u32_at(file, e), u32_at(file, e + 4), u64_at(file, e + 24),
                       Bytes(file.begin() + static_cast<long>(off), file.begin() + static_cast<long>(off + len))});
    }
    return out;
}

// Lays sections out as FORMAT.md prescribes, with fresh checksums.
Bytes assemble(const std::vector<Section>& sections) {
    const size_t table_end = 40 + 40 * sections.size();
    Bytes file(table_end, 0);
    std::memcpy(file.data(), "CREDPOST", 8);
    set_u32(file, 8, 1);
    set_u32(file, 12, static_cast<uint32_t>(sections.size()));
    for (size_t k = 0; k < sections.size(); ++k) {
        file.resize((file.size() + 63) / 64 * 64, 0);
        const size_t e = 40 + 40 * k;
        set_u32(file, e, sections[k].id);
        set_u32(file, e + 4, sections[k].type);
        set_u64(file, e + 8, file.size());
        set_u64(file, e + 16, sections[k].data.size());
        set_u64(file, e + 24, sections[k].count);
        set_u64(file, e + 32, XXH3_64bits(sections[k].data.data(), sections[k].data.size()));
        file.insert(file.end(), sections[k].data.begin(), sections[k].data.end());
    }
    set_u64(file, 16, file.size());
    Bytes covered(file.begin(), file.begin() + 32);
    covered.insert(covered.end(), file.begin() + 40, file.begin() + static_cast<long>(table_end));
    set_u64(file, 32, XXH3_64bits(covered.data(), covered.size()));
    return file;
}

// Recomputes the header checksum after a test edited the header or table.
void reseal(Bytes& file) {
    const size_t table_end = 40 + 40 * size_t{u32_at(file, 12)};
    Bytes covered(file.begin(), file.begin() + 32);
    covered.insert(covered.end(), file.begin() + 40, file.begin() + static_cast<long>(table_end));
    set_u64(file, 32, XXH3_64bits(covered.data(), covered.size()));
}

// A random posterior that fills every file section: goods-style ids (one
// item id in six is non-ASCII UTF-8), four in ten pairs rated, and a declared
// scale for even seeds only, so both flag values reach the file.
Posterior make_posterior(SimulatedPosteriorOptions options) {
    options.id_style = credence::SimulatedIdStyle::goods;
    options.rated_fraction = 0.4;
    options.scale.declared = options.seed % 2 == 0;
    return credence::simulate_posterior(options);
}

const SimulatedPosteriorOptions kTiny{.users = 2, .items = 3, .rank = 1, .samples = 1, .chains = 1, .biases = true,
                                      .seed = 3};

}  // namespace

TEST_CASE("round trip is exact for every field, with and without biases") {
    const auto dir = scratch_dir("posterior_file_roundtrip");
    using Spec = SimulatedPosteriorOptions;
    for (const Spec& spec : {Spec{.users = 9, .items = 13, .rank = 4, .samples = 6, .chains = 3, .seed = 11},
                             Spec{.users = 9, .items = 13, .rank = 4, .samples = 6, .chains = 3, .biases = false, .seed = 12},
                             Spec{.users = 1, .items = 1, .rank = 1, .samples = 1, .chains = 1, .biases = false, .seed = 13},
                             Spec{.users = 0, .items = 5, .rank = 2, .samples = 2, .chains = 2, .seed = 14}}) {
        INFO("users " << spec.users << " biases " << spec.biases);
        Posterior p = make_posterior(spec);
        const auto path = dir / "model.posterior";
        const uint64_t bytes = write_posterior(p, path.string());
        CHECK(bytes == fs::file_size(path));
        const Posterior q = read_posterior(path.string());
        require_identical(p, q);
        // Writing the read-back copy reproduces the file byte for byte.
        const auto again = dir / "again.posterior";
        write_posterior(q, again.string());
        CHECK(slurp(path) == slurp(again));
    }
}

TEST_CASE("empty JSON documents, empty ids, negative zero and denormals survive") {
    const auto dir = scratch_dir("posterior_file_special");
    Posterior p = make_posterior({.users = 3, .items = 2, .rank = 2, .samples = 2, .chains = 1, .biases = true});
    p.fit_metadata_json = "{}";
    p.diagnostics_json = "[]";
    p.user_ids[1] = "";
    p.user_factors[0] = -0.0f;
    p.item_factors[1] = std::numeric_limits<float>::denorm_min();
    const auto path = dir / "special.posterior";
    write_posterior(p, path.string());
    require_identical(p, read_posterior(path.string()));
}

TEST_CASE("a file with valid checksums and a NaN or infinite number is refused naming the section") {
    const auto dir = scratch_dir("posterior_file_nonfinite");
    const auto path = dir / "model.posterior";
    write_posterior(make_posterior({.users = 4, .items = 5, .rank = 2, .samples = 2, .chains = 1, .biases = true}),
                    path.string());
    const auto sections = split_sections(slurp(path));
    const auto index_of = [&](uint32_t id) {
        for (size_t k = 0; k < sections.size(); ++k)
            if (sections[k].id == id) return k;
        FAIL("no section " << id);
        return size_t{0};
    };
    // Section ids from FORMAT.md section 5.
    const std::vector<std::tuple<uint32_t, size_t, float, std::string>> cases = {
        {5, 3, std::nanf(""), "section user_factors holds NaN"},
        {6, 0, std::numeric_limits<float>::infinity(), "section item_factors holds an infinite value"},
        {7, 1, -std::numeric_limits<float>::infinity(), "section user_bias holds an infinite value"},
        {8, 2, std::nanf(""), "section item_bias holds NaN"},
        {10, 1, std::nanf(""), "section user_mu holds NaN"},
        {11, 0, 0.0f, "section user_lambda of sample 0 has a diagonal entry that is not positive"},
        {13, 1, std::nanf(""), "section item_lambda holds NaN"},
        {14, 0, -1.0f, "section user_bias_precision holds"},
        {15, 1, std::numeric_limits<float>::infinity(), "section item_bias_precision holds an infinite value"},
        {9, 0, std::nanf(""), "noise precision of sample 0 is not a positive finite number"},
    };
    for (const auto& [id, at, value, message] : cases) {
        INFO(message);
        auto edited = sections;
        std::memcpy(edited[index_of(id)].data.data() + at * 4, &value, 4);
        spit(path, assemble(edited));
        require_format_error(path, message);
    }
}

TEST_CASE("the writer refuses NaN or infinite numbers and creates nothing") {
    const auto dir = scratch_dir("posterior_file_write_nonfinite");
    Posterior p = make_posterior({.users = 3, .items = 2, .rank = 2, .samples = 2, .chains = 1, .biases = true});
    p.item_factors[1] = std::numeric_limits<float>::infinity();
    CHECK_THROWS_AS(write_posterior(p, (dir / "x.posterior").string()), std::invalid_argument);
    CHECK(fs::is_empty(dir));
}

TEST_CASE("an output is checked before the work: missing directory, a directory, an unwritable place") {
    const auto dir = scratch_dir("posterior_file_prepare");
    CHECK(prepare_posterior_output((dir / "ok.posterior").string()).empty());
    CHECK(fs::is_empty(dir));  // the probe file is gone
    CHECK_THROWS_WITH(prepare_posterior_output((dir / "missing" / "x.posterior").string()),
                      Catch::Contains("does not exist") && Catch::Contains("choose another --out"));
    fs::create_directories(dir / "taken.posterior");
    CHECK_THROWS_WITH(prepare_posterior_output((dir / "taken.posterior").string()),
                      Catch::Contains("is not a regular file"));
    // /proc takes no new files, even for root.
    CHECK_THROWS_WITH(prepare_posterior_output("/proc/credence-test.posterior"),
                      Catch::Contains("cannot create files in /proc"));
}

TEST_CASE("temporary files of writers that no longer run are removed, of running ones reported") {
    const auto dir = scratch_dir("posterior_file_stale");
    const pid_t child = fork();
    if (child == 0) _exit(0);
    waitpid(child, nullptr, 0);  // a process id that no longer runs
    const auto dead = dir / (".shop.posterior.tmp-" + std::to_string(child) + "-3");
    const auto alive = dir / (".shop.posterior.tmp-" + std::to_string(getppid()) + "-0");
    const auto other = dir / ".other.posterior.tmp-1-0";
    spit(dead, Bytes(1000, 7));
    spit(alive, Bytes(10, 7));
    spit(other, Bytes(10, 7));
    const auto notes = prepare_posterior_output((dir / "shop.posterior").string());
    REQUIRE(notes.size() == 2);
    CHECK_FALSE(fs::exists(dead));
    CHECK(fs::exists(alive));
    CHECK(fs::exists(other));  // another target's: not ours to judge
    const std::string all = notes[0] + "\n" + notes[1];
    CHECK(all.find("removed " + dead.string() + " (1000 bytes)") != std::string::npos);
    CHECK(all.find("left " + alive.string() + ": process " + std::to_string(getppid())) != std::string::npos);
}

TEST_CASE("SIGINT or SIGTERM during a write leave no temporary file behind") {
    const auto dir = scratch_dir("posterior_file_signal");
    const Posterior big = make_posterior({.users = 1500, .items = 1500, .rank = 16, .samples = 60, .chains = 1});
    for (int sig : {SIGINT, SIGTERM}) {
        const pid_t child = fork();
        if (child == 0) {
            // As in the program: the default actions (Catch's handlers are inherited otherwise).
            std::signal(SIGINT, SIG_DFL);
            std::signal(SIGTERM, SIG_DFL);
            for (int k = 0; k < 200; ++k) write_posterior(big, (dir / "big.posterior").string());
            _exit(0);
        }
        // Wait until a temporary file exists, then signal.
        bool writing = false;
        for (int k = 0; k < 2000 && !writing; ++k) {
            for (const auto& e : fs::directory_iterator(dir))
                writing = writing || e.path().filename().string().find(".tmp-") != std::string::npos;
            if (!writing) usleep(1000);
        }
        REQUIRE(writing);
        kill(child, sig);
        int status = 0;
        waitpid(child, &status, 0);
        INFO("signal " << sig);
        CHECK(WIFSIGNALED(status));
        CHECK(WTERMSIG(status) == sig);
        for (const auto& e : fs::directory_iterator(dir)) CHECK(e.path().filename().string() == "big.posterior");
    }
}

TEST_CASE("the file layout follows FORMAT.md") {
    const auto dir = scratch_dir("posterior_file_layout");
    const auto path = dir / "layout.posterior";
    const Posterior p = make_posterior({.users = 5, .items = 7, .rank = 3, .samples = 4, .chains = 2, .biases = true});
    write_posterior(p, path.string());
    const Bytes file = slurp(path);
    REQUIRE(file.size() > 40);
    CHECK(std::memcmp(file.data(), "CREDPOST", 8) == 0);
    CHECK(u32_at(file, 8) == credence::kPosteriorFormatVersion);
    CHECK(u64_at(file, 16) == file.size());
    CHECK(u64_at(file, 24) == 0);
    const auto sections = split_sections(file);
    CHECK(sections.size() == 19);  // ids 1..19, biases on
    for (uint32_t k = 0; k < u32_at(file, 12); ++k) {
        CHECK(u64_at(file, 40 + 40 * k + 8) % 64 == 0);
        CHECK(sections[k].id == k + 1);
    }
    // Item factors (id 6): float32, [S][I][K], verbatim.
    const Section& items = sections[5];
    CHECK(items.type == 4);
    CHECK(items.count == 4 * 7 * 3);
    REQUIRE(items.data.size() == p.item_factors.size() * 4);
    CHECK(std::memcmp(items.data.data(), p.item_factors.data(), items.data.size()) == 0);
    // Reassembling the parsed sections with this test's own writer gives the same bytes.
    CHECK(assemble(sections) == file);
}

TEST_CASE("truncation at every offset is refused without crashing") {
    const auto dir = scratch_dir("posterior_file_truncate");
    const auto path = dir / "tiny.posterior";
    write_posterior(make_posterior(kTiny), path.string());
    const Bytes full = slurp(path);
    // Shrink one copy step by step (cheaper than rewriting it each time).
    const auto cut = dir / "cut.posterior";
    fs::copy_file(path, cut);
    for (size_t n = full.size(); n-- > 0;) {
        INFO("truncated to " << n << " of " << full.size() << " bytes");
        fs::resize_file(cut, n);
        require_format_error(cut, "truncated");
    }
    // Trailing garbage is refused as well.
    Bytes longer = full;
    longer.push_back(0);
    spit(cut, longer);
    require_format_error(cut, "after the declared end");
}

TEST_CASE("every single-bit flip anywhere in a small file is detected") {
    const auto dir = scratch_dir("posterior_file_flip");
    const auto path = dir / "tiny.posterior";
    write_posterior(make_posterior(kTiny), path.string());
    const Bytes good = slurp(path);
    // Flip each bit in place and put it back (cheaper than rewriting the file).
    const int fd = ::open(path.c_str(), O_WRONLY);
    REQUIRE(fd >= 0);
    auto put_byte = [&](size_t at, unsigned char v) { REQUIRE(::pwrite(fd, &v, 1, static_cast<off_t>(at)) == 1); };
    size_t section_hits = 0, header_hits = 0, padding_hits = 0;
    for (size_t at = 0; at < good.size(); ++at) {
        for (int bit = 0; bit < 8; ++bit) {
            put_byte(at, static_cast<unsigned char>(good[at] ^ (1u << bit)));
            INFO("byte " << at << " bit " << bit);
            const std::string what = require_format_error(path, "");
            section_hits += what.find(": section ") != std::string::npos;
            header_hits += what.find("header checksum mismatch") != std::string::npos;
            padding_hits += what.find("padding") != std::string::npos;
        }
        put_byte(at, good[at]);
    }
    ::close(fd);
    // Each kind of region (sections, header/table, zero padding) was hit and
    // reported as such, so the loop did not pass on some unrelated failure.
    INFO(good.size() << " bytes");
    CHECK(section_hits > 0);
    CHECK(header_hits > 0);
    CHECK(padding_hits > 0);
    CHECK(slurp(path) == good);
    (void)read_posterior(path.string());  // restored file reads again
}

TEST_CASE("a corrupt section is named in the error") {
    const auto dir = scratch_dir("posterior_file_named");
    const auto path = dir / "model.posterior";
    write_posterior(make_posterior({.users = 6, .items = 8, .rank = 3, .samples = 3, .chains = 1}), path.string());
    Bytes b = slurp(path);
    const size_t item_factors_offset = static_cast<size_t>(u64_at(b, 40 + 40 * 5 + 8));
    b[item_factors_offset + 17] ^= 0x20;
    spit(path, b);
    const std::string what =
        require_format_error(path, "section item_factors checksum mismatch: file is corrupt; refit or restore it");
    CHECK(what == path.string() + ": section item_factors checksum mismatch: file is corrupt; refit or restore it");

    // A damaged header or table is reported as such.
    b = slurp(path);
    b[40 + 40 * 2 + 16] ^= 1;  // item_ids length
    spit(path, b);
    require_format_error(path, "header checksum mismatch");
}

TEST_CASE("wrong magic, other files and missing files are refused") {
    const auto dir = scratch_dir("posterior_file_magic");
    const auto path = dir / "model.posterior";
    write_posterior(make_posterior(kTiny), path.string());
    Bytes b = slurp(path);
    std::memcpy(b.data(), "CREDPOSX", 8);
    spit(path, b);
    require_format_error(path, "wrong magic bytes");
    spit(path, Bytes{'u', 's', 'e', 'r', ',', 'i', 't', 'e', 'm', ',', 'r', 'a', 't', 'i', 'n', 'g', '\n'});
    require_format_error(path, "not a Credence posterior file");
    require_file_error(dir / "absent.posterior", "cannot open");
    require_file_error(dir, "not a regular file");
}

TEST_CASE("other format versions are refused with a version message") {
    const auto dir = scratch_dir("posterior_file_version");
    const auto path = dir / "model.posterior";
    write_posterior(make_posterior(kTiny), path.string());
    const Bytes good = slurp(path);
    for (uint32_t version : {0u, 2u, 77u}) {
        Bytes b = good;
        set_u32(b, 8, version);
        spit(path, b);
        require_format_error(path, "format version " + std::to_string(version) + " is not supported");
    }
}

TEST_CASE("unknown sections are skipped; missing required sections are refused") {
    const auto dir = scratch_dir("posterior_file_sections");
    const auto path = dir / "model.posterior";
    const Posterior p = make_posterior({.users = 4, .items = 5, .rank = 2, .samples = 2, .chains = 2});
    write_posterior(p, path.string());
    const auto sections = split_sections(slurp(path));

    // A later revision adds section 4000 (in the middle, to test ordering too).
    auto extended = sections;
    extended.insert(extended.begin() + 3, Section{4000, 1, 11, Bytes{'s', 'h', 'e', 'l', 'f', '-', 'o', 'r', 'd', 'e', 'r'}});
    Bytes file = assemble(extended);
    spit(path, file);
    require_identical(p, read_posterior(path.string()));
    // ... but its checksum is still verified.
    const size_t extra_offset = static_cast<size_t>(u64_at(file, 40 + 40 * 3 + 8));
    file[extra_offset] ^= 4;
    spit(path, file);
    require_format_error(path, "unknown to this build) checksum mismatch");

    // Dropping any required section is refused with its name.
    for (size_t k = 0; k < sections.size(); ++k) {
        auto fewer = sections;
        fewer.erase(fewer.begin() + static_cast<long>(k));
        spit(path, assemble(fewer));
        INFO("dropped section id " << sections[k].id);
        require_format_error(path, "is missing");
    }
}

TEST_CASE("consistent checksums do not make an impossible file readable") {
    // These files carry valid checksums, so only the structural checks stand
    // between them and a huge allocation or an out-of-bounds read.
    const auto dir = scratch_dir("posterior_file_crafted");
    const auto path = dir / "model.posterior";
    write_posterior(make_posterior({.users = 4, .items = 5, .rank = 2, .samples = 2, .chains = 1}), path.string());
    const auto sections = split_sections(slurp(path));

    auto huge_shape = sections;  // metadata claims 2^32-1 samples
    set_u32(huge_shape[0].data, 12, 0xFFFFFFFFu);
    spit(path, assemble(huge_shape));
    require_format_error(path, "the shape needs");

    auto huge_count = sections;  // item factors claim 2^61 values
    huge_count[5].count = 1ull << 61;
    spit(path, assemble(huge_count));
    require_format_error(path, "length does not match its element count");

    auto long_string = sections;  // a user id claims 4 GiB of bytes
    set_u32(long_string[1].data, 0, 0xFFFFFFF0u);
    spit(path, assemble(long_string));
    require_format_error(path, "ends inside a string");

    auto bad_chain = sections;  // sample 1 names chain 7 of 1: caught by Posterior::validate
    set_u32(bad_chain[3].data, 4, 7);
    spit(path, assemble(bad_chain));
    require_format_error(path, "inconsistent contents");

    auto bias_without_flag = sections;  // a bias section in a file without biases
    set_u32(bias_without_flag[0].data, 20, 0);
    spit(path, assemble(bias_without_flag));
    require_format_error(path, "metadata says no biases");

    {
        // The last section starts past the declared end and its length wraps
        // around 2^64 back onto that end; it claims 2^62 - 1 rated items.
        auto reordered = sections;
        std::rotate(reordered.begin() + 16, reordered.begin() + 17, reordered.end());  // rated_items last
        const std::string json32 = "{\"v\":\"" + std::string(24, 'x') + "\"}";  // 32 bytes
        reordered[17].data.assign(json32.begin(), json32.end());                 // diagnostics, second to last
        reordered[17].count = 32;
        Bytes file = assemble(reordered);
        const size_t last = 40 + 40 * 18;
        const uint64_t start = u64_at(file, last + 8);  // end of diagnostics + 32 bytes of padding
        REQUIRE(u64_at(file, last - 40 + 8) + 32 + 32 == start);
        file.resize(static_cast<size_t>(start - 4));
        set_u64(file, 16, file.size());
        set_u64(file, last + 16, 0 - uint64_t{4});
        set_u64(file, last + 24, (uint64_t{1} << 62) - 1);
        reseal(file);
        spit(path, file);
        require_format_error(path, "section rated_items extends past the end of file");
    }

    {
        // A CSR row that runs past the item list: user 0 claims items [0, 6)
        // of 5, all in ascending order so only the bounds check can stop it.
        auto bad_rows = sections;
        std::vector<uint64_t> offsets{0, 6, 3, 4, 5};
        std::vector<uint32_t> items{0, 1, 2, 3, 4};
        bad_rows[15].data.resize(offsets.size() * 8);
        std::memcpy(bad_rows[15].data.data(), offsets.data(), offsets.size() * 8);
        bad_rows[16].count = items.size();
        bad_rows[16].data.resize(items.size() * 4);
        std::memcpy(bad_rows[16].data.data(), items.data(), items.size() * 4);
        spit(path, assemble(bad_rows));
        require_format_error(path, "section rated_offsets does not describe rows of rated_items (user 0)");
    }

    auto bad_json = sections;  // fit metadata that is not JSON
    bad_json[17].data = Bytes{'{', 'x'};
    bad_json[17].count = 2;
    spit(path, assemble(bad_json));
    require_format_error(path, "not valid JSON");
}

TEST_CASE("writing replaces the file atomically and cleans up after failures") {
    const auto dir = scratch_dir("posterior_file_atomic");
    const auto path = dir / "model.posterior";
    const Posterior small = make_posterior({.users = 2, .items = 3, .rank = 1, .samples = 1, .chains = 1});
    const Posterior big = make_posterior({.users = 60, .items = 90, .rank = 8, .samples = 10, .chains = 2});
    auto only_target_left = [&] {
        std::vector<std::string> names;
        for (const auto& e : fs::directory_iterator(dir)) names.push_back(e.path().filename().string());
        CHECK(names == std::vector<std::string>{"model.posterior"});
    };

    write_posterior(small, path.string());
    const Bytes before = slurp(path);
    write_posterior(big, path.string());  // replacing succeeds
    require_identical(big, read_posterior(path.string()));
    only_target_left();
    write_posterior(small, path.string());
    CHECK(slurp(path) == before);

    SECTION("a write that fails midway (file size limit) leaves the old file and no temporary") {
        // RLIMIT_FSIZE makes write() fail with EFBIG once the temporary file
        // reaches 4 KiB; SIGXFSZ is ignored so the failure is an error return.
        struct rlimit old_limit {};
        REQUIRE(getrlimit(RLIMIT_FSIZE, &old_limit) == 0);
        auto old_handler = signal(SIGXFSZ, SIG_IGN);
        struct rlimit limited = old_limit;
        limited.rlim_cur = 4096;
        REQUIRE(setrlimit(RLIMIT_FSIZE, &limited) == 0);
        std::string message;
        try {
            write_posterior(big, path.string());
        } catch (const FileError& e) {
            message = e.what();
        }
        REQUIRE(setrlimit(RLIMIT_FSIZE, &old_limit) == 0);
        signal(SIGXFSZ, old_handler);
        INFO(message);
        CHECK(message.rfind("cannot write " + path.string() + ": ", 0) == 0);
        CHECK(slurp(path) == before);
        only_target_left();
    }

    SECTION("a rename that fails leaves the old contents and no temporary") {
        const auto blocker = dir / "model.posterior" ;
        fs::remove(blocker);
        fs::create_directories(blocker / "occupied");  // a non-empty directory cannot be renamed over
        CHECK_THROWS_AS(write_posterior(small, blocker.string()), FileError);
        CHECK(fs::is_directory(blocker / "occupied"));
        only_target_left();
    }

    SECTION("an unwritable directory is reported and nothing changes") {
        CHECK_THROWS_AS(write_posterior(small, (dir / "no-such-dir" / "m.posterior").string()), FileError);
        if (geteuid() == 0) {
            WARN("NOTICE: running as root; the read-only directory check cannot fail here and is skipped");
        } else {
            fs::permissions(dir, fs::perms::owner_read | fs::perms::owner_exec);
            CHECK_THROWS_AS(write_posterior(big, path.string()), FileError);
            fs::permissions(dir, fs::perms::owner_all);
            CHECK(slurp(path) == before);
        }
        only_target_left();
    }
}

TEST_CASE("the writer refuses an inconsistent posterior and creates nothing") {
    const auto dir = scratch_dir("posterior_file_refuse");
    const auto path = dir / "model.posterior";
    Posterior p = make_posterior({.users = 3, .items = 4, .rank = 2, .samples = 2, .chains = 1});
    p.item_factors.pop_back();
    CHECK_THROWS_AS(write_posterior(p, path.string()), std::invalid_argument);
    CHECK_THROWS_WITH(write_posterior(p, path.string()), Catch::Contains("item_factors"));
    p = make_posterior({.users = 3, .items = 4, .rank = 2, .samples = 2, .chains = 1});
    p.item_ids[2] = p.item_ids[0];
    CHECK_THROWS_AS(write_posterior(p, path.string()), std::invalid_argument);
    CHECK_THROWS_WITH(write_posterior(p, path.string()), Catch::Contains("appears twice"));
    p = make_posterior({.users = 3, .items = 4, .rank = 2, .samples = 2, .chains = 1});
    p.diagnostics_json = "verdict: fine";
    CHECK_THROWS_WITH(write_posterior(p, path.string()), Catch::Contains("not valid JSON"));
    CHECK(fs::is_empty(dir));
}

TEST_CASE("describe_posterior reports the key numbers") {
    const auto dir = scratch_dir("posterior_file_describe");
    const auto path = dir / "shop.posterior";
    Posterior p = make_posterior({.users = 12, .items = 17, .rank = 5, .samples = 6, .chains = 3, .biases = true,
                                  .seed = 8});
    p.fit_metadata_json = R"({"options": {"seed": 4242, "rank": 5}, "data_fingerprint": "a1b2c3d4e5f60718"})";
    p.diagnostics_json = R"({"thresholds": {"max_rhat": 1.01}, "max_rhat": 1.31, "min_ess_bulk_per_chain": 38.5,
                             "verdict": "not_converged", "warnings": ["raise the sample count", "thin more"]})";
    const uint64_t bytes = write_posterior(p, path.string());
    const std::string text = credence::describe_posterior(read_posterior(path.string()), path.string());
    INFO(text);
    double sd_sum = 0;
    for (float tau : p.noise_precision) sd_sum += 1 / std::sqrt(double{tau});
    char noise_sd[32];
    std::snprintf(noise_sd, sizeof noise_sd, "%.4f", sd_sum / 6);
    char mean[32];
    std::snprintf(mean, sizeof mean, "%.4f", double{p.global_mean});
    for (const std::string& fragment :
         {std::string("12 users x 17 items, rank 5"), std::string("6 kept over 3 chains (per chain: 2 2 2)"),
          std::to_string(bytes) + " bytes", std::string("user and item"), std::string("[1, 5] (declared)"),
          std::string(mean), std::string(noise_sd), std::string("seed 4242"),
          std::string("data fingerprint a1b2c3d4e5f60718"), std::string("verdict not_converged"),
          std::string("max R-hat 1.31"), std::string("min bulk ESS per chain 38.5"), std::string("2 warnings"), "rated pairs:    " + std::to_string(p.rated_items.size())})
        CHECK(text.find(fragment) != std::string::npos);

    p.has_biases = false;
    p.fit_metadata_json = "{}";
    p.diagnostics_json = "{}";
    const std::string bare = credence::describe_posterior(p, (dir / "never-written.posterior").string());
    INFO(bare);
    CHECK(bare.find("biases:         none") != std::string::npos);
    CHECK(bare.find("size unavailable") != std::string::npos);
    CHECK(bare.find("fit metadata:   (none recorded)") != std::string::npos);
}
