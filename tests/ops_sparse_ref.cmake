# The sparse Conv, Gemm and MatMul kernels against PyTorch:
# scripts/ref_ops_sparse.py writes pruned cases into the build folder (a
# fixture), test_ops_sparse_ref compares.
add_test(NAME ops_sparse_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_ops_sparse.py ${CMAKE_BINARY_DIR}/ops_sparse_ref)
set_tests_properties(ops_sparse_ref_data PROPERTIES FIXTURES_SETUP ops_sparse_ref TIMEOUT 300)
if(TEST test_ops_sparse_ref)
  set_tests_properties(test_ops_sparse_ref PROPERTIES FIXTURES_REQUIRED ops_sparse_ref)
endif()
