# C test cases that read an installed data set run as their own entries, so
# that a missing data set shows as ctest's "skipped" (status 77, tests/test.h)
# instead of passing with nothing checked.
foreach(case IN ITEMS "test_data fashion_mnist_files" "test_onnx test_backend_data")
  string(REPLACE " " ";" parts "${case}")
  list(GET parts 0 exe)
  list(GET parts 1 fn)
  add_test(NAME ${exe}_${fn} COMMAND ${exe} ${fn})
  set_tests_properties(${exe}_${fn} PROPERTIES
    ENVIRONMENT "RECOUP_SOURCE_DIR=${PROJECT_SOURCE_DIR};RECOUP_BINARY_DIR=${CMAKE_BINARY_DIR}"
    TIMEOUT 600 SKIP_RETURN_CODE 77)
endforeach()
