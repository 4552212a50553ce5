# recoup quantize on the demo's dense model and Fashion-MNIST, checked with
# Debian's python3-onnx (checker) and onnxruntime-web (npm). Release build
# only: three passes over the test set take minutes, ten times that under the
# sanitizers, which test_quantize covers on a small graph instead.
if(NOT RECOUP_SANITIZE)
  add_test(NAME quantize_fashion_mnist
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/quantize_test.py $<TARGET_FILE:recoup>
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/quantize_test)
  set_tests_properties(quantize_fashion_mnist PROPERTIES TIMEOUT 1200 SKIP_RETURN_CODE 77)
endif()

# What quantize writes (names, output-grid margin) and prune's refusal of a
# quantized model, on small graphs built with Debian's python3-onnx, run in
# onnxruntime-web (npm, tests/ort). Seconds, so the sanitizer build runs it too.
add_test(NAME quantize_grids
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/quantize_grids_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/quantize_grids_test)
set_tests_properties(quantize_grids PROPERTIES TIMEOUT 300 ENVIRONMENT "RECOUP_NODE=${RECOUP_NODE}")
