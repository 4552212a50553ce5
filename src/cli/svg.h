/* The SVG drawing kit of the reports: plot frames, value-to-pixel mapping,
 * tick steps, axes with grid lines and legend entries, written into a text
 * buffer. The charts themselves (what is plotted) are the report's. */
#ifndef RC_CLI_SVG_H
#define RC_CLI_SVG_H

#include "cli/sbuf.h"

/* Grid lines and axes; every colour dark enough for text on white. */
#define CLI_SVG_GRID "#e3e6ea"
#define CLI_SVG_AXIS "#5b6169"

typedef struct cli_svg_frame {
  double x0, x1, y0, y1; /* plot area in pixels: y0 top, y1 bottom */
} cli_svg_frame;

/* A tick step of 1, 2 or 5 times a power of ten giving about `want` ticks. */
double cli_svg_nice_step(double range, int want);
/* v in [lo, hi] to a pixel in [p0, p1] (the middle when hi <= lo). */
double cli_svg_map(double v, double lo, double hi, double p0, double p1);
/* Horizontal grid lines and tick labels on the left or right edge. */
void cli_svg_y_axis(cli_sbuf *b, const cli_svg_frame *f, double lo, double hi, double step, int right, int percent,
                    const char *colour, const char *label);
/* A legend entry: shape "line", "dashed" or a box, then the label. */
void cli_svg_legend_item(cli_sbuf *b, double x, double y, const char *colour, const char *shape, const char *label);

#endif
