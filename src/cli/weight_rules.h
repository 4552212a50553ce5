/* The per-weight facts distill reports: what its zeros meant and, for a
 * quantized weight, its integer range and where the range came from. */
#ifndef RC_CLI_WEIGHT_RULES_H
#define RC_CLI_WEIGHT_RULES_H

#include <cJSON.h>

#include "recoup/distill.h"
#include "recoup/rules.h"

/* {"zeros": "pruned"|"trainable", "rule", "at_zero", "beside_zero"} */
cJSON *cli_mask_json(const rc_mask_choice *m);
/* {"min", "max", "source", "used_min", "used_max"} */
cJSON *cli_range_json(const rc_int_range *r);
/* "[-7, 7] recorded" into buf. */
const char *cli_range_text(const rc_int_range *r, char *buf, size_t n);
/* "pruned (excess: 120 at zero, 8 beside)" into buf. */
const char *cli_mask_text(const rc_mask_choice *m, char *buf, size_t n);

cJSON *cli_weight_rules_json(const rc_distill_tensor_rule *r, int n);
void cli_weight_rules_print(const rc_distill_tensor_rule *r, int n);

#endif
