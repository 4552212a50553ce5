# Data readers against files written by Debian's NumPy: scripts/ref_data_files.py
# (Debian's python3 with python3-numpy) writes .npy/.npz/gzipped IDX files into
# the build folder, then test_data_ref reads them and checks every value.
add_test(NAME data_ref_files
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_data_files.py
                 ${CMAKE_BINARY_DIR}/data_ref)
set_tests_properties(data_ref_files PROPERTIES FIXTURES_SETUP data_ref TIMEOUT 120)
set_tests_properties(test_data_ref PROPERTIES FIXTURES_REQUIRED data_ref)
