# Image folders and lists against Debian's python3-pil and Fashion-MNIST
# (tests/images_test.py); the sanitizer build skips the 10,000-image folders.
if(RECOUP_SANITIZE)
  set(RECOUP_IMAGES_QUICK --quick)
endif()
add_test(NAME images
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/images_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/images_test ${RECOUP_IMAGES_QUICK})
set_tests_properties(images PROPERTIES TIMEOUT 600)
