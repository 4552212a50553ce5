/* The processes sharing one run: the ranks of an MPI job when recoup was
 * built with MPI and started by mpirun or srun, otherwise one process alone.
 * A NULL group is a group of one (rank 0 of 1). The group is opened by the
 * program (the recoup tool does so once at start) and handed to distill's
 * settings; every rank trains, and rank 0 alone should write and print. */
#ifndef RECOUP_PARALLEL_H
#define RECOUP_PARALLEL_H

#include "recoup/export.h"

typedef struct rc_dist rc_dist;

/* This process's rank in d, from 0. */
RC_API int rc_dist_rank(const rc_dist *d);
/* Processes in d. */
RC_API int rc_dist_size(const rc_dist *d);

#endif
