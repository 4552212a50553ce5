/* The flat parameter store. Blocks are carved from one allocation, each entry
 * aligned to 64 bytes so kernels reading a weight through the plan get
 * aligned data; padding floats stay zero in every block. */
#include "train/params.h"

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"

#define ALIGN_FLOATS 16
#define N_BLOCKS 4

typedef struct snapshot {
  float *mem;       /* values, then moments if with_moments */
  int with_moments;
  int saved;
  int64_t steps;
} snapshot;

struct rc_params {
  int n, cap;
  rc_param_entry *entries;
  const float **init; /* per entry, read at finalize */
  size_t total;
  int n_moments;
  void *mem;                 /* the allocation behind blocks[] */
  float *blocks[N_BLOCKS];   /* value, grad, moment1, moment2 (NULL if absent) */
  uint8_t *mask_mem;
  int64_t steps;
  int n_snap;
  snapshot *snaps;
};

rc_status rc_params_init(rc_params **out, rc_err *e) {
  rc_params *ps = rc__calloc(1, sizeof *ps);
  if (!ps) return rc__fail(e, RC_ERR_NOMEM, "parameter store: out of memory");
  *out = ps;
  return RC_OK;
}

void rc_params_free(rc_params *ps) {
  if (!ps) return;
  for (int i = 0; i < ps->n; i++) rc__free((char *)ps->entries[i].name);
  for (int i = 0; i < ps->n_snap; i++) rc__free(ps->snaps[i].mem);
  rc__free(ps->snaps);
  rc__free(ps->entries);
  rc__free(ps->init);
  rc__free(ps->mem);
  rc__free(ps->mask_mem);
  rc__free(ps);
}

static rc_status grow_entries(rc_params *ps, rc_err *e) {
  int cap = ps->cap ? ps->cap * 2 : 32;
  rc_param_entry *ne = rc__realloc(ps->entries, (size_t)cap * sizeof *ne);
  if (!ne) return rc__fail(e, RC_ERR_NOMEM, "parameter store: out of memory");
  ps->entries = ne;
  const float **ni = rc__realloc(ps->init, (size_t)cap * sizeof *ni);
  if (!ni) return rc__fail(e, RC_ERR_NOMEM, "parameter store: out of memory");
  ps->init = ni;
  ps->cap = cap;
  return RC_OK;
}

rc_status rc_params_add(rc_params *ps, int *index, const char *name, int64_t numel,
                        const float *init, unsigned flags, rc_err *e) {
  const char *label = name ? name : "(unnamed)";
  if (ps->mem)
    return rc__fail(e, RC_ERR_INVALID, "parameter '%s': store already finalized", label);
  if (numel < 1)
    return rc__fail(e, RC_ERR_SHAPE, "parameter '%s': size %lld must be >= 1", label,
                    (long long)numel);
  /* Every block holds total floats; keep total * 4 blocks * 4 bytes and the
   * snapshots far from size_t overflow. */
  size_t padded = ((size_t)numel + ALIGN_FLOATS - 1) / ALIGN_FLOATS * ALIGN_FLOATS;
  if ((uint64_t)numel > ((uint64_t)1 << 40) || ps->total + padded > ((size_t)1 << 40))
    return rc__fail(e, RC_ERR_LIMIT, "parameter '%s': %lld floats exceed the store's limit",
                    label, (long long)numel);
  if (ps->n == ps->cap) RC_TRY(grow_entries(ps, e));
  char *copy = rc__strdup(label);
  if (!copy) return rc__fail(e, RC_ERR_NOMEM, "parameter '%s': out of memory", label);
  rc_param_entry *en = &ps->entries[ps->n];
  memset(en, 0, sizeof *en);
  en->name = copy;
  en->numel = numel;
  en->offset = ps->total;
  en->flags = flags;
  ps->init[ps->n] = init;
  ps->total += padded;
  if (index) *index = ps->n;
  ps->n++;
  return RC_OK;
}

rc_status rc_params_finalize(rc_params *ps, int n_moments, rc_err *e) {
  if (ps->mem) return rc__fail(e, RC_ERR_INVALID, "parameter store: finalized twice");
  if (n_moments < 0 || n_moments > 2)
    return rc__fail(e, RC_ERR_INVALID, "parameter store: %d moment blocks requested (0..2)",
                    n_moments);
  size_t total = ps->total ? ps->total : ALIGN_FLOATS;
  size_t floats, bytes;
  if (!rc__mul_size(total, (size_t)(2 + n_moments), &floats) ||
      !rc__mul_size(floats, sizeof(float), &bytes) || bytes > SIZE_MAX - 64)
    return rc__fail(e, RC_ERR_LIMIT, "parameter store: %zu floats do not fit in memory", total);
  void *mem = rc__calloc(1, bytes + 64);
  if (!mem)
    return rc__fail(e, RC_ERR_NOMEM, "parameter store: out of memory allocating %zu bytes",
                    bytes);
  float *base = (float *)(((uintptr_t)mem + 63) & ~(uintptr_t)63);
  ps->mem = mem;
  ps->n_moments = n_moments;
  for (int b = 0; b < 2 + n_moments; b++) ps->blocks[b] = base + (size_t)b * total;
  for (int i = 0; i < ps->n; i++)
    if (ps->init[i])
      memcpy(ps->blocks[RC_BLOCK_VALUE] + ps->entries[i].offset, ps->init[i],
             (size_t)ps->entries[i].numel * sizeof(float));
  return RC_OK;
}

int rc_params_count(const rc_params *ps) { return ps->n; }
size_t rc_params_total(const rc_params *ps) { return ps->total; }
int rc_params_moments(const rc_params *ps) { return ps->n_moments; }

const rc_param_entry *rc_params_entry(const rc_params *ps, int i) {
  return i >= 0 && i < ps->n ? &ps->entries[i] : NULL;
}

int rc_params_find(const rc_params *ps, const char *name) {
  for (int i = 0; i < ps->n; i++)
    if (!strcmp(ps->entries[i].name, name)) return i;
  return -1;
}

float *rc_params_block(rc_params *ps, rc_param_block b, int i) {
  if ((int)b < 0 || (int)b >= N_BLOCKS || !ps->blocks[b] || i >= ps->n) return NULL;
  return i < 0 ? ps->blocks[b] : ps->blocks[b] + ps->entries[i].offset;
}

float *rc_params_value(rc_params *ps, int i) { return rc_params_block(ps, RC_BLOCK_VALUE, i); }
float *rc_params_grad(rc_params *ps, int i) { return rc_params_block(ps, RC_BLOCK_GRAD, i); }

void rc_params_zero_grad(rc_params *ps) {
  if (ps->blocks[RC_BLOCK_GRAD]) memset(ps->blocks[RC_BLOCK_GRAD], 0, ps->total * sizeof(float));
}

int64_t rc_params_steps(const rc_params *ps) { return ps->steps; }
void rc_params_set_steps(rc_params *ps, int64_t steps) { ps->steps = steps; }

rc_status rc_params_build_masks(rc_params *ps, rc_err *e) {
  if (!ps->mem) return rc__fail(e, RC_ERR_INVALID, "parameter masks: store not finalized");
  if (ps->mask_mem) return rc__fail(e, RC_ERR_INVALID, "parameter masks: built twice");
  const float *val = ps->blocks[RC_BLOCK_VALUE];
  size_t bytes = 0;
  for (int i = 0; i < ps->n; i++) {
    rc_param_entry *en = &ps->entries[i];
    en->n_frozen = 0;
    if (!(en->flags & RC_PARAM_KEEP_ZEROS)) continue;
    const float *v = val + en->offset;
    for (int64_t j = 0; j < en->numel; j++) en->n_frozen += v[j] == 0.0f;
    if (en->n_frozen) bytes += (size_t)en->numel;
  }
  if (!bytes) return RC_OK;
  ps->mask_mem = rc__malloc(bytes);
  if (!ps->mask_mem)
    return rc__fail(e, RC_ERR_NOMEM, "parameter masks: out of memory allocating %zu bytes", bytes);
  uint8_t *m = ps->mask_mem;
  for (int i = 0; i < ps->n; i++) {
    rc_param_entry *en = &ps->entries[i];
    if (!en->n_frozen) continue;
    const float *v = val + en->offset;
    for (int64_t j = 0; j < en->numel; j++) m[j] = v[j] != 0.0f;
    en->mask = m;
    m += en->numel;
  }
  return RC_OK;
}

int rc_params_mask_intact(const rc_params *ps, int *entry, int64_t *pos) {
  const float *val = ps->blocks[RC_BLOCK_VALUE];
  for (int i = 0; i < ps->n; i++) {
    const rc_param_entry *en = &ps->entries[i];
    if (!en->mask) continue;
    const float *v = val + en->offset;
    for (int64_t j = 0; j < en->numel; j++)
      if (!en->mask[j] && v[j] != 0.0f) {
        if (entry) *entry = i;
        if (pos) *pos = j;
        return 0;
      }
  }
  return 1;
}

int rc_params_all_finite(const rc_params *ps, rc_param_block b, int *entry, int64_t *pos) {
  if ((int)b < 0 || (int)b >= N_BLOCKS || !ps->blocks[b]) return 1;
  const float *blk = ps->blocks[b];
  for (int i = 0; i < ps->n; i++) {
    const float *v = blk + ps->entries[i].offset;
    int64_t n = ps->entries[i].numel;
    /* Cheap vectorisable pass first: v * 0 is exactly 0 for finite v and NaN
     * for inf or NaN, so acc stays 0 unless something is non-finite. */
    float acc = 0.0f;
    for (int64_t j = 0; j < n; j++) acc += v[j] * 0.0f;
    if (acc == 0.0f) continue;
    for (int64_t j = 0; j < n; j++)
      if (!isfinite(v[j])) {
        if (entry) *entry = i;
        if (pos) *pos = j;
        return 0;
      }
  }
  return 1;
}

/* Floats a snapshot slot holds. */
static size_t snapshot_floats(const rc_params *ps, int with_moments) {
  return ps->total * (size_t)(1 + (with_moments ? ps->n_moments : 0));
}

rc_status rc_params_add_snapshot(rc_params *ps, int *slot, int with_moments, rc_err *e) {
  if (!ps->mem) return rc__fail(e, RC_ERR_INVALID, "parameter snapshot: store not finalized");
  size_t bytes;
  if (!rc__mul_size(snapshot_floats(ps, with_moments), sizeof(float), &bytes))
    return rc__fail(e, RC_ERR_LIMIT, "parameter snapshot: size overflows");
  snapshot *ns = rc__realloc(ps->snaps, (size_t)(ps->n_snap + 1) * sizeof *ns);
  if (!ns) return rc__fail(e, RC_ERR_NOMEM, "parameter snapshot: out of memory");
  ps->snaps = ns;
  float *mem = rc__malloc(bytes);
  if (!mem)
    return rc__fail(e, RC_ERR_NOMEM, "parameter snapshot: out of memory allocating %zu bytes",
                    bytes);
  ns[ps->n_snap] = (snapshot){mem, with_moments != 0, 0, 0};
  if (slot) *slot = ps->n_snap;
  ps->n_snap++;
  return RC_OK;
}

static rc_status check_slot(const rc_params *ps, int slot, rc_err *e) {
  if (slot < 0 || slot >= ps->n_snap)
    return rc__fail(e, RC_ERR_INVALID, "parameter snapshot: no slot %d", slot);
  return RC_OK;
}

rc_status rc_params_save(rc_params *ps, int slot, rc_err *e) {
  RC_TRY(check_slot(ps, slot, e));
  snapshot *s = &ps->snaps[slot];
  size_t nb = ps->total * sizeof(float);
  memcpy(s->mem, ps->blocks[RC_BLOCK_VALUE], nb);
  if (s->with_moments)
    for (int m = 0; m < ps->n_moments; m++)
      memcpy(s->mem + (size_t)(m + 1) * ps->total, ps->blocks[RC_BLOCK_MOMENT1 + m], nb);
  s->steps = ps->steps;
  s->saved = 1;
  return RC_OK;
}

rc_status rc_params_restore(rc_params *ps, int slot, rc_err *e) {
  RC_TRY(check_slot(ps, slot, e));
  snapshot *s = &ps->snaps[slot];
  if (!s->saved) return rc__fail(e, RC_ERR_INVALID, "parameter snapshot: slot %d never saved", slot);
  size_t nb = ps->total * sizeof(float);
  memcpy(ps->blocks[RC_BLOCK_VALUE], s->mem, nb);
  if (s->with_moments) {
    for (int m = 0; m < ps->n_moments; m++)
      memcpy(ps->blocks[RC_BLOCK_MOMENT1 + m], s->mem + (size_t)(m + 1) * ps->total, nb);
    ps->steps = s->steps;
  }
  rc_params_zero_grad(ps);
  return RC_OK;
}

/* ---- State as named arrays (checkpoints) -----------------------------------
 * Array 0 is the values, 1..n_moments the moments, then per snapshot slot its
 * values and, for slots with moments, its moments: each rc_params_total()
 * floats in the store's layout (entries at 16-float offsets, zero padding). */

static const char *const BLOCK_NAMES[] = {"value", "moment1", "moment2"};

int rc_params_state_count(const rc_params *ps) {
  int n = 1 + ps->n_moments;
  for (int i = 0; i < ps->n_snap; i++) n += 1 + (ps->snaps[i].with_moments ? ps->n_moments : 0);
  return n;
}

float *rc_params_state_array(rc_params *ps, int i, char *name, size_t cap) {
  if (i < 0) return NULL;
  if (i <= ps->n_moments) {
    snprintf(name, cap, "param.%s", BLOCK_NAMES[i]);
    return i == 0 ? ps->blocks[RC_BLOCK_VALUE] : ps->blocks[RC_BLOCK_MOMENT1 + i - 1];
  }
  i -= 1 + ps->n_moments;
  for (int k = 0; k < ps->n_snap; k++) {
    int parts = 1 + (ps->snaps[k].with_moments ? ps->n_moments : 0);
    if (i < parts) {
      snprintf(name, cap, "snapshot%d.%s", k, BLOCK_NAMES[i]);
      return ps->snaps[k].mem + (size_t)i * ps->total;
    }
    i -= parts;
  }
  return NULL;
}

int rc_params_snapshot_count(const rc_params *ps) { return ps->n_snap; }

void rc_params_snapshot_state(const rc_params *ps, int slot, int *saved, int64_t *steps) {
  *saved = ps->snaps[slot].saved;
  *steps = ps->snaps[slot].steps;
}

void rc_params_snapshot_set_state(rc_params *ps, int slot, int saved, int64_t steps) {
  ps->snaps[slot].saved = saved != 0;
  ps->snaps[slot].steps = steps;
}
