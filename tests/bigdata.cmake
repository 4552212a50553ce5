# A uint8 .npy over 2 GB (made sparsely by the test, removed after): distill
# with peak resident memory under 1 GB; the teacher cache spilled with
# --cache-mb (tests/bigdata_test.py).
if(NOT RECOUP_SANITIZE)
add_test(NAME bigdata_bounded_memory
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/bigdata_test.py $<TARGET_FILE:recoup> ${PROJECT_SOURCE_DIR}
                 ${CMAKE_BINARY_DIR}/bigdata_test)
set_tests_properties(bigdata_bounded_memory PROPERTIES TIMEOUT 900)
endif()
