/* SHA-256 through nettle, with the hex digest and the file walk recoup needs. */
#include "cli/sha256.h"

#include <errno.h>
#include <stdio.h>
#include <string.h>

void cli_sha256_init(cli_sha256 *s) { sha256_init(&s->ctx); }

void cli_sha256_update(cli_sha256 *s, const void *data, size_t n) { sha256_update(&s->ctx, n, data); }

void cli_sha256_hex(cli_sha256 *s, char hex[65]) {
  uint8_t d[SHA256_DIGEST_SIZE];
  sha256_digest(&s->ctx, sizeof d, d);
  for (int i = 0; i < SHA256_DIGEST_SIZE; i++) snprintf(hex + 2 * i, 3, "%02x", d[i]);
}

rc_status cli_sha256_file(const char *path, char hex[65], rc_err *e) {
  FILE *f = fopen(path, "rb");
  if (!f) return rc_err_set(e, RC_ERR_IO, "%s: %s", path, strerror(errno));
  cli_sha256 s;
  cli_sha256_init(&s);
  unsigned char buf[1 << 16];
  size_t n;
  while ((n = fread(buf, 1, sizeof buf, f)) > 0) cli_sha256_update(&s, buf, n);
  int bad = ferror(f);
  fclose(f);
  if (bad) return rc_err_set(e, RC_ERR_IO, "%s: read error", path);
  cli_sha256_hex(&s, hex);
  return RC_OK;
}
