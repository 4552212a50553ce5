# PyTorch reference values for the conv, pool and matmul kernels: the script
# writes them into the build folder (a fixture), test_ops_conv_ref compares.
add_test(NAME ops_conv_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_ops_conv.py ${CMAKE_BINARY_DIR}/ref_ops_conv)
set_tests_properties(ops_conv_ref_data PROPERTIES FIXTURES_SETUP ops_conv_ref TIMEOUT 300)
if(TEST test_ops_conv_ref)
  set_tests_properties(test_ops_conv_ref PROPERTIES FIXTURES_REQUIRED ops_conv_ref)
endif()
# The same comparison through oneDNN's Conv path, where the build has it.
if(TEST test_ops_conv_ref AND RECOUP_DNNL_BUILT)
  add_test(NAME test_ops_conv_ref_dnnl COMMAND test_ops_conv_ref)
  set_tests_properties(test_ops_conv_ref_dnnl PROPERTIES FIXTURES_REQUIRED ops_conv_ref TIMEOUT 120
                       ENVIRONMENT "RECOUP_CONV_PATH=dnnl;RECOUP_SOURCE_DIR=${PROJECT_SOURCE_DIR};RECOUP_BINARY_DIR=${CMAKE_BINARY_DIR}")
endif()
