"""Sign arithmetic and the composition rules, exhaustively over their small enumerations.

The rules come from Boyd & Vandenberghe, Convex Optimization (2004), section 3.2.4: h(g1, ..., gk)
is convex if h is convex and, for each i, gi is affine, or gi is convex and h is nondecreasing in
argument i, or gi is concave and h is nonincreasing in it; concave mirrors this. Rather than
restating that table in code, every answer of objc/curvature.py is checked against functions:
each curvature and monotonicity class gets a few concrete one-variable representatives, and
numerical second differences on a grid must confirm what the rules claim (soundness), while for
every "not provable" answer some representatives must really break convexity and concavity
(the rules give up only where they have to).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from objc.curvature import (ArgumentFault, Curvature, Monotonicity, Sign, compose, curvature_add,
                            curvature_scale, sign_add, sign_mul)

C, M = Curvature, Monotonicity
GRID = np.linspace(-1.5, 1.5, 121)
TOL = 1e-9

# ---------------------------------------------------------------- signs as sets of numbers

# each sign stands for the numbers it allows; these samples include the boundary 0
SIGN_SAMPLES = {
    Sign.ZERO: [0.0],
    Sign.NONNEG: [0.0, 0.5, 3.0],
    Sign.NONPOS: [0.0, -0.5, -3.0],
    Sign.UNKNOWN: [-3.0, -0.5, 0.0, 0.5, 3.0],
}


def tightest_sign(values) -> Sign:
    """The smallest sign that allows every value."""
    values = list(values)
    if all(v == 0 for v in values):
        return Sign.ZERO
    if all(v >= 0 for v in values):
        return Sign.NONNEG
    if all(v <= 0 for v in values):
        return Sign.NONPOS
    return Sign.UNKNOWN


@pytest.mark.parametrize("a, b", list(itertools.product(Sign, repeat=2)))
def test_sign_of_a_sum_is_the_tightest_sound_sign(a: Sign, b: Sign) -> None:
    sums = [x + y for x in SIGN_SAMPLES[a] for y in SIGN_SAMPLES[b]]
    assert sign_add(a, b) == tightest_sign(sums)
    assert sign_add(a, b) == sign_add(b, a)


@pytest.mark.parametrize("a, b", list(itertools.product(Sign, repeat=2)))
def test_sign_of_a_product_is_the_tightest_sound_sign(a: Sign, b: Sign) -> None:
    products = [x * y for x in SIGN_SAMPLES[a] for y in SIGN_SAMPLES[b]]
    assert sign_mul(a, b) == tightest_sign(products)
    assert sign_mul(a, b) == sign_mul(b, a)


@pytest.mark.parametrize("s", list(Sign))
def test_sign_negation_and_predicates(s: Sign) -> None:
    assert s.negate() == tightest_sign(-v for v in SIGN_SAMPLES[s])
    assert s.negate().negate() == s
    assert s.is_nonneg == all(v >= 0 for v in SIGN_SAMPLES[s])
    assert s.is_nonpos == all(v <= 0 for v in SIGN_SAMPLES[s])


@pytest.mark.parametrize("v", [-2.5, -1e-12, 0.0, 1e-12, 7.0])
def test_sign_of_a_value(v: float) -> None:
    assert Sign.of_value(v) == tightest_sign([v])


BOUNDS = [-3.0, -1.0, 0.0, 0.5, 4.0]


@pytest.mark.parametrize("lo, hi", [(lo, hi) for lo in BOUNDS for hi in BOUNDS if lo <= hi])
def test_sign_of_a_declared_range(lo: float, hi: float) -> None:
    # a tunable declared within lo .. hi may take any value in between
    assert Sign.of_range(lo, hi) == tightest_sign(np.linspace(lo, hi, 9))


# ---------------------------------------------------------------- curvature of a grid function

def second_differences(f: np.ndarray) -> np.ndarray:
    return f[:-2] - 2 * f[1:-1] + f[2:]


def is_convex(f: np.ndarray) -> bool:
    return bool(np.all(second_differences(f) >= -TOL * (1 + np.abs(f[1:-1]))))


def is_concave(f: np.ndarray) -> bool:
    return is_convex(-f)


def is_constant(f: np.ndarray) -> bool:
    return bool(np.ptp(f) <= TOL)


def holds(claim: Curvature, f: np.ndarray) -> bool:
    """Does the function f (values on GRID) have the claimed curvature?"""
    return {C.CONSTANT: is_constant(f), C.AFFINE: is_convex(f) and is_concave(f), C.CONVEX: is_convex(f),
            C.CONCAVE: is_concave(f), C.UNKNOWN: True}[claim]


# Representatives of each curvature class, as functions of x on GRID. Convex and concave ones
# change sign, as an argument of unknown sign may. "not provable" ones are neither convex nor concave.
ARGS = {
    C.CONSTANT: [lambda x: 0.7 + 0 * x, lambda x: -1.3 + 0 * x],
    C.AFFINE: [lambda x: 2 * x - 1, lambda x: 0.5 - x],
    C.CONVEX: [lambda x: x ** 2 - 1, lambda x: np.exp(x) - 2, lambda x: np.abs(x) - 0.5],
    C.CONCAVE: [lambda x: 1 - x ** 2, lambda x: 2 - np.exp(x), lambda x: 0.5 - np.abs(x)],
    C.UNKNOWN: [lambda x: x ** 3, lambda x: np.sin(3 * x)],
}

# Representatives of outer functions h(t) by curvature and monotonicity (in t over the whole line).
# An affine function of one variable is monotone, so (AFFINE, NONE) has none.
ATOMS = {
    (C.CONVEX, M.INCREASING): [np.exp, lambda t: np.logaddexp(0, t)],
    (C.CONVEX, M.DECREASING): [lambda t: np.exp(-t), lambda t: np.logaddexp(0, -t)],
    (C.CONVEX, M.NONE): [lambda t: t ** 2, np.abs],
    (C.CONCAVE, M.INCREASING): [lambda t: -np.exp(-t), lambda t: np.minimum(t, 0)],
    (C.CONCAVE, M.DECREASING): [lambda t: -np.exp(t), lambda t: np.minimum(-t, 0)],
    (C.CONCAVE, M.NONE): [lambda t: -t ** 2, lambda t: -np.abs(t)],
    (C.AFFINE, M.INCREASING): [lambda t: 2 * t + 1],
    (C.AFFINE, M.DECREASING): [lambda t: -3 * t],
    (C.AFFINE, M.NONE): [],
    (C.UNKNOWN, M.INCREASING): [lambda t: t ** 3, np.tanh],
    (C.UNKNOWN, M.DECREASING): [lambda t: -t ** 3],
    (C.UNKNOWN, M.NONE): [lambda t: np.sin(2 * t) + t ** 2 / 10],
}


def test_representatives_have_their_classes() -> None:
    # the oracle's own footing: every representative is what it stands for
    for curv, fs in ARGS.items():
        for f in fs:
            v = f(GRID)
            assert holds(curv, v) if curv != C.UNKNOWN else not (is_convex(v) or is_concave(v))
    t = np.linspace(-4, 4, 161)
    for (curv, mono), hs in ATOMS.items():
        for h in hs:
            v = h(t)
            if curv == C.UNKNOWN:
                assert not (is_convex(v) or is_concave(v))
            else:
                assert holds(curv, v)
            if mono == M.INCREASING:
                assert np.all(np.diff(v) >= -TOL)
            elif mono == M.DECREASING:
                assert np.all(np.diff(v) <= TOL)
            else:
                assert np.any(np.diff(v) > TOL) and np.any(np.diff(v) < -TOL)


# ---------------------------------------------------------------- sums and constant factors

@pytest.mark.parametrize("a, b", list(itertools.product(Curvature, repeat=2)))
def test_curvature_of_a_sum(a: Curvature, b: Curvature) -> None:
    claim = curvature_add(a, b)
    assert claim == curvature_add(b, a)
    sums = [f(GRID) + g(GRID) for f in ARGS[a] for g in ARGS[b]]
    assert all(holds(claim, s) for s in sums), claim  # sound
    if claim == C.UNKNOWN:  # and tight: some sum really is neither
        assert any(not is_convex(s) for s in sums) and any(not is_concave(s) for s in sums)
    if claim in (C.CONVEX, C.CONCAVE):
        assert any(not is_constant(s) and not holds(C.AFFINE, s) for s in sums)


FACTORS = {Sign.ZERO: [0.0], Sign.NONNEG: [0.0, 0.5, 2.0], Sign.NONPOS: [0.0, -0.5, -2.0],
           Sign.UNKNOWN: [-2.0, 0.0, 2.0]}


@pytest.mark.parametrize("c, s", list(itertools.product(Curvature, Sign)))
def test_curvature_of_a_constant_multiple(c: Curvature, s: Sign) -> None:
    claim = curvature_scale(c, s)
    scaled = [k * f(GRID) for k in FACTORS[s] for f in ARGS[c]]
    assert all(holds(claim, v) for v in scaled), claim
    if claim == C.UNKNOWN:
        assert any(not is_convex(v) for v in scaled) and any(not is_concave(v) for v in scaled)


@pytest.mark.parametrize("c", list(Curvature))
def test_curvature_negation_and_predicates(c: Curvature) -> None:
    assert c.negate() == curvature_scale(c, Sign.NONPOS) or c == C.CONSTANT
    assert c.negate().negate() == c
    for f in ARGS[c]:
        v = f(GRID)
        if c.is_convex:
            assert is_convex(v)
        if c.is_concave:
            assert is_concave(v)
        if c.is_affine:
            assert is_convex(v) and is_concave(v)


@pytest.mark.parametrize("m", list(Monotonicity))
def test_monotonicity_flip(m: Monotonicity) -> None:
    # h(-t) reverses the direction of h
    assert m.flip().flip() == m
    for (curv, mono), hs in ATOMS.items():
        if mono != m:
            continue
        for h in hs:
            v = h(-np.linspace(-4, 4, 161))
            if m.flip() == M.INCREASING:
                assert np.all(np.diff(v) >= -TOL)
            elif m.flip() == M.DECREASING:
                assert np.all(np.diff(v) <= TOL)


# ---------------------------------------------------------------- the composition rules

ATOM_KEYS = list(ATOMS)


def _cases_one_argument():
    return [(atom, mono, arg) for (atom, mono) in ATOM_KEYS for arg in Curvature]


@pytest.mark.parametrize("atom, mono, arg", _cases_one_argument())
def test_composition_with_one_argument(atom: Curvature, mono: Monotonicity, arg: Curvature) -> None:
    claim, faults = compose(atom, [(arg, mono)])
    compositions = [h(g(GRID)) for h in ATOMS[(atom, mono)] for g in ARGS[arg]]
    assert all(holds(claim, v) for v in compositions), claim  # sound
    if claim == C.UNKNOWN and compositions:  # tight
        assert any(not is_convex(v) for v in compositions) and any(not is_concave(v) for v in compositions)
    # a fault is given exactly when the answer is "not provable", and it names the argument
    assert (claim == C.UNKNOWN) == bool(faults)
    if faults:
        (fault,) = faults
        assert isinstance(fault, ArgumentFault) and fault.index == 0 and fault.arg_curvature == arg
        assert fault.monotonicity == mono


@pytest.mark.parametrize("atom, mono, arg", _cases_one_argument())
def test_composition_matches_the_textbook_rule(atom: Curvature, mono: Monotonicity, arg: Curvature) -> None:
    # Boyd & Vandenberghe 2004, eq. (3.10)-(3.11) and the vector form that follows, one argument
    claim, _ = compose(atom, [(arg, mono)])
    up, down = mono == M.INCREASING, mono == M.DECREASING
    if arg == C.CONSTANT:
        expected = C.CONSTANT
    elif atom == C.AFFINE and arg == C.AFFINE:
        expected = C.AFFINE
    elif atom in (C.CONVEX, C.AFFINE) and (arg == C.AFFINE or (up and arg == C.CONVEX) or
                                          (down and arg == C.CONCAVE)):
        expected = C.CONVEX
    elif atom in (C.CONCAVE, C.AFFINE) and (arg == C.AFFINE or (up and arg == C.CONCAVE) or
                                           (down and arg == C.CONVEX)):
        expected = C.CONCAVE
    else:
        expected = C.UNKNOWN
    assert claim == expected


def _cases_two_arguments():
    out = []
    for atom in (C.CONVEX, C.CONCAVE, C.AFFINE, C.UNKNOWN):
        for m1, m2 in itertools.product(Monotonicity, repeat=2):
            if not ATOMS[(atom, m1)] or not ATOMS[(atom, m2)]:
                continue
            for a1, a2 in itertools.product(Curvature, repeat=2):
                out.append((atom, m1, m2, a1, a2))
    return out


@pytest.mark.parametrize("atom, m1, m2, a1, a2", _cases_two_arguments())
def test_composition_with_two_arguments(atom, m1, m2, a1, a2) -> None:
    # h(t1, t2) = h1(t1) + h2(t2): of the atom's curvature, with monotonicity m1 in t1 and m2 in t2
    claim, faults = compose(atom, [(a1, m1), (a2, m2)])
    compositions = [h1(g1(GRID)) + h2(g2(GRID))
                    for h1 in ATOMS[(atom, m1)][:1] for h2 in ATOMS[(atom, m2)][:1]
                    for g1 in ARGS[a1] for g2 in ARGS[a2]]
    assert all(holds(claim, v) for v in compositions), claim
    # each argument the rule rejects is named, and no other
    if claim == C.UNKNOWN and atom != C.UNKNOWN:
        wanted_convex = atom in (C.CONVEX, C.AFFINE)
        bad = []
        for i, (a, m) in enumerate([(a1, m1), (a2, m2)]):
            fine = a.is_affine or (m == M.INCREASING and a == (C.CONVEX if wanted_convex else C.CONCAVE)) or \
                (m == M.DECREASING and a == (C.CONCAVE if wanted_convex else C.CONVEX))
            if not fine:
                bad.append(i)
        assert [f.index for f in faults] == bad
    if claim == C.UNKNOWN:
        assert faults


def test_an_atom_of_unknown_curvature_is_constant_only_on_constants() -> None:
    assert compose(C.UNKNOWN, [(C.CONSTANT, M.INCREASING)]) == (C.CONSTANT, ())
    claim, faults = compose(C.UNKNOWN, [(C.AFFINE, M.INCREASING), (C.CONSTANT, M.NONE)])
    assert claim == C.UNKNOWN and [f.index for f in faults] == [0]
