#include "train/features.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "train/feature_loss.h"

static const rc_term_info terms[RC_TERM_COUNT] = {
#define TERM_ROW(id, name, weight, kind, help) {name, weight, kind, help},
    RC_LOSS_TERMS(TERM_ROW)
#undef TERM_ROW
};

const rc_term_info *rc_term_info_of(rc_term t) { return t >= 0 && t < RC_TERM_COUNT ? &terms[t] : NULL; }

/* "kd, logit-mse, ..." for error messages. */
static const char *known_terms(char *buf, size_t n) {
  size_t o = 0;
  buf[0] = '\0';
  for (int i = 0; i < RC_TERM_COUNT && o < n; i++)
    o += (size_t)snprintf(buf + o, n - o, "%s%s", i ? ", " : "", terms[i].name);
  return buf;
}

rc_status rc_loss_spec_parse(rc_loss_spec *spec, const char *text, rc_err *e) {
  memset(spec, 0, sizeof *spec);
  const char *p = text;
  while (*p) {
    const char *end = strchr(p, ',');
    size_t len = end ? (size_t)(end - p) : strlen(p);
    char item[128];
    if (len == 0 || len >= sizeof item) return rc__fail(e, RC_ERR_INVALID, "'%s': empty or overlong loss term", text);
    memcpy(item, p, len);
    item[len] = 0;
    char *eq = strchr(item, '=');
    if (eq) *eq = 0;
    int t = -1;
    for (int i = 0; i < RC_TERM_COUNT; i++)
      if (!strcmp(item, terms[i].name)) t = i;
    char known[256];
    if (t < 0)
      return rc__fail(e, RC_ERR_INVALID, "unknown loss term '%s' (known: %s)", item, known_terms(known, sizeof known));
    float w = terms[t].default_weight;
    if (eq) {
      char *stop;
      double v = strtod(eq + 1, &stop);
      if (stop == eq + 1 || *stop || !isfinite(v) || v < 0)
        return rc__fail(e, RC_ERR_INVALID, "the weight of loss term '%s' must be a non-negative number, got '%s'",
                        item, eq + 1);
      w = (float)v;
    }
    spec->weight[t] = w;
    p = end ? end + 1 : p + len;
  }
  if (spec->weight[RC_TERM_KD] > 0 && spec->weight[RC_TERM_LOGIT_MSE] > 0)
    return rc__fail(e, RC_ERR_INVALID, "choose one of the loss terms kd and logit-mse");
  return RC_OK;
}

int rc_loss_spec_needs_features(const rc_loss_spec *spec) {
  for (int t = 0; t < RC_TERM_COUNT; t++)
    if (spec->weight[t] > 0 && terms[t].kind == RC_TERM_ON_FEATURES) return 1;
  return 0;
}

typedef struct projector {
  int w_entry, b_entry; /* -1 when the pair needs none */
  int64_t ct, cs;
} projector;

typedef struct anchor {
  int entry;            /* store entry of the student weight */
  const float *teacher; /* the teacher's initializer data */
  const char *name;
} anchor;

struct rc_features {
  rc_loss_spec spec;
  rc_pairing pairing;
  projector *proj;        /* per pair */
  int *amap_t, *amap_s;   /* Softmax outputs for attention-map */
  int n_amap;
  anchor *anchors;
  int n_anchors;
  const rc_graph *tg, *sg;
  float *work;
  size_t work_floats;
};

static int uses_pairs(const rc_loss_spec *s) {
  return s->weight[RC_TERM_HINT] > 0 || s->weight[RC_TERM_ATTENTION] > 0 || s->weight[RC_TERM_BOUNDARY] > 0 ||
         s->weight[RC_TERM_FSP] > 0;
}

static int channels_of(const rc_tensor *t) { return (int)(t->rank == 3 ? t->dims[2] : t->dims[1]); }

/* Softmax outputs of rank 4 (attention probabilities (N, heads, L, L)), in
 * node order; a Softmax over logits or anything else is not attention. */
static int attention_softmaxes(const rc_graph *g, rc_plan *p, int *out) {
  int n = 0;
  for (int i = 0; i < g->n_nodes; i++) {
    int v = g->nodes[i].out[0];
    if (!strcmp(g->nodes[i].op_type, "Softmax") && v >= 0 && rc_plan_tensor(p, v)->rank == 4) out[n++] = v;
  }
  return n;
}

/* Teacher and student attention maps pair in order: the counts and each
 * pair's shape must agree, checked here before any training. */
static rc_status match_attention_maps(rc_features *f, rc_plan *tp, rc_plan *sp, rc_err *e) {
  int nt = attention_softmaxes(f->tg, tp, f->amap_t), ns = attention_softmaxes(f->sg, sp, f->amap_s);
  if (!nt || !ns)
    return rc__fail(e, RC_ERR_INVALID, "loss term attention-map: %s has %d and %s has %d attention maps (Softmax "
                    "outputs of rank 4, (N, heads, L, L)); both need some", f->tg->path, nt, f->sg->path, ns);
  if (nt != ns)
    return rc__fail(e, RC_ERR_SHAPE, "loss term attention-map: %s has %d attention maps and %s has %d; they pair in "
                    "order, so the counts must agree", f->tg->path, nt, f->sg->path, ns);
  for (int i = 0; i < nt; i++) {
    const rc_tensor *t = rc_plan_tensor(tp, f->amap_t[i]), *s = rc_plan_tensor(sp, f->amap_s[i]);
    if (!rc_shape_equal(t, s)) {
      char a[96], b[96];
      return rc__fail(e, RC_ERR_SHAPE, "loss term attention-map: teacher '%s' %s and student '%s' %s must have the "
                      "same (heads, L, L)", f->tg->values[f->amap_t[i]].name, rc_shape_str(t, a, sizeof a),
                      f->sg->values[f->amap_s[i]].name, rc_shape_str(s, b, sizeof b));
    }
  }
  f->n_amap = nt;
  return RC_OK;
}

static rc_status setup_attention_maps(rc_features *f, const rc_tensor *shapes, unsigned char *tk, unsigned char *sk,
                                      rc_err *e) {
  f->amap_t = rc__malloc(sizeof(int) * (size_t)(f->tg->n_nodes + 1));
  f->amap_s = rc__malloc(sizeof(int) * (size_t)(f->sg->n_nodes + 1));
  if (!f->amap_t || !f->amap_s) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  rc_plan *tp, *sp;
  RC_TRY(rc__pairing_plans(&tp, &sp, f->tg, f->sg, shapes, e));
  rc_status s = match_attention_maps(f, tp, sp, e);
  rc_plan_free(tp);
  rc_plan_free(sp);
  RC_TRY(s);
  for (int i = 0; i < f->n_amap; i++) {
    tk[f->amap_t[i]] = 1;
    sk[f->amap_s[i]] = 1;
  }
  return RC_OK;
}

static rc_status setup_projectors(rc_features *f, rc_params *ps, rc_err *e) {
  f->proj = rc__calloc((size_t)f->pairing.n + 1, sizeof(projector));
  if (!f->proj) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  int projected = f->spec.weight[RC_TERM_HINT] > 0 || f->spec.weight[RC_TERM_BOUNDARY] > 0;
  for (int i = 0; i < f->pairing.n; i++) {
    const rc_pair *p = &f->pairing.pairs[i];
    f->proj[i] = (projector){-1, -1, channels_of(&p->t_shape), channels_of(&p->s_shape)};
    if (!projected || !rc_pair_needs_projector(p)) continue;
    char name[160];
    snprintf(name, sizeof name, "projector %d weight", i);
    RC_TRY(rc_params_add(ps, &f->proj[i].w_entry, name, f->proj[i].ct * f->proj[i].cs, NULL, 0, e));
    snprintf(name, sizeof name, "projector %d bias", i);
    RC_TRY(rc_params_add(ps, &f->proj[i].b_entry, name, f->proj[i].ct, NULL, RC_PARAM_NO_DECAY, e));
  }
  return RC_OK;
}

rc_status rc__features_init(rc_features **out, const rc_loss_spec *spec, const rc_graph *tg, const rc_graph *sg,
                            const rc_tensor *shapes, const char *const *pairs, const float *pair_weights,
                            int n_pairs, rc_params *ps, unsigned char *tk, unsigned char *sk, rc_err *e) {
  *out = NULL;
  rc_features *f = rc__calloc(1, sizeof *f);
  if (!f) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  f->spec = *spec;
  f->tg = tg;
  f->sg = sg;
  rc_status s = RC_OK;
  if (uses_pairs(spec)) {
    if ((s = rc_pairing_init(&f->pairing, tg, sg, shapes, pairs, n_pairs, 1, e)) != RC_OK) goto fail;
    if (!f->pairing.n) {
      s = rc__fail(e, RC_ERR_INVALID, "feature losses need pairs: none were found between %s and %s; name them "
                   "as TEACHER_TENSOR=STUDENT_TENSOR pairs (inspect's pairing lists candidates)", tg->path, sg->path);
      goto fail;
    }
    if (!n_pairs) {
      /* Automatic pairs match inner features; the outputs are the logit
       * terms' business, and a second, unscaled match of them fights kd. */
      int k = 0;
      for (int i = 0; i < f->pairing.n; i++) {
        int is_output = 0;
        for (int o = 0; o < sg->n_outputs; o++)
          if (sg->outputs[o] == f->pairing.pairs[i].student) is_output = 1;
        if (!is_output) f->pairing.pairs[k++] = f->pairing.pairs[i];
      }
      f->pairing.n = k;
    }
    if (!f->pairing.n) {
      s = rc__fail(e, RC_ERR_INVALID, "feature losses need pairs of inner tensors: none were found between %s and "
                   "%s; name them as TEACHER_TENSOR=STUDENT_TENSOR pairs (inspect's pairing lists candidates)",
                   tg->path, sg->path);
      goto fail;
    }
    for (int i = 0; i < f->pairing.n; i++) {
      if (pair_weights && i < n_pairs) f->pairing.pairs[i].weight = pair_weights[i];
      tk[f->pairing.pairs[i].teacher] = 1;
      sk[f->pairing.pairs[i].student] = 1;
    }
    if ((s = setup_projectors(f, ps, e)) != RC_OK) goto fail;
  }
  if (spec->weight[RC_TERM_ATTENTION_MAP] > 0 && (s = setup_attention_maps(f, shapes, tk, sk, e)) != RC_OK) goto fail;
  *out = f;
  return RC_OK;
fail:
  rc__features_free(f);
  return s;
}

rc_status rc__features_bind(rc_features *f, rc_params *ps, uint64_t seed, rc_err *e) {
  for (int i = 0; i < f->pairing.n; i++)
    if (f->proj && f->proj[i].w_entry >= 0)
      RC_TRY(rc_feat_projector_init(rc_params_value(ps, f->proj[i].w_entry), rc_params_value(ps, f->proj[i].b_entry),
                                    f->proj[i].ct, f->proj[i].cs, RC_FEAT_INIT_AUTO, seed + (uint64_t)i, e));
  if (f->spec.weight[RC_TERM_WEIGHT_ANCHOR] <= 0) return RC_OK;
  f->anchors = rc__calloc((size_t)rc_params_count(ps) + 1, sizeof(anchor));
  if (!f->anchors) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < rc_params_count(ps); i++) {
    const rc_param_entry *pe = rc_params_entry(ps, i);
    int sv = rc__graph_find_value(f->sg, pe->name), tv = rc__graph_find_value(f->tg, pe->name);
    if (sv < 0 || tv < 0 || f->tg->values[tv].kind != RC_VALUE_INITIALIZER ||
        f->tg->values[tv].decl.dtype != RC_DTYPE_FLOAT || !rc_shape_equal(&f->tg->values[tv].decl, &f->sg->values[sv].decl))
      continue;
    f->anchors[f->n_anchors++] = (anchor){i, f->tg->values[tv].decl.data, pe->name};
  }
  return RC_OK;
}

static rc_status view_of(const rc_tensor *t, rc_feat_view *v, rc_err *e) {
  return rc_feat_view_from_dims(v, t->dims, t->rank, e);
}

static rc_status ensure_work(rc_features *f, size_t floats, rc_err *e) {
  if (floats <= f->work_floats) return RC_OK;
  /* Sized on the first step; every later step reuses it. */
  float *w = rc__realloc(f->work, sizeof(float) * floats);
  if (!w) return rc__fail(e, RC_ERR_NOMEM, "out of memory for feature-loss workspace");
  f->work = w;
  f->work_floats = floats;
  return RC_OK;
}

static float *pw(rc_params *ps, int entry, int grad) {
  return entry < 0 ? NULL : grad ? rc_params_grad(ps, entry) : rc_params_value(ps, entry);
}

static rc_status pair_terms(rc_features *f, rc_plan *tp, rc_plan *sp, rc_params *ps, double *total, rc_err *e) {
  const rc_loss_spec *sp_ = &f->spec;
  for (int i = 0; i < f->pairing.n; i++) {
    const rc_pair *p = &f->pairing.pairs[i];
    const rc_tensor *t = rc_plan_tensor(tp, p->teacher), *s = rc_plan_tensor(sp, p->student);
    rc_tensor *gs = rc_plan_grad(sp, p->student);
    rc_feat_view sv, tv;
    RC_TRY(view_of(s, &sv, e));
    RC_TRY(view_of(t, &tv, e));
    const projector *pr = &f->proj[i];
    double l;
    if (sp_->weight[RC_TERM_HINT] > 0) {
      float w = sp_->weight[RC_TERM_HINT] * p->weight;
      RC_TRY(ensure_work(f, rc_loss_hint_workspace_floats(&sv, &tv), e));
      RC_TRY(rc_loss_hint(&l, gs ? gs->data : NULL, pw(ps, pr->w_entry, 1), pw(ps, pr->b_entry, 1), w, s->data, t->data,
                          pw(ps, pr->w_entry, 0), pw(ps, pr->b_entry, 0), &sv, &tv, f->work, e));
      *total += w * l;
    }
    if (sp_->weight[RC_TERM_BOUNDARY] > 0) {
      float w = sp_->weight[RC_TERM_BOUNDARY] * p->weight;
      RC_TRY(ensure_work(f, rc_loss_boundary_workspace_floats(&sv, &tv), e));
      RC_TRY(rc_loss_boundary(&l, gs ? gs->data : NULL, pw(ps, pr->w_entry, 1), pw(ps, pr->b_entry, 1), w, s->data,
                              t->data, pw(ps, pr->w_entry, 0), pw(ps, pr->b_entry, 0), &sv, &tv, RC_AB_DEFAULT_MARGIN,
                              f->work, e));
      *total += w * l;
    }
    if (sp_->weight[RC_TERM_ATTENTION] > 0) {
      /* The term's weight is beta itself (the paper's weight). */
      RC_TRY(ensure_work(f, rc_loss_attention_workspace_floats(&sv, &tv), e));
      RC_TRY(rc_loss_attention(&l, gs ? gs->data : NULL, p->weight, s->data, t->data, &sv, &tv,
                               sp_->weight[RC_TERM_ATTENTION], f->work, e));
      *total += p->weight * l;
    }
  }
  if (sp_->weight[RC_TERM_FSP] > 0)
    for (int i = 0; i + 1 < f->pairing.n; i++) {
      const rc_pair *a = &f->pairing.pairs[i], *b = &f->pairing.pairs[i + 1];
      const rc_tensor *t1 = rc_plan_tensor(tp, a->teacher), *t2 = rc_plan_tensor(tp, b->teacher);
      const rc_tensor *s1 = rc_plan_tensor(sp, a->student), *s2 = rc_plan_tensor(sp, b->student);
      rc_feat_view v[4];
      RC_TRY(view_of(s1, &v[0], e));
      RC_TRY(view_of(s2, &v[1], e));
      RC_TRY(view_of(t1, &v[2], e));
      RC_TRY(view_of(t2, &v[3], e));
      /* Two layers of equal spatial size whose widths agree between models. */
      if (v[0].positions != v[1].positions || v[2].positions != v[3].positions || v[0].c != v[2].c ||
          v[1].c != v[3].c || v[0].layout != v[1].layout || v[0].layout != v[2].layout || v[2].layout != v[3].layout)
        continue;
      rc_tensor *g1 = rc_plan_grad(sp, a->student), *g2 = rc_plan_grad(sp, b->student);
      double l;
      float w = f->spec.weight[RC_TERM_FSP];
      RC_TRY(ensure_work(f, rc_loss_fsp_workspace_floats(&v[0], &v[1]), e));
      RC_TRY(rc_loss_fsp(&l, g1 ? g1->data : NULL, g2 ? g2->data : NULL, w, s1->data, s2->data, t1->data, t2->data,
                         &v[0], &v[1], &v[2], &v[3], f->work, e));
      *total += w * l;
    }
  return RC_OK;
}

/* Relations among the samples of the batch, on the logits (the teacher's
 * rows come from the cache, so no teacher pass is needed for these). */
static rc_status relation_terms(rc_features *f, const float *teacher_logits, rc_plan *sp, double *total, rc_err *e) {
  const rc_tensor *s = rc_plan_tensor(sp, f->sg->outputs[0]);
  rc_tensor *gs = rc_plan_grad(sp, f->sg->outputs[0]);
  int64_t n = s->dims[0], ds = rc_tensor_numel(s) / (n ? n : 1), dt = ds;
  const rc_tensor tt = {RC_DTYPE_FLOAT, 0, {0}, (void *)teacher_logits}, *t = &tt;
  double l;
  if (f->spec.weight[RC_TERM_RKD_DISTANCE] > 0 || f->spec.weight[RC_TERM_RKD_ANGLE] > 0)
    RC_TRY(ensure_work(f, rc_loss_rkd_workspace_floats(n), e));
  if (f->spec.weight[RC_TERM_RKD_DISTANCE] > 0) {
    float w = f->spec.weight[RC_TERM_RKD_DISTANCE];
    RC_TRY(rc_loss_rkd_distance(&l, gs ? gs->data : NULL, w, s->data, t->data, n, ds, dt, f->work, e));
    *total += w * l;
  }
  if (f->spec.weight[RC_TERM_RKD_ANGLE] > 0) {
    float w = f->spec.weight[RC_TERM_RKD_ANGLE];
    RC_TRY(rc_loss_rkd_angle(&l, gs ? gs->data : NULL, w, s->data, t->data, n, ds, dt, f->work, e));
    *total += w * l;
  }
  return RC_OK;
}

static rc_status attention_map_terms(rc_features *f, rc_plan *tp, rc_plan *sp, double *total, rc_err *e) {
  float w = f->spec.weight[RC_TERM_ATTENTION_MAP];
  for (int i = 0; i < f->n_amap; i++) {
    const rc_tensor *t = rc_plan_tensor(tp, f->amap_t[i]), *s = rc_plan_tensor(sp, f->amap_s[i]);
    if (t->rank != 4 || !rc_shape_equal(t, s)) { /* checked at setup; a batch cannot change it */
      char a[96], b[96];
      return rc__fail(e, RC_ERR_SHAPE, "attention-map: Softmax outputs %s and %s must be equal (N, heads, L, L)",
                      rc_shape_str(t, a, sizeof a), rc_shape_str(s, b, sizeof b));
    }
    rc_tensor *gs = rc_plan_grad(sp, f->amap_s[i]);
    double l;
    RC_TRY(rc_loss_attention_map(&l, gs ? gs->data : NULL, w, s->data, t->data, s->dims[0], s->dims[1], s->dims[2],
                                 s->dims[3], e));
    *total += w * l;
  }
  return RC_OK;
}

rc_status rc__features_fit_projectors(rc_features *f, rc_plan *tp, rc_plan *sp, rc_params *ps, int *fitted,
                                      rc_err *e) {
  *fitted = 0;
  for (int i = 0; i < f->pairing.n; i++) {
    const projector *pr = &f->proj[i];
    if (pr->w_entry < 0) continue;
    const rc_pair *p = &f->pairing.pairs[i];
    const rc_tensor *t = rc_plan_tensor(tp, p->teacher), *s = rc_plan_tensor(sp, p->student);
    rc_feat_view sv, tv;
    RC_TRY(view_of(s, &sv, e));
    RC_TRY(view_of(t, &tv, e));
    size_t doubles = rc_feat_projector_fit_workspace_doubles(sv.c, tv.c);
    RC_TRY(ensure_work(f, 2 * doubles, e)); /* floats; the fit counts doubles */
    int ok;
    RC_TRY(rc_feat_projector_fit(&ok, pw(ps, pr->w_entry, 0), pw(ps, pr->b_entry, 0), s->data, t->data, &sv, &tv,
                                 (double *)(void *)f->work, e));
    *fitted += ok;
  }
  return RC_OK;
}

rc_status rc__features_step(rc_features *f, rc_plan *tp, rc_plan *sp, rc_params *ps, const float *teacher_logits,
                            double *loss, rc_err *e) {
  double total = 0;
  if (f->pairing.n) RC_TRY(pair_terms(f, tp, sp, ps, &total, e));
  RC_TRY(relation_terms(f, teacher_logits, sp, &total, e));
  if (f->n_amap) RC_TRY(attention_map_terms(f, tp, sp, &total, e));
  float w = f->spec.weight[RC_TERM_WEIGHT_ANCHOR];
  for (int i = 0; i < f->n_anchors && w > 0; i++) {
    const rc_param_entry *pe = rc_params_entry(ps, f->anchors[i].entry);
    double l;
    RC_TRY(rc_loss_weight_anchor(&l, rc_params_grad(ps, f->anchors[i].entry), w, rc_params_value(ps, f->anchors[i].entry),
                                 f->anchors[i].teacher, pe->mask, pe->numel, e));
    total += w * l;
  }
  *loss = total;
  return RC_OK;
}

void rc__features_free(rc_features *f) {
  if (!f) return;
  rc_pairing_free(&f->pairing);
  rc__free(f->proj);
  rc__free(f->amap_t);
  rc__free(f->amap_s);
  rc__free(f->anchors);
  rc__free(f->work);
  rc__free(f);
}
