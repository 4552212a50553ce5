#include "cli/weight_rules.h"

#include <stdio.h>
#include <string.h>

#include "cli/cli.h"

cJSON *cli_mask_json(const rc_mask_choice *m) {
  cJSON *o = cJSON_CreateObject();
  cJSON_AddStringToObject(o, "zeros", m->keep_zeros ? "pruned" : "trainable");
  cJSON_AddStringToObject(o, "rule", m->rule ? m->rule : "");
  cJSON_AddNumberToObject(o, "at_zero", (double)m->at_zero);
  cJSON_AddNumberToObject(o, "beside_zero", (double)m->beside_zero);
  return o;
}

cJSON *cli_range_json(const rc_int_range *r) {
  cJSON *o = cJSON_CreateObject();
  cJSON_AddNumberToObject(o, "min", r->lo);
  cJSON_AddNumberToObject(o, "max", r->hi);
  cJSON_AddStringToObject(o, "source", rc_range_source_name(r->source));
  if (r->has_used) {
    cJSON_AddNumberToObject(o, "used_min", (double)r->used_lo);
    cJSON_AddNumberToObject(o, "used_max", (double)r->used_hi);
  }
  return o;
}

const char *cli_range_text(const rc_int_range *r, char *buf, size_t n) {
  snprintf(buf, n, "[%d, %d] %s", r->lo, r->hi, rc_range_source_name(r->source));
  return buf;
}

const char *cli_mask_text(const rc_mask_choice *m, char *buf, size_t n) {
  if (!m->at_zero) snprintf(buf, n, "no zeros");
  else if (m->beside_zero || !strcmp(m->rule, "excess") || !strcmp(m->rule, "rounding"))
    snprintf(buf, n, "%s (%s: %lld at zero, %lld beside)", m->keep_zeros ? "pruned" : "trainable", m->rule,
             (long long)m->at_zero, (long long)m->beside_zero);
  else snprintf(buf, n, "%s (%s: %lld at zero)", m->keep_zeros ? "pruned" : "trainable", m->rule, (long long)m->at_zero);
  return buf;
}

cJSON *cli_weight_rules_json(const rc_distill_tensor_rule *r, int n) {
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "tensor", r[i].name);
    cJSON_AddItemToObject(o, "mask", cli_mask_json(&r[i].mask));
    cJSON_AddNumberToObject(o, "frozen", (double)r[i].frozen);
    if (r[i].quantized) cJSON_AddItemToObject(o, "range", cli_range_json(&r[i].range));
    cJSON_AddItemToArray(arr, o);
  }
  return arr;
}

void cli_weight_rules_print(const rc_distill_tensor_rule *r, int n) {
  if (!n) return;
  printf("\nWeights: what their zeros meant (--mask) and integer ranges:\n");
  printf("  %-40s %-44s %s\n", "tensor", "zeros", "integer range");
  for (int i = 0; i < n; i++) {
    char m[160], rg[64];
    printf("  %-40s %-44s %s\n", r[i].name, cli_mask_text(&r[i].mask, m, sizeof m),
           r[i].quantized ? cli_range_text(&r[i].range, rg, sizeof rg) : "float");
  }
}
