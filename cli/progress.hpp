// Progress lines on stderr for long work. Draws only when stderr is a
// terminal and the user did not ask for --quiet; rewrites one line in place
// and rate-limits itself so printing never costs measurable time.
#pragma once
#include <chrono>
#include <string>

namespace credence::cli {

class ProgressLine {
public:
    explicit ProgressLine(bool quiet);
    ~ProgressLine();
    bool active() const { return active_; }
    // Replaces the line; `force` bypasses the rate limit (use for the last update).
    void update(const std::string& text, bool force = false);
    // Ends the line (newline) if anything was drawn.
    void finish();

private:
    bool active_ = false;
    bool drawn_ = false;
    std::chrono::steady_clock::time_point last_;
};

// "1 h 02 min", "3 min 05 s", "12.4 s"
std::string format_duration(double seconds);

}  // namespace credence::cli
