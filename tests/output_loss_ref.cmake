# Per-output losses against PyTorch: scripts/ref_output_loss.py (Debian's
# python3 with python3-torch) writes each term's value and autograd gradient,
# written from the papers' formulas, into the build folder; then
# test_output_loss_ref runs the same inputs through src/train/output_loss.c.
add_test(NAME output_loss_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_output_loss.py
                 ${CMAKE_BINARY_DIR}/output_loss_ref)
set_tests_properties(output_loss_ref_data PROPERTIES FIXTURES_SETUP output_loss_ref TIMEOUT 300)
if(TEST test_output_loss_ref)
  set_tests_properties(test_output_loss_ref PROPERTIES FIXTURES_REQUIRED output_loss_ref)
endif()
