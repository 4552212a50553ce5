# Preprocessing recorded in metadata_props, quantize --limit (tests/prep_test.py).
if(NOT RECOUP_SANITIZE)
add_test(NAME recorded_preprocessing
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/prep_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/prep_test)
set_tests_properties(recorded_preprocessing PROPERTIES TIMEOUT 900)
endif()
