# Sparse students end to end: a 95%-pruned garment student distilled with
# the sparse kernels on and off (same accuracy within float tolerance,
# pruned zeros kept, byte-identical repeat runs), checked with Debian's
# python3-onnx on Fashion-MNIST (dataset-fashion-mnist). Release build only:
# the sanitizer build covers the same kernels in test_ops_sparse.
if(NOT RECOUP_SANITIZE)
  add_test(NAME sparse_students
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/sparse_test.py $<TARGET_FILE:recoup>
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/sparse_test)
  set_tests_properties(sparse_students PROPERTIES TIMEOUT 300 SKIP_RETURN_CODE 77)
  # The same for a 2:4 student with the N:M Conv kernels on and off.
  add_test(NAME nm_students
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/sparse_test.py $<TARGET_FILE:recoup>
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/nm_test 2:4)
  set_tests_properties(nm_students PROPERTIES TIMEOUT 300 SKIP_RETURN_CODE 77)
endif()
