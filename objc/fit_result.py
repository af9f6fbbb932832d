"""What every backend returns from training, and the reference evaluation of an objective.

`objective_terms` evaluates the typed tree directly (slow, exact); backends use it to report each
term's value and tests use it to compare backends on equal terms.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from objc.checker import CheckedObjective, EvalEnv, evaluate
from objc.score_form import ScoreForm, class_scores, design


@dataclass(frozen=True)
class Certificate:
    """How far from optimal the answer may be: a duality gap, an optimality residual, or only the
    solver's own status. `absolute` and `relative` (absolute / max(1, |objective|)) bound the excess."""

    kind: str  # "duality gap", "optimality residual", "solver status"
    absolute: float | None
    relative: float | None
    tolerance: float | None = None
    note: str = ""
    # the distance of the reported parameters to the exact optimum: a proved bound on the Euclidean norm
    # of the error of all learned parameters together (None where none is proved), the strong-convexity
    # modulus it rests on, which bound and why (or why none), and the tolerance the fit stopped at
    distance: float | None = None
    curvature: float | None = None
    distance_note: str = ""
    param_tolerance: float | None = None
    # a proved bound on ||w - w*|| for the weights alone: `distance` where that exists, else the bound a
    # ridge weight on every weight gives when the intercept is free and the loss flat (the intercept then
    # has none); None where no bound is proved
    weights_distance: float | None = None


@dataclass(frozen=True)
class FitResult:
    params: dict[str, np.ndarray | float]  # by parameter name; vectors follow the input order
    objective: float
    term_values: tuple[float, ...]  # one per checked.terms, coefficient included
    status: str  # "optimal", "optimal (inaccurate)", "local (non-convex)", "max iterations", ...
    backend: str  # "numpy" or "cvxpy"
    method: str  # e.g. "L-BFGS", "accelerated proximal gradient", "CLARABEL"
    certificate: Certificate
    iterations: int = 0
    passes: int = 0  # full passes over the data (X @ v or X.T @ u count one each)
    seconds: float = 0.0
    extra: dict = field(default_factory=dict)


def theta_from_params(form: ScoreForm, params: dict[str, np.ndarray | float]) -> np.ndarray:
    theta = np.zeros(form.size)
    for s in form.slots:
        theta[s.start:s.start + s.size] = np.atleast_1d(np.asarray(params[s.name], dtype=float))
    return theta


def params_from_theta(form: ScoreForm, theta: np.ndarray) -> dict[str, np.ndarray | float]:
    return {s.name: (np.array(theta[s.start:s.start + s.size], dtype=float) if s.vector
                     else float(theta[s.start])) for s in form.slots}


def objective_terms(checked: CheckedObjective, form: ScoreForm | None, X: np.ndarray, y: np.ndarray,
                    weights: np.ndarray, params: dict[str, np.ndarray | float],
                    tunables: dict[str, float] | None = None) -> tuple[float, tuple[float, ...]]:
    """The objective and each goal term at `params`, evaluated from the typed tree (`form` is None
    for a multiclass score W . x + b, whose K scores per row come from `class_scores`)."""
    if form is None:
        score = class_scores(checked, params, X)
        # a multiclass goal reads the inputs only through its score: the columns need no names
        input_names: tuple[str, ...] = tuple(f"_input{j}" for j in range(X.shape[1]))
    else:
        A, off = design(form, X, y)
        score = A @ theta_from_params(form, params) + off
        input_names = form.input_names
    env = EvalEnv(list(input_names), dict(params), {n: X[:, i] for i, n in enumerate(input_names)}, y,
                  score, dict(tunables or {}), weights)
    with np.errstate(over="ignore"):
        values = tuple(float(np.sum(evaluate(t.expr, env))) for t in checked.terms)
    return float(sum(values)), values
