# The installed library: `cmake --install` into a folder of the build tree
# (fixture api_install), then the exported symbols of librecoup.so checked
# against the public headers, and tests/api_example.c compiled through
# pkg-config against the installed files and run.
set(RECOUP_API_PREFIX ${CMAKE_BINARY_DIR}/api_install)
add_test(NAME api_install
         COMMAND ${CMAKE_COMMAND} -E env ${CMAKE_COMMAND} --install ${CMAKE_BINARY_DIR} --prefix ${RECOUP_API_PREFIX})
set_tests_properties(api_install PROPERTIES FIXTURES_SETUP api_installed TIMEOUT 120)
add_test(NAME api_exports
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/exported_symbols.py ${PROJECT_SOURCE_DIR}/include/recoup
                 ${RECOUP_API_PREFIX})
set_tests_properties(api_exports PROPERTIES FIXTURES_REQUIRED api_installed TIMEOUT 60)
add_test(NAME api_example
         COMMAND sh ${CMAKE_CURRENT_SOURCE_DIR}/api_example.sh ${RECOUP_API_PREFIX} ${CMAKE_CURRENT_SOURCE_DIR}/api_example.c
                 ${PROJECT_SOURCE_DIR}/models /usr/share/datasets/fashion-mnist ${CMAKE_BINARY_DIR}/api_example_out)
set_tests_properties(api_example PROPERTIES FIXTURES_REQUIRED api_installed SKIP_RETURN_CODE 77 TIMEOUT 300)
if(RECOUP_SANITIZE)
  # The installed library carries the sanitizers: the example must too.
  set_property(TEST api_example APPEND PROPERTY ENVIRONMENT
               "RECOUP_EXAMPLE_CFLAGS=-fsanitize=address,undefined -fno-omit-frame-pointer")
endif()
