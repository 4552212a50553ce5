/* Whole-file reads and atomic writes: the one place every reader of a whole
 * file and every writer of recoup's outputs goes through. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE /* mkstemp, fchmod */

#include "core/file.h"

#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "core/alloc.h"

/* ---- reading ---- */

rc_status rc__file_read_all(const char *path, size_t max_bytes, uint8_t **data, size_t *n,
                            rc_err *e) {
  *data = NULL;
  *n = 0;
  int fd = open(path, O_RDONLY | O_CLOEXEC);
  if (fd < 0) return rc__fail(e, RC_ERR_IO, "%s: cannot open: %s", path, strerror(errno));
  struct stat st;
  if (fstat(fd, &st) != 0) {
    int err = errno;
    close(fd);
    return rc__fail(e, RC_ERR_IO, "%s: cannot read: %s", path, strerror(err));
  }
  if (S_ISDIR(st.st_mode)) {
    close(fd);
    return rc__fail(e, RC_ERR_IO, "%s: is a directory, not a file", path);
  }
  if (!S_ISREG(st.st_mode)) {
    close(fd);
    return rc__fail(e, RC_ERR_IO, "%s: not a regular file", path);
  }
  if (st.st_size < 0 || (unsigned long long)st.st_size > (unsigned long long)max_bytes) {
    close(fd);
    return rc__fail(e, RC_ERR_LIMIT, "%s: file is %lld bytes, over the limit of %zu", path,
                    (long long)st.st_size, max_bytes);
  }
  size_t size = (size_t)st.st_size;
  uint8_t *buf = rc__malloc(size);
  if (!buf) {
    close(fd);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory reading %zu bytes", path, size);
  }
  size_t got = 0;
  while (got < size) {
    ssize_t r = read(fd, buf + got, size - got);
    if (r < 0 && errno == EINTR) continue;
    if (r < 0) {
      int err = errno;
      rc__free(buf);
      close(fd);
      return rc__fail(e, RC_ERR_IO, "%s: cannot read: %s", path, strerror(err));
    }
    if (r == 0) break; /* shrank while reading: use what is there */
    got += (size_t)r;
  }
  close(fd);
  *data = buf;
  *n = got;
  return RC_OK;
}

char *rc__path_dir(const char *path) {
  const char *slash = strrchr(path, '/');
  size_t n = !slash ? 0 : slash == path ? 1 : (size_t)(slash - path);
  char *d = rc__malloc(n + 2);
  if (!d) return NULL;
  if (n) memcpy(d, path, n);
  else strcpy(d, ".");
  if (n) d[n] = '\0';
  return d;
}

/* ---- atomic writes ---- */

/* Mode for a new file: the target's own mode when it exists, else 0666 less
 * the process umask (read from /proc so the umask is never changed). */
static mode_t new_file_mode(const char *path) {
  struct stat st;
  if (stat(path, &st) == 0 && S_ISREG(st.st_mode)) return st.st_mode & 07777;
  mode_t mask = 022;
  FILE *f = fopen("/proc/self/status", "re");
  if (f) {
    char line[128];
    unsigned m;
    while (fgets(line, sizeof line, f))
      if (sscanf(line, "Umask: %o", &m) == 1) {
        mask = (mode_t)m;
        break;
      }
    fclose(f);
  }
  return 0666 & ~mask;
}

static rc_status io_fail(rc_err *e, const char *path, const char *what, int err) {
  return rc__fail(e, RC_ERR_IO, "%s: %s: %s", path, what, strerror(err));
}

static int write_all(int fd, const uint8_t *p, size_t n) {
  while (n > 0) {
    size_t chunk = n > ((size_t)1 << 30) ? ((size_t)1 << 30) : n;
    ssize_t w = write(fd, p, chunk);
    if (w < 0) {
      if (errno == EINTR) continue;
      return -1;
    }
    if (w == 0) {
      errno = EIO;
      return -1;
    }
    p += w;
    n -= (size_t)w;
  }
  return 0;
}

rc_status rc__write_atomic(const char *path, const void *data, size_t n, rc_err *e) {
  if (!path || !*path) return rc__fail(e, RC_ERR_INVALID, "empty output path");
  size_t len = strlen(path);
  const char *slash = strrchr(path, '/');
  size_t dir_len = slash ? (size_t)(slash - path) : 0;
  const char *base = slash ? slash + 1 : path;
  if (!*base) return rc__fail(e, RC_ERR_INVALID, "%s: output path names a folder", path);
  /* "<dir>/.<base>.XXXXXX", the base shortened so the name fits NAME_MAX. */
  size_t base_len = strlen(base);
  if (base_len > 200) base_len = 200;
  char *tmp = rc__malloc(len + 16);
  char *dir = rc__path_dir(path);
  if (!tmp || !dir) {
    rc__free(tmp);
    rc__free(dir);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", path);
  }
  if (slash) snprintf(tmp, len + 16, "%.*s/.%.*s.XXXXXX", (int)dir_len, path, (int)base_len, base);
  else snprintf(tmp, len + 16, ".%.*s.XXXXXX", (int)base_len, base);
  rc_status st = RC_OK;
  mode_t mode = new_file_mode(path);
  int fd = mkstemp(tmp);
  if (fd < 0) {
    st = io_fail(e, path, "cannot create a temporary file beside it", errno);
    goto out;
  }
  if (fchmod(fd, mode) != 0 || write_all(fd, data, n) != 0 || fsync(fd) != 0) {
    int err = errno;
    close(fd);
    unlink(tmp);
    st = io_fail(e, path, "cannot write", err);
    goto out;
  }
  if (close(fd) != 0) {
    int err = errno;
    unlink(tmp);
    st = io_fail(e, path, "cannot write", err);
    goto out;
  }
  if (rename(tmp, path) != 0) {
    int err = errno;
    unlink(tmp);
    st = io_fail(e, path, "cannot replace", err);
    goto out;
  }
  /* Make the rename itself durable. Some file systems refuse fsync on a
   * folder (EINVAL); the data is written by then, so only EIO counts. */
  int dfd = open(dir, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
  if (dfd >= 0) {
    if (fsync(dfd) != 0 && errno == EIO) st = io_fail(e, path, "cannot sync its folder", EIO);
    close(dfd);
  }
out:
  rc__free(tmp);
  rc__free(dir);
  return st;
}
