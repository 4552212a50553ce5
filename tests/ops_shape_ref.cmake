# PyTorch reference values for the shape, resize and fake-quant kernels:
# scripts/ref_ops_shape.py (Debian's python3 with python3-torch) writes them
# into the build folder as a fixture, then test_ops_shape_ref compares.
add_test(NAME ops_shape_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_ops_shape.py ${CMAKE_BINARY_DIR}/ref_ops_shape)
set_tests_properties(ops_shape_ref_data PROPERTIES FIXTURES_SETUP ops_shape_ref TIMEOUT 300)
if(TEST test_ops_shape_ref)
  set_tests_properties(test_ops_shape_ref PROPERTIES FIXTURES_REQUIRED ops_shape_ref)
endif()
