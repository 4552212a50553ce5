# Command-line tests driven by Debian's python3 (numpy, onnx).
add_test(NAME cli_errors
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/cli_errors_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/cli_errors)
set_tests_properties(cli_errors PROPERTIES TIMEOUT 600)
