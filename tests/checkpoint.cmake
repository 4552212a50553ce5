# Portable checkpoints (tests/checkpoint_test.py): recoup_padded is recoup
# with the loop's checkpointed state laid out differently in memory
# (RECOUP_CKPT_TEST_PAD) and its distillation files built at -O0; checkpoints
# must resume across it and the normal build. The files named here are those
# that see the loop's state struct (src/train/checkpoint.h).
add_executable(recoup_padded ${RECOUP_CLI_SOURCES} ${PROJECT_SOURCE_DIR}/src/train/distill.c
               ${PROJECT_SOURCE_DIR}/src/train/checkpoint.c)
target_include_directories(recoup_padded PRIVATE ${PROJECT_SOURCE_DIR}/src)
target_compile_definitions(recoup_padded PRIVATE RECOUP_CKPT_TEST_PAD)
set_source_files_properties(${PROJECT_SOURCE_DIR}/src/train/distill.c ${PROJECT_SOURCE_DIR}/src/train/checkpoint.c PROPERTIES
                            COMPILE_OPTIONS "-O0")
target_link_libraries(recoup_padded PRIVATE recoup_lib PkgConfig::NETTLE)
add_test(NAME checkpoint_portable
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/checkpoint_test.py $<TARGET_FILE:recoup>
                 $<TARGET_FILE:recoup_padded> ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/checkpoint_test)
set_tests_properties(checkpoint_portable PROPERTIES TIMEOUT 900 SKIP_RETURN_CODE 77)
