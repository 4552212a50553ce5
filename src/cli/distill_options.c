/* distill's option table (cli/distill_options.h) and what is made from it:
 * the getopt_long table, value checks and the --help lines. */
#include "cli/distill_options.h"

#include <getopt.h>
#include <limits.h>
#include <string.h>

#include "cli/cli.h"
#include "recoup/distill.h"

static const char *const cli_optimizers[] = {"adamw", "sgd", NULL};
static const char *const cli_schedules[] = {"cosine", "step", "constant", NULL};
static const char *const cli_bn_modes[] = {"frozen", "recalibrate", "train", NULL};
static const char *const cli_mask_modes[] = {"auto", "zeros", "none", NULL};

const cli_option cli_distill_options[CLI_DISTILL_N_OPTIONS] = {
#define CLI_DISTILL_OPT_ROW(id, name, kind, lo, hi, choices, where, group, metavar, dflt, help) \
  {name, kind, lo, hi, choices, where, group, metavar, dflt, help},
    CLI_DISTILL_OPTIONS(CLI_DISTILL_OPT_ROW)
#undef CLI_DISTILL_OPT_ROW
};

void cli_distill_longopts(void *out) {
  struct option *o = out;
  for (int i = 0; i < CLI_DISTILL_N_OPTIONS; i++) {
    const cli_option *r = &cli_distill_options[i];
    o[i] = (struct option){r->name, r->kind == CLI_OPT_FLAG ? no_argument : required_argument, NULL,
                           CLI_OPT_BASE + i};
  }
  o[CLI_DISTILL_N_OPTIONS] = (struct option){"help", no_argument, NULL, 'h'};
  o[CLI_DISTILL_N_OPTIONS + 1] = (struct option){NULL, 0, NULL, 0};
}

/* An integer bound of the table as a long (CLI_OPT_NO_MAX: LONG_MAX). */
static long int_bound(double b) { return b >= (double)LONG_MAX ? LONG_MAX : b <= (double)LONG_MIN ? LONG_MIN : (long)b; }

static void choice_list(const cli_option *o, char *buf, size_t n) {
  size_t used = 0;
  buf[0] = '\0';
  for (const char *const *c = o->choices; *c && used < n; c++)
    used += (size_t)snprintf(buf + used, n - used, "%s%s", c == o->choices ? "" : "|", *c);
}

int cli_option_value(const cli_option *o, const char *v, double *num, long *whole) {
  switch (o->kind) {
    case CLI_OPT_INT:
      if (cli_parse_int(v, int_bound(o->lo), int_bound(o->hi), whole))
        return cli_usage_error("distill", "--%s expects an integer in [%ld, %ld], got '%s'", o->name,
                               int_bound(o->lo), int_bound(o->hi), v);
      return 0;
    case CLI_OPT_NUM:
      if (cli_parse_float(v, num) || *num < o->lo || *num > o->hi)
        return cli_usage_error("distill", "--%s expects a number in [%g, %g], got '%s'", o->name, o->lo, o->hi, v);
      return 0;
    case CLI_OPT_CHOICE: {
      for (int i = 0; o->choices[i]; i++)
        if (!strcmp(v, o->choices[i])) {
          *whole = i;
          return 0;
        }
      char list[128];
      choice_list(o, list, sizeof list);
      return cli_usage_error("distill", "--%s must be one of %s, not '%s'", o->name, list, v);
    }
    default: return 0;
  }
}

/* Help lines: "  --name METAVAR" padded to the help column, then the help
 * text, its later lines under the first. */
#define HELP_COLUMN 27
#define HELP_WIDTH 80

/* Words of `text` from HELP_COLUMN on, filled up to HELP_WIDTH columns;
 * '\n' forces a break. `pad` spaces reach HELP_COLUMN on the first line. */
static void print_help_text(FILE *f, const char *text, int pad) {
  int used = 0; /* characters on the current line after HELP_COLUMN */
  fprintf(f, "%*s", pad, "");
  for (const char *p = text; *p;) {
    if (*p == '\n' || *p == ' ') {
      p++;
      if (p[-1] == '\n') used = -1;
      continue;
    }
    int len = (int)strcspn(p, " \n");
    if (used < 0 || (used > 0 && HELP_COLUMN + used + 1 + len > HELP_WIDTH)) {
      fprintf(f, "\n%*s", HELP_COLUMN, "");
      used = 0;
    }
    fprintf(f, "%s%.*s", used ? " " : "", len, p);
    used += (used ? 1 : 0) + len;
    p += len;
  }
  fputc('\n', f);
}

static void print_terms(FILE *f) {
  float weight;
  const char *name, *help;
  for (int t = 0; (name = rc_distill_loss_term(t, &weight, &help)); t++) {
    char head[64];
    snprintf(head, sizeof head, "%s=%g", name, (double)weight);
    fprintf(f, "    %-21s %s\n", head, help);
  }
}

void cli_distill_options_help(FILE *f, cli_opt_group group) {
  for (int i = 0; i < CLI_DISTILL_N_OPTIONS; i++) {
    const cli_option *o = &cli_distill_options[i];
    if (o->group != group) continue;
    char left[96], meta[128];
    if (o->kind == CLI_OPT_CHOICE) choice_list(o, meta, sizeof meta);
    else snprintf(meta, sizeof meta, "%s", o->metavar ? o->metavar : "");
    int n = snprintf(left, sizeof left, "  --%s%s%s", o->name, meta[0] ? " " : "", meta);
    fputs(left, f);
    /* A long left column puts the help on the next line. */
    int pad = n < HELP_COLUMN - 1 ? HELP_COLUMN - n : 0;
    if (!pad) fputc('\n', f);
    char text[512];
    if (o->dflt) snprintf(text, sizeof text, "%s (default %s)", o->help, o->dflt);
    else snprintf(text, sizeof text, "%s", o->help);
    print_help_text(f, text, pad ? pad : HELP_COLUMN);
    if (o->kind == CLI_OPT_TERMS) print_terms(f);
  }
}
