# Command-line tests driven by Debian's python3 (numpy, onnx).
add_test(NAME cli_errors
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/cli_errors_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/cli_errors)
set_tests_properties(cli_errors PROPERTIES TIMEOUT 600)

# The Fashion-MNIST training runs below take minutes in a release build; the
# sanitizer build runs the same code paths on small data (cli_errors, batch,
# the reference and conformance tests) instead of repeating them ten times
# slower.
if(NOT RECOUP_SANITIZE)
# End-to-end recovery of the bundled pruned demo model on Fashion-MNIST.
add_test(NAME distill_fashion_mnist
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/distill_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/distill_test)
set_tests_properties(distill_fashion_mnist PROPERTIES TIMEOUT 1200 SKIP_RETURN_CODE 77)

# Recovery of a 4-bit-weight quantized copy made by `recoup quantize`.
add_test(NAME distill_quantized_fashion_mnist
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/qat_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/qat_test)
set_tests_properties(distill_quantized_fashion_mnist PROPERTIES TIMEOUT 1500 SKIP_RETURN_CODE 77)

# Feature-level distillation of a channel-pruned (narrower) student.
add_test(NAME distill_features_fashion_mnist
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/features_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/features_test)
set_tests_properties(distill_features_fashion_mnist PROPERTIES TIMEOUT 1500 SKIP_RETURN_CODE 77)
endif()

# Pairing of teacher and student tensors on the PyTorch reference exports.
add_test(NAME pairing_reference
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/pairing_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/reference ${CMAKE_BINARY_DIR}/pairing_test)
set_tests_properties(pairing_reference PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 600)

# No command writes over a file it reads (links, "./x", hard links included).
add_test(NAME cli_outputs
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/cli_outputs_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/cli_outputs)
set_tests_properties(cli_outputs PROPERTIES TIMEOUT 300)

# Names, shapes and data from files: declared output shapes (against the onnx
# package), .npz inputs by name (NumPy), escaped hostile names, aligned
# tables, one-line option errors, --threads 0, prune's overall sparsity.
add_test(NAME cli_names
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/cli_names_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/cli_names)
set_tests_properties(cli_names PROPERTIES TIMEOUT 300)
