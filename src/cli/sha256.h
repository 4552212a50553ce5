/* SHA-256 (FIPS 180-4) of files, for `recoup batch --resume`: an output is
 * reused only when its content hash equals the one recorded when its job
 * finished. A cryptographic hash, because a checksum such as CRC-32 plus size
 * lets a same-size change through with probability 2^-32 per comparison and
 * is trivially forged; SHA-256 makes "same bytes" a practical certainty.
 * The hash itself is nettle's (Debian's nettle-dev). */
#ifndef RC_CLI_SHA256_H
#define RC_CLI_SHA256_H

#include <nettle/sha2.h>
#include <stddef.h>

#include "recoup/status.h"

typedef struct cli_sha256 {
  struct sha256_ctx ctx;
} cli_sha256;

void cli_sha256_init(cli_sha256 *s);
void cli_sha256_update(cli_sha256 *s, const void *data, size_t n);
/* 64 lowercase hex digits and a NUL into hex[65]. */
void cli_sha256_hex(cli_sha256 *s, char hex[65]);
/* Hash a whole file; RC_ERR_IO naming the file on failure. */
rc_status cli_sha256_file(const char *path, char hex[65], rc_err *e);

#endif
