/* Batch manifests: a JSON file listing a zoo of distillation jobs.
 *
 *   {
 *     "title": "Garment classifiers, spring refresh",
 *     "defaults": { "epochs": 2, "scale": 0.00392, "val_split": 0.1, ... },
 *     "jobs": [
 *       { "name": "cnn_p90", "teacher": "dense.onnx", "student": "p90.onnx",
 *         "data": "train.npy", "out": "out/cnn_p90.onnx", "temperature": 2 },
 *       ...
 *     ]
 *   }
 *
 * Any `recoup distill` option may appear in "defaults" or in a job, keyed by
 * its long name without dashes and with '-' written '_' ("val_split" for
 * --val-split); a job's value replaces the default. Relative paths resolve
 * against the manifest's folder; absolute paths and paths that leave that
 * folder (by ".." or a symbolic link) are refused unless allow_outside. The
 * whole manifest is checked before any job runs; errors name the job and the
 * field. */
#ifndef RC_CLI_MANIFEST_H
#define RC_CLI_MANIFEST_H

#include "recoup/status.h"

typedef struct cli_job {
  int index;          /* position in the manifest's "jobs", 0-based */
  char *name;
  char *out;          /* resolved path of the recovered model */
  char *out_given;    /* as written in the manifest */
  char *teacher_given, *student_given;
  char **args;        /* `recoup distill` arguments, deterministic order */
  int n_args;
  char **inputs;      /* resolved paths of every input file */
  int n_inputs;
} cli_job;

typedef struct cli_manifest {
  char *path;         /* as given */
  char *dir;          /* the manifest's folder, resolved */
  char *title;        /* optional "title", or NULL */
  char sha256[65];    /* of the manifest file's bytes */
  cli_job *jobs;
  int n_jobs;
} cli_manifest;

rc_status cli_manifest_load(cli_manifest *m, const char *path, int allow_outside, rc_err *e);
void cli_manifest_free(cli_manifest *m);

#endif
