/* Which validation state distill keeps: the one rule, in one place.
 *
 * The deciding figure is continuous, measured on the validation samples:
 * - without labels, the mean KL(dense || student) at T = 1;
 * - with labels, alpha·KL + (1 − alpha)·cross-entropy, the same mix of the
 *   dense model's distribution and the labels that training minimises
 *   (alpha as the run uses it, 0.9 by default with labels).
 * Lower is better; a state counts as better only when its figure is strictly
 * lower. Top-1 accuracy and agreement are reported beside it but never
 * decide: on a few hundred samples they move in steps of 1/n and can rise
 * while the output distributions drift away from the dense model's (e.g.
 * two more samples agree while the KL triples). */
#ifndef RC_TRAIN_SELECT_H
#define RC_TRAIN_SELECT_H

#include <stdint.h>

#include "train/evaluate.h"

/* The deciding figure of one validation pass (NaN when it cannot be formed). */
double rc__select_measure(const rc_metrics *m, double alpha);

/* 1 when `cand` beats `best` by the rule above. A NaN figure never wins. */
int rc__select_better(const rc_metrics *cand, const rc_metrics *best, double alpha);

/* The state the rule keeps from a recorded run: 0 for the input (measured as
 * `input`), i + 1 for history[i]. Epochs are compared in order, as the
 * training loop compares them. */
int64_t rc__select_best(const rc_metrics *input, const rc_metrics *history, int64_t n, double alpha);

/* Name of the deciding figure for reports: "kl" or "kl+cross_entropy". */
const char *rc__select_rule_name(const rc_metrics *m, double alpha);

#endif
