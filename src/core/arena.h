/* A bump allocator: many small allocations, freed together. Graphs keep their
 * strings and attribute arrays here; plans keep their activations in one block. */
#ifndef RC_CORE_ARENA_H
#define RC_CORE_ARENA_H

#include <stddef.h>

typedef struct rc_arena_block rc_arena_block;
typedef struct rc_arena {
  rc_arena_block *head;
  size_t block_size;
  size_t total;
} rc_arena;

void rc__arena_init(rc_arena *a, size_t block_size);
/* Returns 64-byte aligned, uninitialised memory, or NULL when out of memory. */
void *rc__arena_alloc(rc_arena *a, size_t n);
void *rc__arena_zalloc(rc_arena *a, size_t n);
char *rc__arena_strdup(rc_arena *a, const char *s);
void *rc__arena_memdup(rc_arena *a, const void *p, size_t n);
void rc__arena_free(rc_arena *a);

#endif
