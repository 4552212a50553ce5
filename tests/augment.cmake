# distill --augment: transforms against NumPy, python3-pil and python3-scipy,
# and end to end on Fashion-MNIST (tests/augment_test.py, which runs
# augment_dump for the transforms drawn on fixed seeds).
add_executable(augment_dump ${CMAKE_CURRENT_SOURCE_DIR}/augment_dump.c)
target_include_directories(augment_dump PRIVATE ${PROJECT_SOURCE_DIR}/src ${CMAKE_CURRENT_SOURCE_DIR})
target_link_libraries(augment_dump PRIVATE recoup_lib)
add_test(NAME augment
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/augment_test.py $<TARGET_FILE:augment_dump>
                 $<TARGET_FILE:recoup> ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/augment_test)
set_tests_properties(augment PROPERTIES TIMEOUT 900 SKIP_RETURN_CODE 77)
