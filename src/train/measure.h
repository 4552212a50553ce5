/* What distill measures inside the two models on the validation samples,
 * before and after training:
 * - per paired layer output, the signal-to-noise ratio of the student's
 *   activations against the dense model's, 10·log10(Σt² / Σ(t−s)²) in dB,
 *   over every validation sample up to a cap (partial batches included);
 *   a student tensor that enters a QuantizeLinear→DequantizeLinear pair is
 *   measured after the pair, as the next layer (or the deployed output)
 *   sees it;
 * - per activation grid of a QDQ student, how many values entering its
 *   QuantizeLinear lie outside the range the grid can represent (the clamp
 *   hides them from the outputs).
 * Under MPI the samples are shared out in whole batches, each rank measures
 * its own and the sums are reduced, so every rank ends with the figures of
 * one process over all of them. */
#ifndef RC_TRAIN_MEASURE_H
#define RC_TRAIN_MEASURE_H

#include <stdint.h>

#include "core/status.h"
#include "ir/ir.h"
#include "ops/sparse.h"
#include "plan/plan.h"
#include "recoup/data.h"
#include "train/dist.h"
#include "train/distill.h"
#include "train/pairing.h"
#include "train/qat.h"

/* Samples measured at most (the first ones of the validation set). */
#define RC_MEASURE_MAX_SAMPLES 1024

typedef struct rc_measure_setup {
  const rc_graph *teacher, *student;  /* the student as rewritten for training */
  const rc_tensor *student_shapes;    /* one per student input, dims[0] = batch */
  const rc_tensor *teacher_shapes;    /* one per teacher input, in its order */
  const rc_dataset *val;
  int64_t batch;
  const unsigned char *live;          /* per student value: changes during the run (never folded) */
  const rc_qat *qat;
  rc_dist *dist; /* the ranks sharing the work (NULL: one process) */
  const rc__wpattern *const *patterns; /* per student value or NULL (plan.h) */
  /* NULL, or the run's own inference plans at `batch` over the shapes above
   * that keep every value rc__measure_keep marks: the pass runs through
   * them instead of building (and first touching) two plans of its own. */
  rc_plan *teacher_plan, *student_plan;
} rc_measure_setup;

/* Pairs of equal shape, student side moved past its QDQ pair; fills
 * r->layers (names) and r->ranges (one per activation grid). */
rc_status rc__measure_prepare(const rc_measure_setup *m, rc_pairing *pg, rc_distill_result *r, rc_err *e);

/* Mark (set to 1) the teacher and student values the pass reads: the pairs'
 * tensors and the inputs of activation grids. */
void rc__measure_keep(const rc_measure_setup *m, const rc_pairing *pg, unsigned char *tkeep, unsigned char *skeep);

/* One pass over the validation samples; `after` selects which half of the
 * result's figures is filled. */
rc_status rc__measure_run(const rc_measure_setup *m, const rc_pairing *pg, rc_distill_result *r, int after,
                          rc_err *e);

#endif
