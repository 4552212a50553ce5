# Pointwise / softmax / normalisation kernels against PyTorch: the script
# writes reference outputs and gradients into the build folder (a fixture),
# then the C test compares our kernels with them.
add_test(NAME ref_ops_elementwise_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_ops_elementwise.py ${CMAKE_BINARY_DIR}/ref_ops)
set_tests_properties(ref_ops_elementwise_data PROPERTIES FIXTURES_SETUP ref_ops_elementwise TIMEOUT 300)
if(TEST test_ops_elementwise_ref)
  set_tests_properties(test_ops_elementwise_ref PROPERTIES FIXTURES_REQUIRED ref_ops_elementwise)
endif()
