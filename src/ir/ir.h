/* The graph IR: values, nodes with attributes, initializers. Built by the
 * ONNX reader (src/onnx), ordered and checked by rc__graph_order, its ops
 * bound by rc__graph_finalize and compiled for concrete input shapes by the
 * planner (plan/load.h, plan/plan.h). Everything a graph owns
 * lives in its arena and is freed at once. */
#ifndef RC_IR_IR_H
#define RC_IR_IR_H

#include <stdint.h>

#include "core/arena.h"
#include "core/status.h"
#include "recoup/tensor.h"

struct rc_op_def;

/* ONNX AttributeProto.AttributeType numbers. */
typedef enum rc_attr_type {
  RC_ATTR_UNDEFINED = 0,
  RC_ATTR_FLOAT = 1,
  RC_ATTR_INT = 2,
  RC_ATTR_STRING = 3,
  RC_ATTR_TENSOR = 4,
  RC_ATTR_GRAPH = 5,
  RC_ATTR_FLOATS = 6,
  RC_ATTR_INTS = 7,
  RC_ATTR_STRINGS = 8
} rc_attr_type;

typedef struct rc_attr {
  const char *name;
  rc_attr_type type;
  int64_t i;
  float f;
  const char *s;        /* STRING (NUL-terminated copy) */
  int n;                /* element count of ints / floats / strings */
  int64_t *ints;
  float *floats;
  const char **strings;
  rc_tensor t;          /* TENSOR: data decoded to native layout, in the graph arena */
} rc_attr;

typedef enum rc_value_kind {
  RC_VALUE_ACTIVATION = 0, /* produced by a node */
  RC_VALUE_INPUT = 1,      /* a graph input that is not an initializer */
  RC_VALUE_INITIALIZER = 2 /* data stored in the file */
} rc_value_kind;

typedef struct rc_value {
  const char *name;
  rc_value_kind kind;
  /* Inputs: dtype and declared shape, dims < 0 where symbolic or unknown
   * (decl.rank < 0 when the file gives no shape at all).
   * Initializers: dtype, shape and data decoded to native layout (int4/uint4
   * unpacked to one byte per element), owned by the graph arena. */
  rc_tensor decl;
  int producer;   /* index of the producing node, -1 for inputs and initializers */
  int init_index; /* position in the file's initializer list, -1 if none */
} rc_value;

typedef struct rc_node {
  const char *name;   /* as in the file, possibly "" */
  const char *label;  /* name if non-empty, else "<op_type>#<index>": for messages */
  const char *op_type;
  const char *domain; /* "" for the default domain */
  int opset;          /* opset of the node's domain */
  const struct rc_op_def *def;
  int n_in, n_out;
  int *in;            /* value indices; -1 for an absent optional input */
  int *out;           /* value indices; -1 for an unused optional output */
  int n_attrs;
  rc_attr *attrs;
  void *params;       /* op-specific settings parsed by def->parse, in the arena */
} rc_node;

typedef struct rc_graph {
  int n_values;
  rc_value *values;
  int n_nodes;
  rc_node *nodes;     /* topological order after rc__graph_order */
  int n_inputs;
  int *inputs;        /* values of kind RC_VALUE_INPUT, in file order */
  int n_outputs;
  int *outputs;
  int64_t ir_version;
  int opset;          /* default-domain opset */
  const char *path;   /* file the graph came from, for messages */
  rc_arena arena;
} rc_graph;

/* Index of the value called name, or -1. Linear; call at load time only. */
int rc__graph_find_value(const rc_graph *g, const char *name);
/* Position in vals[0..n) (value indices, e.g. g->inputs) of the value
 * called name, or -1. */
int rc__graph_find_in(const rc_graph *g, const int *vals, int n, const char *name);

/* Check that every input is produced by something and sort the nodes
 * topologically, refusing cycles. Messages name the file and node. */
rc_status rc__graph_order(rc_graph *g, rc_err *e);

/* Attribute access for op parsers. */
const rc_attr *rc__attr_find(const rc_node *n, const char *name);
int64_t rc__attr_int(const rc_node *n, const char *name, int64_t dflt);
float rc__attr_float(const rc_node *n, const char *name, float dflt);
const char *rc__attr_string(const rc_node *n, const char *name, const char *dflt);

#endif
