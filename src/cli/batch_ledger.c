/* recoup batch: the resume ledger, a JSON state file of finished jobs with
 * the hash of their outputs and settings, locked while a batch runs. */
#define _POSIX_C_SOURCE 200809L /* O_CLOEXEC */
#include <cJSON.h>
#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/file.h>
#include <unistd.h>

#include "cli/batch.h"
#include "cli/sha256.h"
#include "recoup/util.h"

/* Settings fingerprint: the job's distill arguments with the manifest folder
 * written as "." so a moved zoo still matches. */
static void job_fingerprint(const cli_manifest *m, const cli_job *j, char hex[65]) {
  cli_sha256 h;
  cli_sha256_init(&h);
  size_t dl = strlen(m->dir);
  for (int i = 0; i < j->n_args; i++) {
    const char *s = j->args[i];
    const char *at = strstr(s, m->dir);
    if (at && (at[dl] == '/' || at[dl] == '\0')) {
      cli_sha256_update(&h, s, (size_t)(at - s));
      cli_sha256_update(&h, ".", 1);
      s = at + dl;
    }
    cli_sha256_update(&h, s, strlen(s) + 1);
  }
  cli_sha256_hex(&h, hex);
}

rc_status cli_batch_load_state(batch *b, rc_err *e) {
  FILE *f = fopen(b->state_path, "rb");
  if (!f) {
    if (errno != ENOENT) return rc_err_set(e, RC_ERR_IO, "%s: %s", b->state_path, strerror(errno));
    b->state = cJSON_CreateObject();
    cJSON_AddNumberToObject(b->state, "version", 1);
    cJSON_AddObjectToObject(b->state, "jobs");
    return RC_OK;
  }
  fseek(f, 0, SEEK_END);
  long n = ftell(f);
  rewind(f);
  char *text = n >= 0 && n < (64L << 20) ? malloc((size_t)n + 1) : NULL;
  size_t got = text ? fread(text, 1, (size_t)n, f) : 0;
  fclose(f);
  if (!text || got != (size_t)n) {
    free(text);
    return rc_err_set(e, RC_ERR_IO, "%s: cannot read", b->state_path);
  }
  text[n] = '\0';
  b->state = cJSON_Parse(text);
  free(text);
  if (!b->state || !cJSON_IsObject(cJSON_GetObjectItemCaseSensitive(b->state, "jobs")))
    return rc_err_set(e, RC_ERR_FORMAT, "%s: not a recoup batch state file (remove it to start afresh)",
                    b->state_path);
  return RC_OK;
}

rc_status cli_batch_save_state(batch *b, rc_err *e) {
  char *text = cJSON_Print(b->state);
  if (!text) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  rc_status s = rc_file_write_atomic(b->state_path, text, strlen(text), e);
  free(text);
  return s;
}

rc_status cli_batch_lock_state(batch *b, rc_err *e) {
  char path[PATH_MAX + 8];
  snprintf(path, sizeof path, "%s.lock", b->state_path);
  int fd = open(path, O_RDWR | O_CREAT | O_CLOEXEC, 0644);
  if (fd < 0) return rc_err_set(e, RC_ERR_IO, "%s: %s", path, strerror(errno));
  if (flock(fd, LOCK_EX | LOCK_NB) != 0) {
    close(fd);
    return rc_err_set(e, RC_ERR_IO, "%s is in use by another recoup batch (one batch per report folder)",
                    b->state_path);
  }
  return RC_OK; /* held until exit */
}

/* A finished job may be skipped when its output still has the recorded bytes
 * and its settings are unchanged. */
cJSON *cli_batch_reusable_record(batch *b, run *r) {
  const cJSON *jobs = cJSON_GetObjectItemCaseSensitive(b->state, "jobs");
  const cJSON *s = cJSON_GetObjectItemCaseSensitive(jobs, r->job->name);
  if (!s) return NULL;
  const cJSON *hash = cJSON_GetObjectItemCaseSensitive(s, "sha256");
  const cJSON *fp = cJSON_GetObjectItemCaseSensitive(s, "settings_sha256");
  const cJSON *rec = cJSON_GetObjectItemCaseSensitive(s, "record");
  if (!cJSON_IsString(hash) || !cJSON_IsString(fp) || !cJSON_IsObject(rec)) return NULL;
  char now[65], fph[65];
  job_fingerprint(&b->m, r->job, fph);
  rc_err e = {0};
  if (strcmp(fph, fp->valuestring) || cli_sha256_file(r->job->out, now, &e) != RC_OK ||
      strcmp(now, hash->valuestring))
    return NULL;
  return cJSON_Duplicate(rec, 1);
}

void cli_batch_forget_job(batch *b, const char *name) {
  cJSON_DeleteItemFromObjectCaseSensitive(cJSON_GetObjectItemCaseSensitive(b->state, "jobs"), name);
}

rc_status cli_batch_remember_job(batch *b, run *r, rc_err *e) {
  char hash[65], fp[65];
  RC_TRY(cli_sha256_file(r->job->out, hash, e));
  job_fingerprint(&b->m, r->job, fp);
  cli_batch_forget_job(b, r->job->name);
  cJSON *s = cJSON_CreateObject();
  cJSON_AddStringToObject(s, "out", r->job->out_given);
  cJSON_AddStringToObject(s, "sha256", hash);
  cJSON_AddStringToObject(s, "settings_sha256", fp);
  cJSON_AddItemToObject(s, "record", cJSON_Duplicate(r->record, 1));
  cJSON_AddItemToObject(cJSON_GetObjectItemCaseSensitive(b->state, "jobs"), r->job->name, s);
  return cli_batch_save_state(b, e);
}
