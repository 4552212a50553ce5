# `recoup prune` on the exported reference models (the reference_models
# fixture of tests/reference.cmake): outputs checked with Debian's
# python3-onnx checker and run in onnxruntime-web (npm, tests/ort), sparsity
# measured by `recoup inspect --json`.
add_test(NAME prune_reference
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/prune_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/reference ${CMAKE_BINARY_DIR}/prune_test)
set_tests_properties(prune_reference PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 600)
