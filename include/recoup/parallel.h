/* Processes working together: the ranks of an MPI job when recoup was built
 * with MPI and started by a launcher (mpirun, srun), otherwise one process
 * alone. A program that spreads work over the ranks (the command-line
 * tool's batch hands distill jobs to free ranks) joins the job once, asks
 * for its rank, and passes small messages of int64 values or bytes.
 *
 * Every call works on a NULL group too, as a group of one (rank 0 of 1), so
 * callers need no second code path. */
#ifndef RECOUP_PARALLEL_H
#define RECOUP_PARALLEL_H

#include <stddef.h>
#include <stdint.h>

#include "recoup/export.h"
#include "recoup/status.h"

typedef struct rc_dist rc_dist;

/* 1 when this build can join an MPI job. */
RC_API int rc_dist_built_with_mpi(void);

/* Join the job when the environment says a launcher started us (mpirun,
 * srun with PMIx/PMI); otherwise *out is a group of one. */
RC_API rc_status rc_dist_start(rc_dist **out, int *argc, char ***argv, rc_err *e);
/* Leave the job (after every rank finished its collective calls); frees d. */
RC_API void rc_dist_end(rc_dist *d);
/* Stop every rank of the job with exit status code (never returns under MPI;
 * for a group of one it returns and the caller exits). */
RC_API void rc_dist_abort(rc_dist *d, int code);

RC_API int rc_dist_rank(const rc_dist *d);
RC_API int rc_dist_size(const rc_dist *d);
RC_API const char *rc_dist_host(const rc_dist *d);

/* Host names of all ranks, RC_DIST_MAX_HOST bytes each, rank order (out:
 * size rows). Every rank calls it. */
#define RC_DIST_MAX_HOST 256
RC_API rc_status rc_dist_hosts(rc_dist *d, char *out, rc_err *e);

/* Point-to-point messages of n int64 values (tag: the caller's message
 * kind). recv_any takes the next message of that tag from any rank and
 * gives its sender. */
RC_API rc_status rc_dist_send(rc_dist *d, int to, int tag, const int64_t *v, int n, rc_err *e);
RC_API rc_status rc_dist_recv(rc_dist *d, int from, int tag, int64_t *v, int n, rc_err *e);
RC_API rc_status rc_dist_recv_any(rc_dist *d, int tag, int *from, int64_t *v, int n, rc_err *e);
/* Bytes (a job's printed results). recv_bytes takes up to cap bytes and
 * gives the count received. */
RC_API rc_status rc_dist_send_bytes(rc_dist *d, int to, int tag, const void *buf, size_t n, rc_err *e);
RC_API rc_status rc_dist_recv_bytes(rc_dist *d, int from, int tag, void *buf, size_t cap, size_t *n, rc_err *e);
/* 1 when a message of that tag waits (its sender in *from); never blocks. */
RC_API int rc_dist_probe(rc_dist *d, int tag, int *from);

#endif
