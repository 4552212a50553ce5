# The attention-map loss term on a pruned transformer (the TinyViT reference
# model, Fashion-MNIST images from Debian's dataset-fashion-mnist): attention
# probabilities measured outside recoup with onnxruntime-web (npm, tests/ort),
# which needs Node and `npm ci` in tests/ort (scripts/setup.sh); without them
# the test fails with a message saying so. About 30 s in a release build, so
# the sanitizer build leaves it out (as the other Fashion-MNIST training runs).
find_program(RECOUP_NODE node DOC "Node.js for the onnxruntime-web checks")
if(NOT RECOUP_SANITIZE)
add_test(NAME attention_map_reference
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/attention_map_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/reference ${CMAKE_BINARY_DIR}/attention_map_test)
set_tests_properties(attention_map_reference PROPERTIES FIXTURES_REQUIRED reference_models TIMEOUT 600 SKIP_RETURN_CODE 77
                     ENVIRONMENT "RECOUP_NODE=${RECOUP_NODE}")
endif()
