# Students beyond single-output classifiers (per-output losses) and recovery
# without data. Scenes composed from Fashion-MNIST (Debian
# dataset-fashion-mnist), models exported by Debian's python3-torch, outputs
# reproduced by onnxruntime-web (npm, tests/ort).
if(NOT RECOUP_SANITIZE)
add_test(NAME distill_outputs_scenes
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/outputs_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/outputs_test)
set_tests_properties(distill_outputs_scenes PROPERTIES TIMEOUT 900)
add_test(NAME distill_data_free
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/datafree_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/datafree_test)
set_tests_properties(distill_data_free PROPERTIES TIMEOUT 900)
endif()
