/* BatchNormalization running statistics of a student being distilled:
 * re-estimated once over the training samples (--bn recalibrate) or updated
 * after every training-mode step (--bn train). */
#ifndef RC_TRAIN_BN_STATS_H
#define RC_TRAIN_BN_STATS_H

#include <stdint.h>

#include "core/status.h"
#include "ir/ir.h"
#include "plan/plan.h"
#include "train/dist.h"
#include "recoup/data.h"

/* Re-estimate the running mean and variance of each listed
 * BatchNormalization node (indices into g->nodes) over every sample of
 * `train`, in batches of `batch`, writing them into g's initializers. */
rc_status rc__bn_recalibrate(const rc_graph *g, const int *bn_nodes, int n_bn, rc_dataset *train, int64_t batch,
                            rc_dist *dist, rc_err *e);

/* Doubles of scratch rc__bn_update_running needs for these nodes. */
size_t rc__bn_scratch_count(const rc_graph *g, rc_plan *train_plan, const int *bn_nodes, int n_bn);

/* Fold the batch statistics of the last training-mode forward of train_plan
 * into the running statistics. Under MPI the plan holds this rank's rows and
 * the sums are taken over every rank's, so all ranks update alike; scratch
 * holds rc__bn_scratch_count doubles. */
rc_status rc__bn_update_running(const rc_graph *g, rc_plan *train_plan, const int *bn_nodes, int n_bn,
                                double *scratch, rc_dist *dist, rc_err *e);

#endif
