/* Heap or file-backed mapping for big working buffers (see spill.h). */
#define _DEFAULT_SOURCE

#include "data/spill.h"

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <unistd.h>

#include "core/alloc.h"

size_t rc_spill_default_budget(void) {
  long pages = sysconf(_SC_PHYS_PAGES), size = sysconf(_SC_PAGESIZE);
  if (pages <= 0 || size <= 0) return (size_t)1 << 30;
  return (size_t)pages / 4 * (size_t)size;
}

rc_status rc_spill_alloc(rc_spill *b, size_t n, size_t budget, const char *dir, rc_err *e) {
  memset(b, 0, sizeof *b);
  if (!budget) budget = rc_spill_default_budget();
  if (n <= budget) {
    b->p = rc__calloc(n ? n : 1, 1);
    if (!b->p) return rc__fail(e, RC_ERR_NOMEM, "out of memory for %zu bytes", n);
    b->n = n;
    return RC_OK;
  }
  char path[4096];
  if (snprintf(path, sizeof path, "%s/.recoup-spill-XXXXXX", dir && *dir ? dir : ".") >= (int)sizeof path)
    return rc__fail(e, RC_ERR_LIMIT, "%s: folder name too long for a spill file", dir);
  int fd = mkstemp(path);
  if (fd < 0) return rc__fail(e, RC_ERR_IO, "%s: cannot create a spill file: %s", dir, strerror(errno));
  unlink(path); /* the mapping keeps it alive; nothing stays behind */
  if (ftruncate(fd, (off_t)n) != 0) {
    int err = errno;
    close(fd);
    return rc__fail(e, RC_ERR_IO, "%s: cannot size a spill file to %zu bytes: %s", dir, n, strerror(err));
  }
  void *p = mmap(NULL, n, PROT_READ | PROT_WRITE, MAP_SHARED, fd, 0);
  int err = errno;
  close(fd);
  if (p == MAP_FAILED) return rc__fail(e, RC_ERR_IO, "%s: cannot map a spill file of %zu bytes: %s", dir, n, strerror(err));
  b->p = p;
  b->n = n;
  b->in_file = 1;
  return RC_OK;
}

void rc_spill_free(rc_spill *b) {
  if (!b || !b->p) return;
  if (b->in_file)
    munmap(b->p, b->n);
  else
    rc__free(b->p);
  memset(b, 0, sizeof *b);
}
