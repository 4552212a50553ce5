# Quantized students keep their integer ranges, grids reached through
# Identity train, and what zeros mean (--mask), end to end on exported models
# and Fashion-MNIST, read back with Debian's python3-onnx; a PyTorch export
# (python3-torch) supplies the Identity-shared grids. Release build only: a
# few minutes of training.
if(NOT RECOUP_SANITIZE)
  add_test(NAME grids_ranges_masks
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/grids_test.py $<TARGET_FILE:recoup>
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/grids_test)
  set_tests_properties(grids_ranges_masks PROPERTIES TIMEOUT 1500)
endif()
