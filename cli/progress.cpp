#include "cli/progress.hpp"

#include <unistd.h>

#include <cmath>
#include <cstdio>

#include <fmt/format.h>

namespace credence::cli {

ProgressLine::ProgressLine(bool quiet) : active_(!quiet && isatty(STDERR_FILENO) == 1) {}

ProgressLine::~ProgressLine() { finish(); }

void ProgressLine::update(const std::string& text, bool force) {
    if (!active_) return;
    const auto now = std::chrono::steady_clock::now();
    if (!force && drawn_ && now - last_ < std::chrono::milliseconds(200)) return;
    last_ = now;
    std::fprintf(stderr, "\r\033[K%s", text.c_str());
    std::fflush(stderr);
    drawn_ = true;
}

void ProgressLine::finish() {
    if (active_ && drawn_) {
        std::fputc('\n', stderr);
        std::fflush(stderr);
    }
    drawn_ = false;
}

std::string format_duration(double seconds) {
    if (!std::isfinite(seconds) || seconds < 0) return "?";
    if (seconds < 60) return fmt::format("{:.1f} s", seconds);
    const auto total = static_cast<long>(std::lround(seconds));
    if (total < 3600) return fmt::format("{} min {:02d} s", total / 60, static_cast<int>(total % 60));
    return fmt::format("{} h {:02d} min", total / 3600, static_cast<int>((total % 3600) / 60));
}

}  // namespace credence::cli
