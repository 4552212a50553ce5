# recoup distill (and batch) over MPI ranks against one process
# (tests/mpi_test.py); only when the build found MPI and mpirun exists.
find_program(RECOUP_MPIRUN NAMES mpirun mpiexec)
if(MPI_C_FOUND AND RECOUP_MPIRUN)
  add_test(NAME mpi_ranks
           COMMAND ${RECOUP_PYTHON} ${CMAKE_CURRENT_SOURCE_DIR}/mpi_test.py $<TARGET_FILE:recoup> ${RECOUP_MPIRUN}
                   ${PROJECT_SOURCE_DIR} ${CMAKE_BINARY_DIR}/mpi_test)
  set_tests_properties(mpi_ranks PROPERTIES TIMEOUT 600 SKIP_RETURN_CODE 77)
endif()
