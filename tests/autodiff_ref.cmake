# Whole-model gradients against PyTorch: needs the exported reference models.
set_tests_properties(test_autodiff_ref PROPERTIES FIXTURES_REQUIRED reference_models)
