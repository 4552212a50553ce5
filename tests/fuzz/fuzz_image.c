/* libFuzzer target: bytes as a JPEG or PNG image, decoded and prepared. */
#include <omp.h>

#include "fuzz_entries.h"

int LLVMFuzzerInitialize(int *argc, char ***argv) {
  (void)argc;
  (void)argv;
  omp_set_num_threads(1); /* one thread: reproducible runs, no pool start-up per input */
  return 0;
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size) {
  rc_fuzz_image(data, size);
  return 0;
}
