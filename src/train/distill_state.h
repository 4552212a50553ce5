/* The state distill's run shares with its parts: the loop and setup
 * (distill.c), the teacher's rows of each step (teacher_rows.c) and the
 * augmentation of each step's batch (distill_augment.c). Internal to
 * src/train. */
#ifndef RC_TRAIN_DISTILL_STATE_H
#define RC_TRAIN_DISTILL_STATE_H

#include <stdint.h>

#include "core/status.h"
#include "data/augment.h"
#include "data/spill.h"
#include "plan/plan.h"
#include "train/batch_source.h"
#include "train/dist_grads.h"
#include "train/dist_stats.h"
#include "train/distill.h"
#include "train/features.h"
#include "train/outputs.h"
#include "train/params.h"
#include "train/qat.h"

typedef struct trainable {
  int value;
  unsigned flags;
  int entry;
  void *orig; /* the graph's own buffer, restored at the end */
} trainable;

typedef struct run_state {
  const rc_distill_config *c;
  rc_model *teacher, *student;
  rc_graph *sg;
  trainable *tr;
  int n_tr;
  int *bn_nodes;      /* BatchNormalization nodes of the student */
  int n_bn;
  rc_params *ps;
  unsigned char *trainable_mask; /* per student value */
  rc_plan *train_plan, *eval_plan, *teacher_plan;
  /* Per student value: the kept positions of pruned weights, built once and
   * shared by every student plan of the run (ops/sparse.h); in patterns_mem. */
  const rc__wpattern **patterns;
  rc_arena patterns_mem;
  /* eval_plan and teacher_plan keep what the layer table reads, so its
   * passes run through them (train/measure.h) */
  int measure_shared;
  int64_t batch, k;
  rc_dataset train, val;
  float *teacher_logits;     /* per training-pool sample (N_pool, K), in teacher_cache */
  rc_spill teacher_cache;    /* memory, or a mapped file past config cache_bytes */
  unsigned char *teacher_have; /* per pool sample: its row of teacher_logits is computed */
  int64_t teacher_cached;      /* how many are */
  rc_augment aug;              /* transforms of every training batch (data/augment.h) */
  int augmenting;              /* any: the teacher runs on every batch, nothing is cached */
  float *teacher_val_logits; /* (n_val, K) */
  float *val_logits;
  const int32_t *val_labels;
  rc_data_split split;
  int own_val;               /* val is a separate dataset */
  rc_qat qat;                /* QDQ sites rewritten for training on their grids */
  rc_features *feat;         /* feature-level terms, NULL when only logits are matched */
  rc_plan *teacher_step;     /* teacher run every step for inner tensors */
  rc_outputs *outs;          /* per-output losses, NULL: the logit terms */
  const rc_output_side *train_side, *val_side;
  unsigned char *tkeep, *skeep;
  int projectors_started;    /* least-squares start done (or a resumed run) */
  rc_distill_tensor_rule *rules; /* per trained weight, moved to the result */
  int *rule_value;               /* the store's value of each rule */
  int n_rules;
  /* Under MPI (train/dist.h) each rank trains on rows [offset, offset +
   * local) of every global batch; alone, offset 0 and local = batch. */
  int64_t local, offset;
  rc_grad_sync sync;
  rc_dist_stats stats; /* batch statistics summed over the ranks (--bn train) */
} run_state;

typedef struct step_buffers {
  void *in[RC_DATASET_MAX_INPUTS];
  int32_t *labels;
  float *teacher;   /* (B, K) rows of the cached teacher logits */
  int64_t *samples; /* the batch's sample numbers (per-output side data) */
  double *bn_scratch; /* per-channel sums for --bn train */
  float lr;           /* the last step's learning rate, for progress */
  /* Augmentation: the batch's mixing, its partners (global batch
   * positions), their rows and labels, and one plane of scratch. */
  rc_augment_mix mix;
  int64_t *partner, *partner_order;
  float *mix_rows, *aug_work;
  int32_t *partner_labels;
  /* Lazy teacher passes: per row of the teacher's plan, the training
   * position it reads and the sample it caches (-1: none). */
  int64_t *slot_pos, *slot_sample;
  rc__batch_source source;
} step_buffers;

/* The teacher's rows for this rank's part of batch b (of spe per epoch)
 * into sb->teacher: from the cache, filled as steps first draw samples, or,
 * with augmentation, computed on the augmented batch itself. */
rc_status rc__distill_teacher_rows(run_state *st, step_buffers *sb, int64_t b, int64_t spe, rc_err *e);

/* --augment: parsed, checked against the student's input and the run's
 * side data, and announced in r. */
rc_status rc__distill_setup_augment(run_state *st, const rc_distill_data *d, rc_distill_result *r, rc_err *e);
/* The buffers augmentation needs in sb (freed with the step's buffers). */
rc_status rc__distill_augment_buffers(const run_state *st, step_buffers *sb, rc_err *e);
/* Transform this rank's rows of batch b at optimizer step `step` in place. */
rc_status rc__distill_augment_batch(run_state *st, int64_t b, int64_t step, step_buffers *sb, rc_err *e);
/* Cross-entropy of a mixed batch: each label weighs with its mixing weight. */
rc_status rc__distill_mixed_cross_entropy(const run_state *st, const step_buffers *sb, float *grad, float w,
                                          const float *s, const int32_t *labels, double *ce, rc_err *e);

#endif
