# PyTorch reference values for Conv -> BatchNormalization -> Relu/Clip chains
# (running statistics, and batch statistics as in training):
# the script writes models and tensors into the build folder (a fixture),
# test_ops_fuse runs them fused, unfused and on the plain Conv path.
add_test(NAME ops_fuse_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_ops_fuse.py ${CMAKE_BINARY_DIR}/ref_ops_fuse)
set_tests_properties(ops_fuse_ref_data PROPERTIES FIXTURES_SETUP ops_fuse_ref TIMEOUT 300)
if(TEST test_ops_fuse)
  set_tests_properties(test_ops_fuse PROPERTIES FIXTURES_REQUIRED ops_fuse_ref)
endif()
