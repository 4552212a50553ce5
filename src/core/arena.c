#include "core/arena.h"

#include <stdint.h>
#include <string.h>

#include "core/alloc.h"

#define ARENA_ALIGN 64

struct rc_arena_block {
  rc_arena_block *next;
  size_t size;
  size_t used;
  /* Data follows, aligned by the offset computation in alloc. */
  unsigned char data[];
};

void rc__arena_init(rc_arena *a, size_t block_size) {
  a->head = NULL;
  a->block_size = block_size ? block_size : 64 * 1024;
  a->total = 0;
}

static size_t align_offset(const rc_arena_block *b) {
  uintptr_t p = (uintptr_t)(b->data + b->used);
  uintptr_t aligned = (p + ARENA_ALIGN - 1) & ~(uintptr_t)(ARENA_ALIGN - 1);
  return (size_t)(aligned - (uintptr_t)b->data);
}

void *rc__arena_alloc(rc_arena *a, size_t n) {
  if (n == 0) n = 1;
  rc_arena_block *b = a->head;
  if (b) {
    size_t off = align_offset(b);
    if (off <= b->size && b->size - off >= n) {
      b->used = off + n;
      a->total += n;
      return b->data + off;
    }
  }
  size_t want = n + ARENA_ALIGN;
  if (want < n) return NULL;
  size_t size = want > a->block_size ? want : a->block_size;
  if (size > SIZE_MAX - sizeof(rc_arena_block)) return NULL;
  b = rc__malloc(sizeof(rc_arena_block) + size);
  if (!b) return NULL;
  b->size = size;
  b->used = 0;
  b->next = a->head;
  a->head = b;
  size_t off = align_offset(b);
  b->used = off + n;
  a->total += n;
  return b->data + off;
}

void *rc__arena_zalloc(rc_arena *a, size_t n) {
  void *p = rc__arena_alloc(a, n);
  if (p) memset(p, 0, n ? n : 1);
  return p;
}

char *rc__arena_strdup(rc_arena *a, const char *s) {
  return rc__arena_memdup(a, s, strlen(s) + 1);
}

void *rc__arena_memdup(rc_arena *a, const void *p, size_t n) {
  void *d = rc__arena_alloc(a, n);
  if (d && n) memcpy(d, p, n);
  return d;
}

void rc__arena_free(rc_arena *a) {
  rc_arena_block *b = a->head;
  while (b) {
    rc_arena_block *next = b->next;
    rc__free(b);
    b = next;
  }
  a->head = NULL;
  a->total = 0;
}
