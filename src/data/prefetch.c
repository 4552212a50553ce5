/* The ring of ready batches (prefetch.h). The consumer thread queues
 * positions, in order, into free slots (computing each epoch's shuffle as it
 * reaches it) and takes ready slots in the same order; workers take queued
 * slots in order and gather them. One lock guards the slots' states and the
 * counters; the gathering itself runs outside it. */
#define _POSIX_C_SOURCE 200809L

#include "data/prefetch.h"

#include <omp.h>
#include <pthread.h>
#include <string.h>
#include <time.h>

#include "core/alloc.h"

typedef enum slot_state { SLOT_FREE = 0, SLOT_QUEUED, SLOT_BUSY, SLOT_READY } slot_state;

typedef struct slot {
  slot_state state;
  int64_t *pos; /* local positions into the view's index */
  void *in[RC_DATASET_MAX_INPUTS];
  int32_t *labels;
  int64_t count;
  rc_status status;
  rc_err err;
} slot;

struct rc__prefetch {
  rc__prefetch_plan p;
  rc_dataset order; /* the view with an order array of its own, shuffled per epoch */
  int64_t order_epoch;
  slot *slots;
  pthread_t *threads;
  int n_threads;
  pthread_mutex_t lock;
  pthread_cond_t work, ready;
  int64_t queued, taken, served;
  int stop;
  rc__prefetch_stats stats;
};

static double now_s(void) {
  struct timespec t;
  clock_gettime(CLOCK_MONOTONIC, &t);
  return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

static void *worker(void *arg) {
  rc__prefetch *pf = arg;
  const rc__prefetch_plan *p = &pf->p;
  /* The workers are the parallelism here: a gather inside one must not start
   * a team of OpenMP threads beside the training step's own. */
  omp_set_num_threads(1);
  for (;;) {
    pthread_mutex_lock(&pf->lock);
    while (!pf->stop && pf->taken >= pf->queued) pthread_cond_wait(&pf->work, &pf->lock);
    if (pf->stop) {
      pthread_mutex_unlock(&pf->lock);
      return NULL;
    }
    slot *s = &pf->slots[pf->taken++ % p->depth];
    s->state = SLOT_BUSY;
    pthread_mutex_unlock(&pf->lock);
    rc_dataset v = *p->view;
    v.order = s->pos;
    v.n = p->local;
    memset(&s->err, 0, sizeof s->err);
    s->status = rc_dataset_gather(s->in, p->labels ? s->labels : NULL, &s->count, &v, 0, p->local, &s->err);
    pthread_mutex_lock(&pf->lock);
    s->state = SLOT_READY;
    pf->stats.samples += s->count;
    pthread_cond_broadcast(&pf->ready);
    pthread_mutex_unlock(&pf->lock);
  }
}

/* Queue positions into free slots, up to depth ahead of the consumer. */
static void fill(rc__prefetch *pf) {
  const rc__prefetch_plan *p = &pf->p;
  while (pf->queued < p->count && pf->queued < pf->served + p->depth) {
    slot *s = &pf->slots[pf->queued % p->depth];
    int64_t at = p->first + pf->queued;
    int64_t epoch = p->epoch + at / p->batches_per_epoch, b = at % p->batches_per_epoch;
    if (epoch != pf->order_epoch) {
      rc_dataset_shuffle(&pf->order, p->seed, (uint64_t)epoch);
      pf->order_epoch = epoch;
    }
    memcpy(s->pos, pf->order.order + b * p->batch + p->offset, sizeof(int64_t) * (size_t)p->local);
    pthread_mutex_lock(&pf->lock);
    s->state = SLOT_QUEUED;
    pf->queued++;
    pthread_cond_signal(&pf->work);
    pthread_mutex_unlock(&pf->lock);
  }
}

static rc_status check_plan(const rc__prefetch_plan *p, rc_err *e) {
  if (p->workers < 1 || p->depth < 1 || p->local < 1 || p->batch < 1 || p->batches_per_epoch < 1 || p->count < 0 ||
      p->first < 0 || p->epoch < 0)
    return rc__fail(e, RC_ERR_INVALID, "prefetch: a count or size is out of range");
  if (p->offset < 0 || p->offset + p->local > p->batch || p->batches_per_epoch * p->batch > p->view->n)
    return rc__fail(e, RC_ERR_INVALID, "prefetch: rows %lld..%lld of batches of %lld do not fit %lld samples",
                    (long long)p->offset, (long long)(p->offset + p->local - 1), (long long)p->batch,
                    (long long)p->view->n);
  if (p->labels && !p->view->labels)
    return rc__fail(e, RC_ERR_INVALID, "prefetch: labels asked for, the view has none");
  return RC_OK;
}

static rc_status alloc_slots(rc__prefetch *pf, rc_err *e) {
  const rc__prefetch_plan *p = &pf->p;
  pf->slots = rc__calloc((size_t)p->depth, sizeof(slot));
  pf->order.order = rc__malloc(sizeof(int64_t) * (size_t)(p->view->n ? p->view->n : 1));
  if (!pf->slots || !pf->order.order) return rc__fail(e, RC_ERR_NOMEM, "out of memory for the prefetch ring");
  for (int k = 0; k < p->depth; k++) {
    slot *s = &pf->slots[k];
    s->pos = rc__malloc(sizeof(int64_t) * (size_t)p->local);
    s->labels = p->labels ? rc__malloc(sizeof(int32_t) * (size_t)p->local) : NULL;
    if (!s->pos || (p->labels && !s->labels))
      return rc__fail(e, RC_ERR_NOMEM, "out of memory for the prefetch ring");
    for (int i = 0; i < p->view->n_inputs; i++) {
      size_t bytes;
      if (!rc__mul_size((size_t)p->local, p->view->sample_bytes[i], &bytes))
        return rc__fail(e, RC_ERR_LIMIT, "prefetch: a batch of input %d overflows", i);
      s->in[i] = rc__malloc(bytes ? bytes : 1);
      if (!s->in[i])
        return rc__fail(e, RC_ERR_NOMEM, "out of memory for the prefetch ring (%zu bytes a slot)", bytes);
    }
  }
  return RC_OK;
}

rc_status rc__prefetch_start(rc__prefetch **out, const rc__prefetch_plan *p, rc_err *e) {
  *out = NULL;
  RC_TRY(check_plan(p, e));
  rc__prefetch *pf = rc__calloc(1, sizeof *pf);
  if (!pf) return rc__fail(e, RC_ERR_NOMEM, "out of memory for the prefetch ring");
  pf->p = *p;
  pf->order = *p->view;
  pf->order.order = NULL;
  pf->order_epoch = -1;
  pthread_mutex_init(&pf->lock, NULL);
  pthread_cond_init(&pf->work, NULL);
  pthread_cond_init(&pf->ready, NULL);
  rc_status st = alloc_slots(pf, e);
  int n = p->workers < p->depth ? p->workers : p->depth;
  if (st == RC_OK) {
    pf->threads = rc__calloc((size_t)n, sizeof(pthread_t));
    if (!pf->threads) st = rc__fail(e, RC_ERR_NOMEM, "out of memory for the prefetch ring");
  }
  for (int k = 0; st == RC_OK && k < n; k++) {
    int err = pthread_create(&pf->threads[k], NULL, worker, pf);
    if (err)
      st = rc__fail(e, RC_ERR_IO, "prefetch: cannot start worker thread %d: %s", k + 1, strerror(err));
    else
      pf->n_threads++;
  }
  if (st != RC_OK) {
    rc__prefetch_stop(pf);
    return st;
  }
  fill(pf);
  *out = pf;
  return RC_OK;
}

rc_status rc__prefetch_next(rc__prefetch *pf, void *const *in, int32_t *labels, int64_t *count, rc_err *e) {
  const rc__prefetch_plan *p = &pf->p;
  *count = 0;
  if (pf->served >= p->count)
    return rc__fail(e, RC_ERR_INVALID, "prefetch: all %lld batches were served", (long long)p->count);
  fill(pf);
  slot *s = &pf->slots[pf->served % p->depth];
  pthread_mutex_lock(&pf->lock);
  if (s->state != SLOT_READY) {
    double t0 = now_s();
    pf->stats.waits++;
    while (s->state != SLOT_READY) pthread_cond_wait(&pf->ready, &pf->lock);
    pf->stats.wait_s += now_s() - t0;
  }
  pthread_mutex_unlock(&pf->lock);
  rc_status st = s->status;
  if (st != RC_OK) {
    *e = s->err;
  } else {
    for (int i = 0; i < p->view->n_inputs; i++)
      memcpy(in[i], s->in[i], (size_t)s->count * p->view->sample_bytes[i]);
    if (p->labels && labels) memcpy(labels, s->labels, sizeof(int32_t) * (size_t)s->count);
    *count = s->count;
  }
  pthread_mutex_lock(&pf->lock);
  s->state = SLOT_FREE;
  pf->served++;
  pthread_mutex_unlock(&pf->lock);
  fill(pf);
  return st;
}

void rc__prefetch_stats_get(rc__prefetch *pf, rc__prefetch_stats *s) {
  pthread_mutex_lock(&pf->lock);
  *s = pf->stats;
  pthread_mutex_unlock(&pf->lock);
}

void rc__prefetch_stop(rc__prefetch *pf) {
  if (!pf) return;
  pthread_mutex_lock(&pf->lock);
  pf->stop = 1;
  pthread_cond_broadcast(&pf->work);
  pthread_mutex_unlock(&pf->lock);
  for (int k = 0; k < pf->n_threads; k++) pthread_join(pf->threads[k], NULL);
  for (int k = 0; pf->slots && k < pf->p.depth; k++) {
    slot *s = &pf->slots[k];
    rc__free(s->pos);
    rc__free(s->labels);
    for (int i = 0; i < RC_DATASET_MAX_INPUTS; i++) rc__free(s->in[i]);
  }
  rc__free(pf->slots);
  rc__free(pf->threads);
  rc__free(pf->order.order);
  pthread_cond_destroy(&pf->work);
  pthread_cond_destroy(&pf->ready);
  pthread_mutex_destroy(&pf->lock);
  rc__free(pf);
}
