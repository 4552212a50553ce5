/* The size-capped protobuf-c allocator every ONNX message is unpacked with. */
#include <stddef.h>
#include <stdint.h>

#include "core/alloc.h"
#include "ir/tensor_proto.h"

/* Each allocation carries a header with its size so frees can be counted. */
typedef union pb_hdr {
  size_t size;
  max_align_t align;
} pb_hdr;

static void *pb_alloc(void *data, size_t size) {
  rc__pb_alloc *a = data;
  if (size > SIZE_MAX - sizeof(pb_hdr) || size > a->cap || a->used > a->cap - size) {
    a->hit_cap = 1;
    return NULL;
  }
  pb_hdr *h = rc__malloc(sizeof(pb_hdr) + size);
  if (!h) {
    a->out_of_memory = 1;
    return NULL;
  }
  h->size = size;
  a->used += size;
  return h + 1;
}

static void pb_free(void *data, void *p) {
  if (!p) return;
  pb_hdr *h = (pb_hdr *)p - 1;
  rc__pb_alloc *a = data;
  if (a && a->used >= h->size) a->used -= h->size;
  rc__free(h);
}

void rc__pb_alloc_init(rc__pb_alloc *a, size_t cap) {
  a->base.alloc = pb_alloc;
  a->base.free = pb_free;
  a->base.allocator_data = a;
  a->used = 0;
  a->cap = cap;
  a->hit_cap = 0;
  a->out_of_memory = 0;
}

/* In memory, an unpacked message is at most a few tens of times its encoded
 * size (an empty sub-message of 2 bytes becomes a struct of ~200 bytes plus a
 * pointer), so 64x plus a floor is generous for real files and still a bound
 * proportional to the file. */
size_t rc__pb_alloc_cap(size_t file_bytes) {
  const size_t floor_bytes = (size_t)64 << 20;
  if (file_bytes > (SIZE_MAX - floor_bytes) / 64) return SIZE_MAX;
  return floor_bytes + 64 * file_bytes;
}

static void pb_free_only(void *data, void *p) { pb_free(NULL, p); }
static void *pb_alloc_never(void *data, size_t size) { return NULL; }

ProtobufCAllocator *rc__pb_free_allocator(void) {
  static ProtobufCAllocator freer = {pb_alloc_never, pb_free_only, NULL};
  return &freer;
}
