// A small SVG plot writer for the HTML report: line, scatter and bar series
// on linear or log10 axes, with ticks at round numbers, axis labels (which
// carry the units), a title, a legend and reference guides. Output is one
// self-contained <svg> element styled by classes the report's stylesheet
// defines (colours are inline so a plot also reads on its own).
//
// Every drawn data mark carries class "data" and data-series="<index>", and
// the <svg> carries data-plot="<id>", so tests can count what a plot shows.
#pragma once
#include <optional>
#include <string>
#include <vector>

namespace credence::report {

enum class SeriesKind {
    line,    // polyline through the points in order
    points,  // one circle per point
    bars,    // one bar per point, centred on x, from the axis floor (or 0) to y
};

struct Series {
    std::string label;            // legend text; empty: not in the legend
    SeriesKind kind = SeriesKind::line;
    std::vector<double> x, y;     // equal sizes; non-finite points are skipped
    std::vector<double> y_error;  // empty, or one half-width per point (drawn as whiskers)
    std::string color;            // CSS colour; empty: the palette colour of the series index
    double bar_width = 0.0;       // bars: width in x units (0: 80% of the smallest x gap)
    double point_radius = 2.5;    // points: radius in px
    double opacity = 1.0;
};

// A straight reference line in data coordinates (e.g. the diagonal of a
// calibration plot, the end of burn-in), drawn dashed under the data.
struct Guide {
    double x1 = 0, y1 = 0, x2 = 0, y2 = 0;
    std::string label;            // written near (x2, y2); may be empty
};

struct PlotSpec {
    std::string id;               // data-plot attribute; [a-z0-9-] only
    std::string title;
    std::string note;             // short muted text at the right of the legend row (e.g. "R-hat 1.003")
    std::string x_label, y_label; // include the unit, e.g. "sweep (count)"
    double width_px = 560, height_px = 320;
    bool log_x = false;           // log10 x axis; needs every x > 0
    // Axis ranges; unset: the data range padded by 4% (and including 0 for bars).
    std::optional<double> x_min, x_max, y_min, y_max;
    std::vector<Guide> guides;
    bool legend = true;
};

// Picks tick positions at 1, 2 or 5 times a power of ten covering [lo, hi],
// about `target` of them. Needs lo < hi, both finite; throws
// std::invalid_argument otherwise.
std::vector<double> nice_ticks(double lo, double hi, int target = 5);

// Formats a tick value compactly ("0.25", "1e+04", "120").
std::string tick_label(double value);

// Escapes &, <, >, " and ' for text and attribute values.
std::string escape_xml(const std::string& text);

// Renders the plot. Needs equal x/y sizes (and y_error size 0 or equal), and
// x > 0 on a log axis; throws std::invalid_argument otherwise (the report
// builds every series itself, so that is a bug in the caller). A plot with no
// finite point renders axes and a "no data" note.
std::string render_svg(const PlotSpec& spec, const std::vector<Series>& series);

// The palette, in order of use (our own: ink blue, amber, teal, plum, ...).
const std::vector<std::string>& palette();

}  // namespace credence::report
