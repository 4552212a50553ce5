# Reliability under hostile files and faults: the out-of-memory sweep and the
# corruption test read the reference models exported by the reference_models
# fixture (tests/reference.cmake).
set_tests_properties(test_alloc_sweep PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 900)
set_tests_properties(test_fuzz_regressions PROPERTIES TIMEOUT 300)
if(RECOUP_SANITIZE)
  # Under the sanitizers every load is several times slower: the large model
  # is swept at every 4th failure point (plus the first and last 256).
  set_property(TEST test_alloc_sweep APPEND PROPERTY ENVIRONMENT "RECOUP_SWEEP_STRIDE=4")
endif()
# Damaged copies of the demo and reference models through the library in one
# process (corrupt_load) and, a subset, through `recoup inspect` and `recoup
# eval` (Debian's python3 with python3-onnx edits them).
add_executable(corrupt_load ${CMAKE_CURRENT_SOURCE_DIR}/corrupt_load.c)
target_link_libraries(corrupt_load PRIVATE recoup_lib)
add_test(NAME corrupt_models
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/test_corrupt.py $<TARGET_FILE:recoup>
                 $<TARGET_FILE:corrupt_load> ${CMAKE_BINARY_DIR}/corrupt)
set_tests_properties(corrupt_models PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 900
  ENVIRONMENT "RECOUP_SOURCE_DIR=${PROJECT_SOURCE_DIR};RECOUP_BINARY_DIR=${CMAKE_BINARY_DIR}")
if(RECOUP_SANITIZE)
  set_property(TEST corrupt_models APPEND PROPERTY ENVIRONMENT "RECOUP_CORRUPT_LIGHT=1")
endif()
