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
