/* The SVG drawing kit of the reports (cli/svg.h). */
#include "cli/svg.h"

#include <math.h>
#include <string.h>

/* A tick step of 1, 2 or 5 times a power of ten giving about `want` ticks. */
double cli_svg_nice_step(double range, int want) {
  if (!(range > 0)) return 1;
  double raw = range / want, mag = pow(10, floor(log10(raw))), f = raw / mag;
  return (f <= 1 ? 1 : f <= 2 ? 2 : f <= 5 ? 5 : 10) * mag;
}

double cli_svg_map(double v, double lo, double hi, double p0, double p1) {
  return hi > lo ? p0 + (v - lo) / (hi - lo) * (p1 - p0) : (p0 + p1) / 2;
}

/* Horizontal grid lines and tick labels on the left or right edge. */
void cli_svg_y_axis(cli_sbuf *b, const cli_svg_frame *f, double lo, double hi, double step, int right, int percent,
                    const char *colour, const char *label) {
  for (double v = lo; v <= hi + step * 1e-6; v += step) {
    double y = cli_svg_map(v, lo, hi, f->y1, f->y0);
    if (!right)
      cli_sb_printf(b, "<line x1=\"%.1f\" x2=\"%.1f\" y1=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>", f->x0, f->x1, y, y,
                    CLI_SVG_GRID);
    double digits = step >= 1 ? 0 : ceil(-log10(step * (percent ? 100 : 1)) - 1e-9);
    if (digits < 0) digits = 0;
    cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"%s\" class=\"tick\">%.*f%s</text>",
              right ? f->x1 + 6 : f->x0 - 6, y + 4, right ? "start" : "end", (int)digits,
              percent ? 100 * v : v, percent ? "%" : "");
  }
  double cx = right ? f->x1 + 50 : f->x0 - 50, cy = (f->y0 + f->y1) / 2;
  cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" transform=\"rotate(-90 %.1f %.1f)\" text-anchor=\"middle\" "
            "class=\"axis-title\" fill=\"%s\">", cx, cy, cx, cy, colour);
  cli_sb_esc(b, label);
  cli_sb_add(b, "</text>", 7);
  cli_sb_printf(b, "<line x1=\"%.1f\" x2=\"%.1f\" y1=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>", right ? f->x1 : f->x0,
            right ? f->x1 : f->x0, f->y0, f->y1, CLI_SVG_AXIS);
}

void cli_svg_legend_item(cli_sbuf *b, double x, double y, const char *colour, const char *shape, const char *label) {
  if (!strcmp(shape, "line") || !strcmp(shape, "dashed"))
    cli_sb_printf(b, "<line x1=\"%.1f\" x2=\"%.1f\" y1=\"%.1f\" y2=\"%.1f\" stroke=\"%s\" stroke-width=\"3\"%s/>", x,
              x + 22, y - 4, y - 4, colour, shape[0] == 'd' ? " stroke-dasharray=\"6 3\"" : "");
  else
    cli_sb_printf(b, "<rect x=\"%.1f\" y=\"%.1f\" width=\"14\" height=\"12\" fill=\"%s\"/>", x + 4, y - 10, colour);
  cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" class=\"legend\">", x + 28, y);
  cli_sb_esc(b, label);
  cli_sb_add(b, "</text>", 7);
}
