/* Distillation checkpoints: the training loop's state written so that any
 * build of recoup, on any little- or big-endian machine, can continue it.
 *
 * The file is an .npz (a zip of NumPy .npy members, written by the data
 * module): member "header" is a uint8 array holding a JSON document (format
 * name and version, run fingerprint, loop position, learning-rate state,
 * rollback count, history and loss trace, the list of arrays); the parameter
 * store's state follows as float32 ("<f4") arrays named as the store names
 * them. Every member carries the zip CRC-32, checked on reading. DEVELOPERS.md
 * documents the fields. Nothing in the file depends on how a compiler lays
 * out a struct. */
#ifndef RC_TRAIN_CHECKPOINT_H
#define RC_TRAIN_CHECKPOINT_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"
#include "train/distill.h"
#include "train/evaluate.h"
#include "train/params.h"

/* The version this build writes and the only one it reads. Versions 1 and 2
 * were raw images of in-memory structs ("recoup-ckpt-v1/v2" magic); version
 * 3 had the same fields but a run fingerprint that did not cover the
 * teacher's weights and the training data (the teacher's outputs were then
 * all computed before training and hashed instead); version 4 hashed every
 * byte of the training data, where 5 hashes each array's size and, above
 * 8 MiB, a sample of its bytes. */
#define RC_CKPT_VERSION 5

/* Everything the loop needs to continue exactly where it stopped. */
typedef struct loop_state {
#ifdef RECOUP_CKPT_TEST_PAD
  /* Test builds only: moves every field, so a checkpoint written by the
   * normal build must still resume here (tests/checkpoint_test.py). */
  char test_pad[24];
#endif
  int64_t step;        /* optimizer steps taken (rolled-back steps count too) */
  int64_t epoch;       /* current epoch, 0-based */
  int64_t batch;       /* next batch within the epoch */
  int64_t ep_steps;
  double ep_loss;
  double lr_scale;
  int64_t rollbacks, stopped;
  int64_t best_epoch;
  int64_t n_epochs;    /* history entries */
  rc_metrics best;
  /* The loss trace (rc_distill_result), kept here so checkpoints carry it. */
  int64_t trace_step[RC_DISTILL_TRACE_MAX];
  double trace_loss[RC_DISTILL_TRACE_MAX];
  int64_t n_trace, window_steps;
  double window_loss;
} loop_state;

/* What a checkpoint must agree with to be resumed by this run. */
typedef struct rc_ckpt_run {
  uint64_t fingerprint; /* rc__ckpt_fingerprint_* over the run's identity */
  uint64_t seed;        /* the data order's seed (epoch e shuffles with stream e) */
  int64_t max_epochs;   /* history capacity */
} rc_ckpt_run;

/* Write the state to path atomically; an existing path is kept as path.1
 * (hard link, so path exists at every instant). */
rc_status rc__ckpt_write(const char *path, const rc_ckpt_run *run, const loop_state *ls,
                         const double *epoch_loss, const rc_metrics *epoch_val, rc_params *ps, rc_err *e);

/* Read path into ls, the history (max_epochs entries of room) and the store.
 * Refuses a raw-struct checkpoint of an earlier recoup, a foreign file, a
 * damaged one and one of another run, naming the file and the reason. */
rc_status rc__ckpt_read(const char *path, const rc_ckpt_run *run, loop_state *ls, double *epoch_loss,
                        rc_metrics *epoch_val, rc_params *ps, rc_err *e);

/* FNV-1a over values in a fixed byte order (little-endian), so that the
 * fingerprint of a run is the same on every build and machine. */
#define RC_CKPT_FP_INIT 1469598103934665603ull
uint64_t rc__ckpt_fp_i64(uint64_t h, const int64_t *v, size_t n);
uint64_t rc__ckpt_fp_f64(uint64_t h, const double *v, size_t n);
uint64_t rc__ckpt_fp_f32(uint64_t h, const float *v, size_t n);
/* Raw bytes (names, float data whose byte order is the file's little-endian one). */
uint64_t rc__ckpt_fp_bytes(uint64_t h, const void *p, size_t n);

#endif
