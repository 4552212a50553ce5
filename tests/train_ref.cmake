# Training numerics against PyTorch: scripts/ref_train.py (Debian's python3
# with python3-torch) writes reference arrays into the build folder, then
# test_train_ref replays them through our losses, optimizers and clipping.
add_test(NAME train_ref_data
         COMMAND ${RECOUP_PYTHON} ${PROJECT_SOURCE_DIR}/scripts/ref_train.py
                 ${CMAKE_BINARY_DIR}/train_ref)
set_tests_properties(train_ref_data PROPERTIES FIXTURES_SETUP train_ref TIMEOUT 300)
set_tests_properties(test_train_ref PROPERTIES FIXTURES_REQUIRED train_ref)
