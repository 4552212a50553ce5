/* What a quantized student's integers may be, and where zeros mean pruned.
 *
 * A grid's integer range is part of the grid, like its scale and zero point:
 * training keeps every integer inside it. Where the range comes from, first
 * match wins:
 *   dtype     int4/uint4 tensors, int32 biases and activation grids (the
 *             integers exist only at run time): the dtype's own range;
 *   recorded  the file's RC_RANGES_METADATA entry names the tensor (written
 *             by `recoup quantize`);
 *   observed  any other integer initializer, and a float weight's integers
 *             (QuantizeLinear on an initializer): the narrowest common range
 *             holding every integer the tensor uses, over the whole tensor
 *             (a per-axis grid's channels share one stored width):
 *             signed, the smallest width b with all values in
 *             [-2^(b-1), 2^(b-1)-1], narrowed to [-(2^(b-1)-1), 2^(b-1)-1]
 *             when no value is -2^(b-1) (symmetric grids); unsigned, the
 *             smallest b with all values in [0, 2^b-1]. Never wider than
 *             what the file uses at the tensor's width.
 *
 * Metadata of our own (ModelProto.metadata_props, JSON values):
 *   RC_RANGES_METADATA  {"schema": 1, "tensors": {"<integer initializer>":
 *                        {"min": -7, "max": 7, "from": "<float weight>"}}}
 *   RC_PRUNED_METADATA  {"schema": 1, "tensors": ["<float weight>", ...]}
 * "from" names the float weight a quantized tensor was made from, so a
 * pruned-then-quantized tensor is known as pruned. */
#ifndef RC_GRAPH_GRID_RANGE_H
#define RC_GRAPH_GRID_RANGE_H

#include <stdint.h>

#include "core/status.h"
#include "ir/ir.h"
#include "recoup/model.h"

#define RC_RANGES_METADATA "recoup.integer_ranges"
#define RC_PRUNED_METADATA "recoup.pruned"

/* rc_range_source and rc_int_range are public: recoup/model.h. */
const char *rc__range_source_name(rc_range_source s);

/* The parsed metadata of our own (either may be absent). */
typedef struct rc_file_notes {
  void *ranges;  /* cJSON object "tensors" of RC_RANGES_METADATA, or NULL */
  void *pruned;  /* cJSON array "tensors" of RC_PRUNED_METADATA, or NULL */
  void *roots[2];
} rc_file_notes;

/* Parse the two metadata values (NULL when the file has none); errors name
 * the file and the key. */
rc_status rc__file_notes_parse(rc_file_notes *n, const char *ranges_json, const char *pruned_json, const char *path,
                               rc_err *e);
void rc__file_notes_free(rc_file_notes *n);
/* The float weight a quantized tensor was made from (recorded), or NULL. */
const char *rc__file_notes_source(const rc_file_notes *n, const char *tensor);
/* 1 if the file says tensor (or the float weight it was made from) was pruned. */
int rc__file_notes_pruned(const rc_file_notes *n, const char *tensor);

/* Range of a grid on dtype dt. value: the integer initializer, or -1 for an
 * activation grid (name: the quantized tensor's name, may be NULL). A
 * recorded range must lie within the dtype and hold the tensor's integers. */
rc_status rc__grid_range(const rc_graph *g, const rc_file_notes *notes, int value, rc_dtype dt, const char *name,
                         rc_int_range *r, rc_err *e);

/* A float weight feeding QuantizeLinear node q: its integers are fixed by
 * the file all the same (round half to even of w / scale plus the zero
 * point, clamped to r's range), so r becomes the range they use (observed),
 * unless the dtype fixes the range. r holds the dtype's range on entry. */
void rc__grid_range_of_float_weight(const rc_graph *g, int q, rc_int_range *r);

/* The narrowest common range holding [used_lo, used_hi] on dtype dt (see above). */
void rc__range_observed(rc_dtype dt, int64_t used_lo, int64_t used_hi, int32_t *lo, int32_t *hi);

/* The initializer that value v is, directly or through Identity nodes; -1
 * when it is not a constant, with the reason written into why. */
int rc__constant_source(const rc_graph *g, int v, char *why, size_t n);

#endif
