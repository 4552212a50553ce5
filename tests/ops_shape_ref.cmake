# PyTorch reference values for the shape, resize and fake-quant kernels:
# scripts/ref_ops_shape.py (Debian's python3 with python3-torch) writes them
# into the build folder as a fixture, then test_ops_shape_ref compares.
add_test(NAME ops_shape_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_ops_shape.py ${CMAKE_BINARY_DIR}/ref_ops_shape)
set_tests_properties(ops_shape_ref_data PROPERTIES FIXTURES_SETUP ops_shape_ref TIMEOUT 300)
if(TEST test_ops_shape_ref)
  set_tests_properties(test_ops_shape_ref PROPERTIES FIXTURES_REQUIRED ops_shape_ref)
endif()

# Exported models full of run-time shape computations (torch.onnx, opsets 11,
# 13, 17) run through `recoup eval` and compared with PyTorch's outputs.
add_test(NAME ops_shape_export
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/check_shape_export.py
                 $<TARGET_FILE:recoup> ${CMAKE_BINARY_DIR}/shape_export)
set_tests_properties(ops_shape_export PROPERTIES TIMEOUT 300)
