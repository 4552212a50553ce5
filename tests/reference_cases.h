/* The PyTorch reference exports (scripts/export_reference_models.py, ctest
 * fixture reference_models): walking their manifest.txt, shared by every test
 * that runs them. */
#ifndef RC_REFERENCE_CASES_H
#define RC_REFERENCE_CASES_H

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* fn(dir, model, opset, variant) returns 1 when the case passes. */
typedef int (*ref_case_fn)(const char *dir, const char *model, int opset, const char *variant);

/* Runs fn on every case whose variant equals `variant` (NULL: every case).
 * Returns the number of cases run, or -1 (with a message) when the manifest
 * is missing; *passed receives how many passed. */
static int ref_each_case(const char *variant, ref_case_fn fn, int *passed) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  char manifest[1024];
  snprintf(manifest, sizeof manifest, "%s/reference/manifest.txt", bin ? bin : ".");
  FILE *f = fopen(manifest, "r");
  *passed = 0;
  if (!f) {
    fprintf(stderr, "missing %s: the reference_models fixture (scripts/export_reference_models.py) did not run\n",
            manifest);
    return -1;
  }
  char line[1024];
  int ran = 0;
  while (fgets(line, sizeof line, f)) {
    char cas[256], model[128], var[32];
    int opset;
    if (line[0] == '#' || sscanf(line, "%255s %127s %d %31s", cas, model, &opset, var) != 4) continue;
    if (variant && strcmp(var, variant)) continue;
    char dir[1400];
    snprintf(dir, sizeof dir, "%s/reference/%s", bin ? bin : ".", cas);
    ran++;
    *passed += fn(dir, model, opset, var);
  }
  fclose(f);
  return ran;
}

#endif
