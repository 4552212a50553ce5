/* recoup batch --merge-reports: one report from the reports of a
 * manifest's shards, in manifest order. */
#include <cJSON.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli/batch.h"
#include "cli/cli.h"
#include "cli/report.h"
#include "recoup/util.h"

static int by_index(const void *x, const void *y) {
  const cJSON *a = *(cJSON *const *)x, *b = *(cJSON *const *)y;
  double ia = cJSON_GetObjectItemCaseSensitive(a, "index")->valuedouble;
  double ib = cJSON_GetObjectItemCaseSensitive(b, "index")->valuedouble;
  return ia < ib ? -1 : ia > ib;
}

int cli_batch_merge_reports(batch_args *a) {
  rc_err e = {0};
  cJSON **reports = calloc((size_t)a->n_merge, sizeof *reports);
  cJSON **recs = NULL;
  int n = 0, rc = RC_EXIT_FAIL, ok = 0;
  double total = 0;
  const char *manifest_hash = NULL;
  if (!reports) return cli_fail(&e);
  for (int i = 0; i < a->n_merge; i++)
    if (rc_path_same_file(a->report, a->merge_dirs[i])) {
      rc_err_set(&e, RC_ERR_INVALID, "--report %s is the report folder %s being merged: refusing to overwrite an input",
               a->report, a->merge_dirs[i]);
      goto out;
    }
  for (int i = 0; i < a->n_merge; i++) {
    if (cli_report_read(a->merge_dirs[i], &reports[i], &e) != RC_OK) goto out;
    const cJSON *meta = cJSON_GetObjectItemCaseSensitive(reports[i], "meta");
    const cJSON *h = cJSON_GetObjectItemCaseSensitive(meta, "manifest_sha256");
    if (!cJSON_IsString(h)) {
      rc_err_set(&e, RC_ERR_FORMAT, "%s/report.json: no manifest_sha256 in \"meta\"", a->merge_dirs[i]);
      goto out;
    }
    if (manifest_hash && strcmp(manifest_hash, h->valuestring)) {
      rc_err_set(&e, RC_ERR_INVALID, "%s/report.json comes from another manifest than %s/report.json",
               a->merge_dirs[i], a->merge_dirs[0]);
      goto out;
    }
    manifest_hash = h->valuestring;
    total = cJSON_GetObjectItemCaseSensitive(meta, "total_jobs") ? cJSON_GetObjectItemCaseSensitive(meta, "total_jobs")->valuedouble : 0;
    n += cJSON_GetArraySize(cJSON_GetObjectItemCaseSensitive(reports[i], "jobs"));
  }
  recs = calloc((size_t)n + 1, sizeof *recs);
  if (!recs) {
    rc_err_set(&e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  int k = 0;
  for (int i = 0; i < a->n_merge; i++) {
    const cJSON *r;
    cJSON_ArrayForEach(r, cJSON_GetObjectItemCaseSensitive(reports[i], "jobs")) {
      const cJSON *name = cJSON_GetObjectItemCaseSensitive(r, "name");
      if (!cJSON_IsString(name) || !cJSON_IsNumber(cJSON_GetObjectItemCaseSensitive(r, "index"))) {
        rc_err_set(&e, RC_ERR_FORMAT, "%s/report.json: a job without name or index", a->merge_dirs[i]);
        goto out;
      }
      for (int q = 0; q < k; q++)
        if (!strcmp(cJSON_GetObjectItemCaseSensitive(recs[q], "name")->valuestring, name->valuestring)) {
          rc_err_set(&e, RC_ERR_INVALID, "job '%s' appears in more than one report (%s among them)", name->valuestring,
                   a->merge_dirs[i]);
          goto out;
        }
      recs[k++] = (cJSON *)r;
    }
  }
  qsort(recs, (size_t)n, sizeof *recs, by_index);
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    cJSON_AddItemToArray(arr, cJSON_Duplicate(recs[i], 1));
    ok += !strcmp(cJSON_GetObjectItemCaseSensitive(recs[i], "status")->valuestring, CLI_JOB_OK);
  }
  cJSON *meta = cJSON_Duplicate(cJSON_GetObjectItemCaseSensitive(reports[0], "meta"), 1);
  cJSON_ReplaceItemInObjectCaseSensitive(meta, "shard", cJSON_CreateString("merged"));
  rc_status s = cli_report_prepare(a->report, 1, &e);
  if (s == RC_OK) s = cli_report_write(a->report, meta, arr, &e);
  if (s == RC_OK) {
    if (a->json) cli_batch_print_json(meta, arr);
    else cli_batch_print_summary(arr, a->report);
    if (n < (int)total)
      fprintf(stderr, "recoup batch: the reports hold %d of the manifest's %.0f jobs: a shard is missing\n", n, total);
    rc = ok == n && n >= (int)total ? RC_EXIT_OK : RC_EXIT_FAIL;
  }
  cJSON_Delete(arr);
  cJSON_Delete(meta);
out:
  if (e.code) cli_fail(&e);
  for (int i = 0; i < a->n_merge; i++) cJSON_Delete(reports[i]);
  free(reports);
  free(recs);
  return rc;
}
