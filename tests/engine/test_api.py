"""The public names of drift.engine (a contract: issue text) all resolve (common practice, no source)."""

from drift import engine


def test_every_exported_name_resolves() -> None:
    for name in engine.__all__:
        assert getattr(engine, name) is not None, name


def test_contract_names_present() -> None:
    for name in ("recursive_residuals", "chow", "predictive_failure", "sup_f", "TestResult"):
        assert name in engine.__all__


def test_functions_named_like_their_module_stay_functions() -> None:
    import drift.engine.cusum
    import drift.engine.monitor  # noqa: F401

    assert callable(engine.monitor) and callable(engine.cusum)
