"""objc: compile a training objective written in a short text spec into a checked solver.

The public surface:

    from objc import check_text, check_file, SpecError
    checked = check_text(open("spec.objc").read(), "spec.objc")
    checked.verdict, checked.accepted, checked.terms, checked.warnings, checked.expanded

    from objc import fit_spec, load_trained
    model = fit_spec("spec.objc", backend="numpy")      # or backend="cvxpy"
    model.predict(X); model.decision_function(X); model.predict_table("new.csv")
    model.save("out/model.json"); load_trained("out/model.json")

    from objc import spec_estimator                     # needs scikit-learn
    est = spec_estimator("spec.objc", lam=0.1)          # a scikit-learn estimator; tunables are parameters
"""

__version__ = "0.1.0"
__all__ = ["check_text", "check_file", "fit_spec", "load_trained", "SpecError", "Diagnostic", "spec_estimator",
           "spec_estimator_class", "SpecEstimator", "SpecClassifier", "SpecRegressor", "EstimatorInputError",
           "__version__"]

_ESTIMATOR_NAMES = ("spec_estimator", "spec_estimator_class", "SpecEstimator", "SpecClassifier", "SpecRegressor",
                    "EstimatorInputError")


def __getattr__(name: str):
    # every name is loaded on first use, so `python -m objc` can catch a Ctrl-C that lands while the
    # parser and the backends are still being imported; training pulls in pandas and the backends
    if name in ("SpecError", "Diagnostic"):
        from objc import diagnostics
        return getattr(diagnostics, name)
    if name in ("check_text", "check_file"):
        from objc import frontend
        return getattr(frontend, name)
    if name in ("fit_spec", "load_trained", "TrainedModel"):
        from objc import training
        return getattr(training, name)
    if name in _ESTIMATOR_NAMES:  # scikit-learn is imported only by those who ask for an estimator
        from objc import estimator
        return getattr(estimator, name)
    raise AttributeError(f"module 'objc' has no attribute {name!r}")
