// SVG plot writer (report/svg_plot.hpp). Layout: a fixed margin for tick
// labels and axis titles, the legend in a row under the title, data clipped
// to the plot area.
#include "report/svg_plot.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <stdexcept>

namespace credence::report {

namespace {

constexpr double kLeft = 62, kRight = 18, kTop = 52, kBottom = 48;

struct Axis {
    double lo = 0, hi = 1;
    bool log = false;
    double px_lo = 0, px_hi = 1;  // pixel positions of lo and hi
    double map(double v) const {
        const double a = log ? std::log10(lo) : lo, b = log ? std::log10(hi) : hi;
        const double t = ((log ? std::log10(v) : v) - a) / (b - a);
        return px_lo + t * (px_hi - px_lo);
    }
};

std::string num(double v) { return fmt::format("{:.2f}", v); }

}  // namespace

const std::vector<std::string>& palette() {
    static const std::vector<std::string> colors{"#1f4e79", "#d08a16", "#2a9d8f", "#8e4b8c",
                                                 "#c2452d", "#5a7d2a", "#6b6f76", "#3c8dc4"};
    return colors;
}

std::string escape_xml(const std::string& text) {
    std::string out;
    for (char c : text) {
        switch (c) {
            case '&': out += "&amp;"; break;
            case '<': out += "&lt;"; break;
            case '>': out += "&gt;"; break;
            case '"': out += "&quot;"; break;
            case '\'': out += "&#39;"; break;
            default: out += c;
        }
    }
    return out;
}

std::vector<double> nice_ticks(double lo, double hi, int target) {
    if (!(std::isfinite(lo) && std::isfinite(hi) && lo < hi))
        throw std::invalid_argument("nice_ticks: needs a finite range with lo < hi");
    const double raw = (hi - lo) / std::max(1, target);
    const double mag = std::pow(10.0, std::floor(std::log10(raw)));
    double step = mag;
    for (double m : {1.0, 2.0, 5.0, 10.0})
        if (raw <= m * mag) {
            step = m * mag;
            break;
        }
    std::vector<double> ticks;
    for (double t = std::ceil(lo / step - 1e-9) * step; t <= hi + step * 1e-9; t += step)
        ticks.push_back(std::abs(t) < step * 1e-9 ? 0.0 : t);
    return ticks;
}

std::string tick_label(double value) {
    if (value == 0) return "0";
    const double a = std::abs(value);
    if (a >= 1e5 || a < 1e-3) return fmt::format("{:.0e}", value);
    std::string s = fmt::format("{:.4f}", value);
    while (s.back() == '0') s.pop_back();
    if (s.back() == '.') s.pop_back();
    return s;
}

namespace {

// The two axes of one plot and how many finite points it shows.
struct Frame {
    Axis x, y;
    size_t points = 0;
};

// Data ranges: every finite point (with its error bar), bars down to 0, the
// guides; padded by 4% (log axes: out to whole decades); the spec's explicit
// ranges win. Checks the series on the way.
Frame frame_for(const PlotSpec& spec, const std::vector<Series>& series) {
    double xmin = std::numeric_limits<double>::infinity(), xmax = -xmin, ymin = xmin, ymax = -xmin;
    bool any_bars = false;
    size_t points = 0;
    for (const Series& s : series) {
        if (s.x.size() != s.y.size() || (!s.y_error.empty() && s.y_error.size() != s.y.size()))
            throw std::invalid_argument("render_svg: series \"" + s.label + "\" has unequal x, y or error sizes");
        any_bars = any_bars || s.kind == SeriesKind::bars;
        for (size_t j = 0; j < s.x.size(); ++j) {
            if (!std::isfinite(s.x[j]) || !std::isfinite(s.y[j])) continue;
            if (spec.log_x && !(s.x[j] > 0))
                throw std::invalid_argument("render_svg: plot \"" + spec.id + "\" has x <= 0 on a log axis");
            const double e = s.y_error.empty() || !std::isfinite(s.y_error[j]) ? 0.0 : s.y_error[j];
            xmin = std::min(xmin, s.x[j]);
            xmax = std::max(xmax, s.x[j]);
            ymin = std::min(ymin, s.y[j] - e);
            ymax = std::max(ymax, s.y[j] + e);
            ++points;
        }
    }
    if (points == 0) xmin = spec.log_x ? 1 : 0, xmax = spec.log_x ? 10 : 1, ymin = 0, ymax = 1;
    if (any_bars) ymin = std::min(ymin, 0.0), ymax = std::max(ymax, 0.0);
    for (const Guide& g : spec.guides) {
        ymin = std::min({ymin, g.y1, g.y2});
        ymax = std::max({ymax, g.y1, g.y2});
    }
    auto pad = [](double& lo, double& hi, bool log) {
        if (log) {
            lo = std::pow(10.0, std::floor(std::log10(lo)));
            hi = std::pow(10.0, std::ceil(std::log10(hi)));
            if (hi <= lo) hi = lo * 10;
            return;
        }
        if (hi <= lo) {
            const double d = lo == 0 ? 1.0 : std::abs(lo) * 0.1;
            lo -= d, hi += d;
            return;
        }
        const double d = (hi - lo) * 0.04;
        lo -= d, hi += d;
    };
    pad(xmin, xmax, spec.log_x);
    const bool y_floor_zero = any_bars && ymin >= 0;
    pad(ymin, ymax, false);
    if (y_floor_zero) ymin = 0;
    return Frame{Axis{spec.x_min.value_or(xmin), spec.x_max.value_or(xmax), spec.log_x, kLeft, spec.width_px - kRight},
                 Axis{spec.y_min.value_or(ymin), spec.y_max.value_or(ymax), false, spec.height_px - kBottom, kTop},
                 points};
}

// The <svg> element's opening, the clip path, the frame, title and note.
void write_header(std::string& o, const PlotSpec& spec) {
    const double W = spec.width_px, H = spec.height_px;
    o += fmt::format(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"plot\" data-plot=\"{}\" viewBox=\"0 0 {} {}\" "
        "width=\"{}\" height=\"{}\" role=\"img\" aria-label=\"{}\">\n",
        escape_xml(spec.id), W, H, W, H, escape_xml(spec.title));
    o += fmt::format("<defs><clipPath id=\"clip-{}\"><rect x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\"/></clipPath></defs>\n",
                     escape_xml(spec.id), kLeft, kTop, num(W - kLeft - kRight), num(H - kTop - kBottom));
    o += fmt::format("<rect class=\"frame\" x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\" fill=\"#fbfaf7\" stroke=\"#d9d4c7\"/>\n",
                     kLeft, kTop, num(W - kLeft - kRight), num(H - kTop - kBottom));
    // Shrink a long title to the width rather than let it run off the plot.
    const double title_px = std::min(14.0, (W - 24) / (0.62 * std::max<size_t>(1, spec.title.size())));
    o += fmt::format("<text class=\"title\" x=\"14\" y=\"20\" font-size=\"{}\" font-weight=\"600\" fill=\"#222\">{}</text>\n",
                     num(title_px), escape_xml(spec.title));
    if (!spec.note.empty())
        o += fmt::format("<text class=\"note\" x=\"{}\" y=\"42\" text-anchor=\"end\" font-size=\"11.5\" fill=\"#6f6a5f\">{}</text>\n",
                         num(W - kRight), escape_xml(spec.note));
}

// Ticks and grid lines of both axes, then the axis labels.
void write_ticks(std::string& o, const PlotSpec& spec, const Axis& xa, const Axis& ya) {
    const double W = spec.width_px, H = spec.height_px;
    auto in_range = [](double v, const Axis& a) { return v >= std::min(a.lo, a.hi) - 1e-12 && v <= std::max(a.lo, a.hi) + 1e-12; };
    std::vector<double> xticks;
    if (spec.log_x) {
        for (double t = xa.lo; t <= xa.hi * 1.0001; t *= 10) xticks.push_back(t);
    } else if (xa.lo < xa.hi) {
        xticks = nice_ticks(xa.lo, xa.hi, std::max(3, static_cast<int>(W / 85)));
    }
    for (double t : xticks) {
        if (!in_range(t, xa)) continue;
        const double px = xa.map(t);
        o += fmt::format("<line class=\"grid\" x1=\"{0}\" x2=\"{0}\" y1=\"{1}\" y2=\"{2}\" stroke=\"#ebe7dd\"/>"
                         "<line x1=\"{0}\" x2=\"{0}\" y1=\"{2}\" y2=\"{3}\" stroke=\"#555\"/>"
                         "<text class=\"tick\" x=\"{0}\" y=\"{4}\" text-anchor=\"middle\" font-size=\"11\" fill=\"#444\">{5}</text>\n",
                         num(px), kTop, num(H - kBottom), num(H - kBottom + 4), num(H - kBottom + 16), tick_label(t));
    }
    if (ya.lo < ya.hi)
        for (double t : nice_ticks(ya.lo, ya.hi, std::max(4, static_cast<int>(H / 55)))) {
            if (!in_range(t, ya)) continue;
            const double py = ya.map(t);
            o += fmt::format("<line class=\"grid\" x1=\"{0}\" x2=\"{1}\" y1=\"{2}\" y2=\"{2}\" stroke=\"#ebe7dd\"/>"
                             "<line x1=\"{3}\" x2=\"{0}\" y1=\"{2}\" y2=\"{2}\" stroke=\"#555\"/>"
                             "<text class=\"tick\" x=\"{4}\" y=\"{5}\" text-anchor=\"end\" font-size=\"11\" fill=\"#444\">{6}</text>\n",
                             kLeft, num(W - kRight), num(py), kLeft - 4, kLeft - 6, num(py + 4), tick_label(t));
        }
    o += fmt::format("<text class=\"axis-label\" x=\"{}\" y=\"{}\" text-anchor=\"middle\" font-size=\"12\" fill=\"#333\">{}</text>\n",
                     num(kLeft + (W - kLeft - kRight) / 2), num(H - 10), escape_xml(spec.x_label));
    o += fmt::format("<text class=\"axis-label\" transform=\"translate(16 {}) rotate(-90)\" text-anchor=\"middle\" "
                     "font-size=\"12\" fill=\"#333\">{}</text>\n",
                     num(kTop + (H - kTop - kBottom) / 2), escape_xml(spec.y_label));
}

// Reference guides: dashed lines with an optional label at their end.
void write_guides(std::string& o, const PlotSpec& spec, const Axis& xa, const Axis& ya) {
    for (const Guide& g : spec.guides) {
        o += fmt::format("<line class=\"guide\" x1=\"{}\" y1=\"{}\" x2=\"{}\" y2=\"{}\" stroke=\"#8a8578\" "
                         "stroke-dasharray=\"5 4\" stroke-width=\"1.2\"/>\n",
                         num(xa.map(g.x1)), num(ya.map(g.y1)), num(xa.map(g.x2)), num(ya.map(g.y2)));
        if (!g.label.empty())
            o += fmt::format("<text class=\"guide-label\" x=\"{}\" y=\"{}\" font-size=\"10.5\" fill=\"#6f6a5f\">{}</text>\n",
                             num(xa.map(g.x2) + 4), num(ya.map(g.y2) + 12), escape_xml(g.label));
    }
}

std::string series_color(const Series& s, size_t si) { return s.color.empty() ? palette()[si % palette().size()] : s.color; }

// One series' marks: its line, points or bars, and whiskers.
void write_series(std::string& o, const Series& s, size_t si, const Axis& xa, const Axis& ya) {
    const std::string color = series_color(s, si);
    const std::string common = fmt::format("data-series=\"{}\" opacity=\"{}\"", si, s.opacity);
    if (s.kind == SeriesKind::line) {
        std::string d;
        for (size_t j = 0; j < s.x.size(); ++j) {
            if (!std::isfinite(s.x[j]) || !std::isfinite(s.y[j])) continue;
            d += fmt::format("{}{} {}", d.empty() ? "M" : " L", num(xa.map(s.x[j])), num(ya.map(s.y[j])));
        }
        if (!d.empty())
            o += fmt::format("<path class=\"data\" {} d=\"{}\" fill=\"none\" stroke=\"{}\" stroke-width=\"1.6\" "
                             "stroke-linejoin=\"round\"/>\n", common, d, color);
    }
    double bar_w = s.bar_width;
    if (s.kind == SeriesKind::bars && bar_w <= 0) {
        std::vector<double> xs(s.x);
        std::sort(xs.begin(), xs.end());
        double gap = std::numeric_limits<double>::infinity();
        for (size_t j = 1; j < xs.size(); ++j)
            if (xs[j] > xs[j - 1]) gap = std::min(gap, xs[j] - xs[j - 1]);
        bar_w = std::isfinite(gap) ? 0.8 * gap : 1.0;
    }
    for (size_t j = 0; j < s.x.size(); ++j) {
        if (!std::isfinite(s.x[j]) || !std::isfinite(s.y[j])) continue;
        const double px = xa.map(s.x[j]), py = ya.map(s.y[j]);
        if (s.kind == SeriesKind::points)
            o += fmt::format("<circle class=\"data\" {} cx=\"{}\" cy=\"{}\" r=\"{}\" fill=\"{}\"/>\n", common,
                             num(px), num(py), s.point_radius, color);
        if (s.kind == SeriesKind::bars) {
            const double x0 = xa.map(s.x[j] - bar_w / 2), x1 = xa.map(s.x[j] + bar_w / 2);
            const double base = ya.map(std::clamp(0.0, std::min(ya.lo, ya.hi), std::max(ya.lo, ya.hi)));
            o += fmt::format("<rect class=\"data\" {} x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\" fill=\"{}\"/>\n",
                             common, num(std::min(x0, x1)), num(std::min(py, base)), num(std::abs(x1 - x0)),
                             num(std::abs(base - py)), color);
        }
        if (!s.y_error.empty() && std::isfinite(s.y_error[j]) && s.y_error[j] > 0) {
            const double a = ya.map(s.y[j] - s.y_error[j]), b = ya.map(s.y[j] + s.y_error[j]);
            o += fmt::format("<path class=\"whisker\" d=\"M{0} {1} L{0} {2} M{3} {1} L{4} {1} M{3} {2} L{4} {2}\" "
                             "stroke=\"{5}\" stroke-width=\"1.2\" fill=\"none\"/>\n",
                             num(px), num(a), num(b), num(px - 4), num(px + 4), color);
        }
    }
}

// The legend: one row under the title, labelled series only.
void write_legend(std::string& o, const std::vector<Series>& series) {
    double lx = kLeft;
    for (size_t si = 0; si < series.size(); ++si) {
        const Series& s = series[si];
        if (s.label.empty()) continue;
        const std::string color = series_color(s, si);
        if (s.kind == SeriesKind::line)
            o += fmt::format("<line x1=\"{}\" x2=\"{}\" y1=\"38\" y2=\"38\" stroke=\"{}\" stroke-width=\"2.5\"/>",
                             num(lx), num(lx + 16), color);
        else
            o += fmt::format("<rect x=\"{}\" y=\"33\" width=\"12\" height=\"10\" rx=\"2\" fill=\"{}\"/>", num(lx + 2), color);
        o += fmt::format("<text class=\"legend\" x=\"{}\" y=\"42\" font-size=\"11\" fill=\"#333\">{}</text>\n",
                         num(lx + 21), escape_xml(s.label));
        lx += 21 + 6.3 * static_cast<double>(s.label.size()) + 16;
    }
}

}  // namespace

std::string render_svg(const PlotSpec& spec, const std::vector<Series>& series) {
    const Frame frame = frame_for(spec, series);
    std::string o;
    write_header(o, spec);
    write_ticks(o, spec, frame.x, frame.y);
    // Guides, then data, clipped to the frame.
    o += fmt::format("<g clip-path=\"url(#clip-{})\">\n", escape_xml(spec.id));
    write_guides(o, spec, frame.x, frame.y);
    for (size_t si = 0; si < series.size(); ++si) write_series(o, series[si], si, frame.x, frame.y);
    o += "</g>\n";
    if (frame.points == 0)
        o += fmt::format("<text class=\"no-data\" x=\"{}\" y=\"{}\" text-anchor=\"middle\" font-size=\"13\" fill=\"#8a8578\">no data</text>\n",
                         num(spec.width_px / 2), num(spec.height_px / 2));
    if (spec.legend) write_legend(o, series);
    o += "</svg>\n";
    return o;
}

}  // namespace credence::report
