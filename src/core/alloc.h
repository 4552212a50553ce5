/* Every heap allocation in the library goes through these functions so that
 * tests can inject out-of-memory failures (see rc_alloc_set_fail_after). */
#ifndef RC_CORE_ALLOC_H
#define RC_CORE_ALLOC_H

#include <stddef.h>

void *rc__malloc(size_t n);
void *rc__calloc(size_t count, size_t size);
void *rc__realloc(void *p, size_t n);
void rc__free(void *p);
char *rc__strdup(const char *s);

/* Overflow-checked a*b; returns 0 and leaves *out untouched on overflow. */
int rc__mul_size(size_t a, size_t b, size_t *out);

#endif
