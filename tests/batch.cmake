# recoup batch over a small zoo: broken job, kill and resume, shards, merged
# and HTML reports (headless Chromium from Debian's chromium package).
add_test(NAME batch_zoo
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/batch_test.py $<TARGET_FILE:recoup>
                 ${CMAKE_BINARY_DIR}/batch_test)
set_tests_properties(batch_zoo PROPERTIES TIMEOUT 600 SKIP_RETURN_CODE 77)
