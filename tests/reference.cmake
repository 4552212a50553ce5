# Whole models against PyTorch (Debian python3-torch): the fixture exports
# random-initialised reference models with their inputs, outputs and
# gradients into the build folder (scripts/export_reference_models.py), then
# test_reference runs every case through recoup's planner and compares.
add_test(NAME reference_models_export
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/export_reference_models.py
                 ${CMAKE_BINARY_DIR}/reference)
set_tests_properties(reference_models_export PROPERTIES FIXTURES_SETUP reference_models TIMEOUT 1200)
if(TEST test_reference)
  set_tests_properties(test_reference PROPERTIES FIXTURES_REQUIRED reference_models)
endif()
