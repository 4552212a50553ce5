# Image sets decoded per batch by the prefetch ring: peak memory bounded by
# the ring, outputs equal to decoding up front, --skip-bad mid-run, MPI ranks
# reading their own rows (tests/prefetch_test.py).
find_program(RECOUP_MPIRUN NAMES mpirun mpiexec)
set(RECOUP_PREFETCH_MPIRUN "")
if(MPI_C_FOUND AND RECOUP_MPIRUN)
  set(RECOUP_PREFETCH_MPIRUN ${RECOUP_MPIRUN})
endif()
add_test(NAME images_prefetch
         COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/prefetch_test.py $<TARGET_FILE:recoup>
                 ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/prefetch_test ${RECOUP_PREFETCH_MPIRUN})
set_tests_properties(images_prefetch PROPERTIES TIMEOUT 300)
