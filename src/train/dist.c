#define _POSIX_C_SOURCE 200809L /* clock_gettime, gethostname */

#include "train/dist.h"

#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "core/alloc.h"

#ifdef RECOUP_HAVE_MPI
#include <mpi.h>
#endif

struct rc_dist {
  int rank, size;
  int joined;            /* MPI_Init was called by us */
  char host[RC_DIST_MAX_HOST];
  double comm_s;
  void *scratch;         /* the ring's receive buffer, grown as needed */
  size_t scratch_bytes;
};

#ifdef RECOUP_HAVE_MPI
static double now_s(void) {
  struct timespec ts;
  clock_gettime(CLOCK_MONOTONIC, &ts);
  return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}
#endif

int rc_dist_built_with_mpi(void) {
#ifdef RECOUP_HAVE_MPI
  return 1;
#else
  return 0;
#endif
}

/* Launchers announce themselves in the environment: Open MPI's mpirun, and
 * PMIx or PMI for srun and other launchers. Without one, stay a single
 * process rather than start MPI's singleton machinery for nothing. */
static int launched_by_mpi(void) {
  /* A process that a rank started for itself (batch's jobs) stays alone. */
  if (getenv("RECOUP_RANK_CHILD")) return 0;
  static const char *const vars[] = {"OMPI_COMM_WORLD_SIZE", "PMIX_RANK", "PMI_RANK", "PMI_SIZE"};
  for (size_t i = 0; i < sizeof vars / sizeof vars[0]; i++)
    if (getenv(vars[i])) return 1;
  return 0;
}

rc_status rc_dist_start(rc_dist **out, int *argc, char ***argv, rc_err *e) {
  rc_dist *d = rc__calloc(1, sizeof *d);
  if (!d) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  d->size = 1;
  if (gethostname(d->host, sizeof d->host - 1) != 0) snprintf(d->host, sizeof d->host, "unknown");
#ifdef RECOUP_HAVE_MPI
  if (launched_by_mpi()) {
    int provided = 0;
    if (MPI_Init_thread(argc, argv, MPI_THREAD_FUNNELED, &provided) != MPI_SUCCESS) {
      rc__free(d);
      return rc__fail(e, RC_ERR_IO, "MPI_Init failed");
    }
    d->joined = 1;
    MPI_Comm_rank(MPI_COMM_WORLD, &d->rank);
    MPI_Comm_size(MPI_COMM_WORLD, &d->size);
    int len = 0;
    char name[MPI_MAX_PROCESSOR_NAME];
    if (MPI_Get_processor_name(name, &len) == MPI_SUCCESS && len > 0)
      snprintf(d->host, sizeof d->host, "%.*s", len, name);
  }
#else
  (void)argc;
  (void)argv;
  /* N copies of a one-process build would each train alone and race to
   * write the same files: refuse instead. */
  const char *n = getenv("OMPI_COMM_WORLD_SIZE") ? getenv("OMPI_COMM_WORLD_SIZE") : getenv("PMI_SIZE");
  if (launched_by_mpi() && n && atoi(n) > 1) {
    rc__free(d);
    return rc__fail(e, RC_ERR_UNSUPPORTED, "started as one of %s MPI ranks, but this recoup was built without MPI "
                    "(install libopenmpi-dev and rebuild)", n);
  }
#endif
  *out = d;
  return RC_OK;
}

void rc_dist_end(rc_dist *d) {
  if (!d) return;
#ifdef RECOUP_HAVE_MPI
  if (d->joined) MPI_Finalize();
#endif
  rc__free(d->scratch);
  rc__free(d);
}

void rc_dist_abort(rc_dist *d, int code) {
#ifdef RECOUP_HAVE_MPI
  if (d && d->joined && d->size > 1) MPI_Abort(MPI_COMM_WORLD, code);
#endif
  (void)d;
  (void)code;
}

int rc_dist_rank(const rc_dist *d) { return d ? d->rank : 0; }
int rc_dist_size(const rc_dist *d) { return d ? d->size : 1; }
const char *rc_dist_host(const rc_dist *d) { return d ? d->host : "localhost"; }
double rc_dist_comm_seconds(const rc_dist *d) { return d ? d->comm_s : 0; }

void rc_dist_share(int64_t n, int r, int size, int64_t *lo, int64_t *hi) {
  int64_t base = n / size, extra = n % size;
  *lo = (int64_t)r * base + (r < extra ? r : extra);
  *hi = *lo + base + (r < extra ? 1 : 0);
}

void rc_dist_share_blocks(int64_t n, int64_t block, int r, int size, int64_t *lo, int64_t *hi) {
  int64_t blocks = block > 0 ? (n + block - 1) / block : 0;
  rc_dist_share(blocks, r, size, lo, hi);
  *lo = *lo * block < n ? *lo * block : n;
  *hi = *hi * block < n ? *hi * block : n;
}

static int alone(const rc_dist *d) { return !d || d->size < 2; }

#ifdef RECOUP_HAVE_MPI
static rc_status mpi_failed(rc_err *e, const char *call, int rc) {
  char msg[MPI_MAX_ERROR_STRING];
  int len = 0;
  if (MPI_Error_string(rc, msg, &len) != MPI_SUCCESS) len = 0;
  return rc__fail(e, RC_ERR_IO, "%s failed: %.*s", call, len, msg);
}

#define MPI_TRY(call, name)                          \
  do {                                               \
    int mpi_rc_ = (call);                            \
    if (mpi_rc_ != MPI_SUCCESS) return mpi_failed(e, name, mpi_rc_); \
  } while (0)

static rc_status grow_scratch(rc_dist *d, size_t bytes, rc_err *e) {
  if (bytes <= d->scratch_bytes) return RC_OK;
  void *p = rc__realloc(d->scratch, bytes);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "out of memory for the reduction buffer");
  d->scratch = p;
  d->scratch_bytes = bytes;
  return RC_OK;
}

/* Ring all-reduce: reduce-scatter then all-gather, N-1 steps each, every
 * rank sending 2(N-1)/N of the buffer. Chunk c's sum starts at rank c and
 * gains one rank's values per step around the ring, always in that order. */
static rc_status ring_sum(rc_dist *d, void *buf, size_t n, int is_double, rc_err *e) {
  int N = d->size, r = d->rank, right = (r + 1) % N, left = (r + N - 1) % N;
  size_t es = is_double ? sizeof(double) : sizeof(float);
  MPI_Datatype t = is_double ? MPI_DOUBLE : MPI_FLOAT;
  int64_t lo, hi;
  rc_dist_share((int64_t)n, 0, N, &lo, &hi);
  if (hi - lo > INT_MAX) return rc__fail(e, RC_ERR_LIMIT, "a reduction of %zu values is too large for MPI counts", n);
  RC_TRY(grow_scratch(d, (size_t)(hi - lo) * es + 1, e));
  unsigned char *b = buf;
  for (int s = 0; s < N - 1; s++) {
    int cs = (r - s + N) % N, cr = (r - s - 1 + 2 * N) % N;
    int64_t slo, shi, rlo, rhi;
    rc_dist_share((int64_t)n, cs, N, &slo, &shi);
    rc_dist_share((int64_t)n, cr, N, &rlo, &rhi);
    MPI_TRY(MPI_Sendrecv(b + (size_t)slo * es, (int)(shi - slo), t, right, 11, d->scratch, (int)(rhi - rlo), t, left,
                         11, MPI_COMM_WORLD, MPI_STATUS_IGNORE),
            "MPI_Sendrecv (gradient sum)");
    if (is_double) {
      double *dst = (double *)(void *)b + rlo;
      const double *src = d->scratch;
      for (int64_t i = 0; i < rhi - rlo; i++) dst[i] = src[i] + dst[i];
    } else {
      float *dst = (float *)(void *)b + rlo;
      const float *src = d->scratch;
      for (int64_t i = 0; i < rhi - rlo; i++) dst[i] = src[i] + dst[i];
    }
  }
  for (int s = 0; s < N - 1; s++) {
    int cs = (r + 1 - s + N) % N, cr = (r - s + N) % N;
    int64_t slo, shi, rlo, rhi;
    rc_dist_share((int64_t)n, cs, N, &slo, &shi);
    rc_dist_share((int64_t)n, cr, N, &rlo, &rhi);
    MPI_TRY(MPI_Sendrecv(b + (size_t)slo * es, (int)(shi - slo), t, right, 12, b + (size_t)rlo * es,
                         (int)(rhi - rlo), t, left, 12, MPI_COMM_WORLD, MPI_STATUS_IGNORE),
            "MPI_Sendrecv (gradient gather)");
  }
  return RC_OK;
}
#endif

static rc_status timed_sum(rc_dist *d, void *buf, size_t n, int is_double, rc_err *e) {
  if (alone(d) || n == 0) return RC_OK;
#ifdef RECOUP_HAVE_MPI
  double t0 = now_s();
  rc_status s = ring_sum(d, buf, n, is_double, e);
  d->comm_s += now_s() - t0;
  return s;
#else
  (void)buf;
  (void)is_double;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_sum_f32(rc_dist *d, float *buf, size_t n, rc_err *e) { return timed_sum(d, buf, n, 0, e); }
rc_status rc_dist_sum_f64(rc_dist *d, double *buf, size_t n, rc_err *e) { return timed_sum(d, buf, n, 1, e); }

rc_status rc_dist_bcast(rc_dist *d, void *buf, size_t bytes, rc_err *e) {
  if (alone(d) || bytes == 0) return RC_OK;
#ifdef RECOUP_HAVE_MPI
  double t0 = now_s();
  unsigned char *p = buf;
  for (size_t done = 0; done < bytes;) {
    size_t part = bytes - done < (size_t)INT_MAX ? bytes - done : (size_t)INT_MAX;
    MPI_TRY(MPI_Bcast(p + done, (int)part, MPI_BYTE, 0, MPI_COMM_WORLD), "MPI_Bcast");
    done += part;
  }
  d->comm_s += now_s() - t0;
  return RC_OK;
#else
  (void)buf;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_gather_rows(rc_dist *d, float *buf, int64_t n, int64_t block, int64_t row_floats, rc_err *e) {
  if (alone(d) || n == 0) return RC_OK;
#ifdef RECOUP_HAVE_MPI
  int N = d->size;
  int *counts = rc__malloc(sizeof(int) * 2 * (size_t)N);
  if (!counts) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  int *displs = counts + N;
  for (int r = 0; r < N; r++) {
    int64_t lo, hi;
    rc_dist_share_blocks(n, block, r, N, &lo, &hi);
    if (hi * row_floats > INT_MAX) {
      rc__free(counts);
      return rc__fail(e, RC_ERR_LIMIT, "%lld rows are too many to gather in one MPI call", (long long)n);
    }
    counts[r] = (int)((hi - lo) * row_floats);
    displs[r] = (int)(lo * row_floats);
  }
  double t0 = now_s();
  int rc = MPI_Allgatherv(MPI_IN_PLACE, 0, MPI_FLOAT, buf, counts, displs, MPI_FLOAT, MPI_COMM_WORLD);
  d->comm_s += now_s() - t0;
  rc__free(counts);
  if (rc != MPI_SUCCESS) return mpi_failed(e, "MPI_Allgatherv", rc);
  return RC_OK;
#else
  (void)buf;
  (void)block;
  (void)row_floats;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_check_equal(rc_dist *d, uint64_t sum, const char *what, rc_err *e) {
  if (alone(d)) return RC_OK;
#ifdef RECOUP_HAVE_MPI
  unsigned long long *all = rc__malloc(sizeof *all * (size_t)d->size);
  if (!all) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  unsigned long long mine = sum;
  double t0 = now_s();
  int rc = MPI_Allgather(&mine, 1, MPI_UNSIGNED_LONG_LONG, all, 1, MPI_UNSIGNED_LONG_LONG, MPI_COMM_WORLD);
  d->comm_s += now_s() - t0;
  rc_status s = RC_OK;
  if (rc != MPI_SUCCESS) s = mpi_failed(e, "MPI_Allgather", rc);
  for (int r = 1; r < d->size && s == RC_OK; r++)
    if (all[r] != all[0])
      s = rc__fail(e, RC_ERR_NUMERIC, "%s differ between ranks: rank %d's checksum %016llx, rank 0's %016llx", what, r,
                   all[r], all[0]);
  rc__free(all);
  return s;
#else
  (void)sum;
  (void)what;
  return RC_OK;
#endif
}

rc_status rc_dist_send(rc_dist *d, int to, int tag, const int64_t *v, int n, rc_err *e) {
#ifdef RECOUP_HAVE_MPI
  if (alone(d)) return rc__fail(e, RC_ERR_INVALID, "no other rank to send to");
  MPI_TRY(MPI_Send(v, n, MPI_INT64_T, to, tag, MPI_COMM_WORLD), "MPI_Send");
  return RC_OK;
#else
  (void)d, (void)to, (void)tag, (void)v, (void)n;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_recv(rc_dist *d, int from, int tag, int64_t *v, int n, rc_err *e) {
#ifdef RECOUP_HAVE_MPI
  if (alone(d)) return rc__fail(e, RC_ERR_INVALID, "no other rank to receive from");
  MPI_TRY(MPI_Recv(v, n, MPI_INT64_T, from, tag, MPI_COMM_WORLD, MPI_STATUS_IGNORE), "MPI_Recv");
  return RC_OK;
#else
  (void)d, (void)from, (void)tag, (void)v, (void)n;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_recv_any(rc_dist *d, int tag, int *from, int64_t *v, int n, rc_err *e) {
#ifdef RECOUP_HAVE_MPI
  if (alone(d)) return rc__fail(e, RC_ERR_INVALID, "no other rank to receive from");
  MPI_Status st;
  MPI_TRY(MPI_Recv(v, n, MPI_INT64_T, MPI_ANY_SOURCE, tag, MPI_COMM_WORLD, &st), "MPI_Recv");
  *from = st.MPI_SOURCE;
  return RC_OK;
#else
  (void)d, (void)tag, (void)from, (void)v, (void)n;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_send_bytes(rc_dist *d, int to, int tag, const void *buf, size_t n, rc_err *e) {
#ifdef RECOUP_HAVE_MPI
  if (alone(d)) return rc__fail(e, RC_ERR_INVALID, "no other rank to send to");
  if (n > INT_MAX) return rc__fail(e, RC_ERR_LIMIT, "a message of %zu bytes is too large", n);
  MPI_TRY(MPI_Send(buf, (int)n, MPI_BYTE, to, tag, MPI_COMM_WORLD), "MPI_Send");
  return RC_OK;
#else
  (void)d, (void)to, (void)tag, (void)buf, (void)n;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

rc_status rc_dist_recv_bytes(rc_dist *d, int from, int tag, void *buf, size_t cap, size_t *n, rc_err *e) {
#ifdef RECOUP_HAVE_MPI
  if (alone(d)) return rc__fail(e, RC_ERR_INVALID, "no other rank to receive from");
  MPI_Status st;
  int got = 0;
  MPI_TRY(MPI_Recv(buf, cap > INT_MAX ? INT_MAX : (int)cap, MPI_BYTE, from, tag, MPI_COMM_WORLD, &st), "MPI_Recv");
  MPI_Get_count(&st, MPI_BYTE, &got);
  *n = got > 0 ? (size_t)got : 0;
  return RC_OK;
#else
  (void)d, (void)from, (void)tag, (void)buf, (void)cap, (void)n;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}

int rc_dist_probe(rc_dist *d, int tag, int *from) {
#ifdef RECOUP_HAVE_MPI
  if (alone(d)) return 0;
  int flag = 0;
  MPI_Status st;
  if (MPI_Iprobe(MPI_ANY_SOURCE, tag, MPI_COMM_WORLD, &flag, &st) != MPI_SUCCESS || !flag) return 0;
  *from = st.MPI_SOURCE;
  return 1;
#else
  (void)d, (void)tag, (void)from;
  return 0;
#endif
}

rc_status rc_dist_hosts(rc_dist *d, char *out, rc_err *e) {
  if (alone(d)) {
    snprintf(out, RC_DIST_MAX_HOST, "%s", rc_dist_host(d));
    return RC_OK;
  }
#ifdef RECOUP_HAVE_MPI
  MPI_TRY(MPI_Allgather(d->host, RC_DIST_MAX_HOST, MPI_CHAR, out, RC_DIST_MAX_HOST, MPI_CHAR, MPI_COMM_WORLD),
          "MPI_Allgather (host names)");
  return RC_OK;
#else
  return rc__fail(e, RC_ERR_UNSUPPORTED, "built without MPI");
#endif
}
