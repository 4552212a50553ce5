# The figures distill prints (layer ratios, QDQ output row, range warnings,
# kept epoch, report tables) against NumPy, python3-onnx and onnxruntime-web.
# Trains briefly on Fashion-MNIST: release build only.
if(NOT RECOUP_SANITIZE)
  find_program(RECOUP_NODE node DOC "Node.js for the onnxruntime-web checks")
  add_test(NAME distill_figures
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/figures_test.py $<TARGET_FILE:recoup>
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/figures_test)
  set_tests_properties(distill_figures PROPERTIES TIMEOUT 900 ENVIRONMENT "RECOUP_NODE=${RECOUP_NODE}")
endif()
