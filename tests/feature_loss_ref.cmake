# Feature-level distillation losses against PyTorch: scripts/ref_feature_loss.py
# (Debian's python3 with python3-torch) writes each term's value and autograd
# gradients, written from the papers' formulas, into the build folder; then
# test_feature_loss_ref runs the same inputs through src/train/feature_loss.c.
add_test(NAME feature_loss_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_feature_loss.py
                 ${CMAKE_BINARY_DIR}/feature_loss_ref)
set_tests_properties(feature_loss_ref_data PROPERTIES FIXTURES_SETUP feature_loss_ref TIMEOUT 300)
if(TEST test_feature_loss_ref)
  set_tests_properties(test_feature_loss_ref PROPERTIES FIXTURES_REQUIRED feature_loss_ref)
endif()
