"""Curvature, sign and monotonicity values and the composition rules, knowing no atom.

The rules are those of disciplined convex programming (Grant, Boyd & Ye 2006; Boyd &
Vandenberghe 2004, section 3.2.4): f(g1..gk) is convex when f is convex and every argument is
affine, or convex where f is nondecreasing in it, or concave where f is nonincreasing in it.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum


class Curvature(str, Enum):
    CONSTANT = "constant"
    AFFINE = "affine"
    CONVEX = "convex"
    CONCAVE = "concave"
    UNKNOWN = "not provable"

    @property
    def is_convex(self) -> bool:
        return self in (Curvature.CONSTANT, Curvature.AFFINE, Curvature.CONVEX)

    @property
    def is_concave(self) -> bool:
        return self in (Curvature.CONSTANT, Curvature.AFFINE, Curvature.CONCAVE)

    @property
    def is_affine(self) -> bool:
        return self in (Curvature.CONSTANT, Curvature.AFFINE)

    def negate(self) -> "Curvature":
        return {Curvature.CONVEX: Curvature.CONCAVE, Curvature.CONCAVE: Curvature.CONVEX}.get(self, self)


class Sign(str, Enum):
    ZERO = "zero"
    NONNEG = "nonnegative"
    NONPOS = "nonpositive"
    UNKNOWN = "unknown sign"

    @property
    def is_nonneg(self) -> bool:
        return self in (Sign.ZERO, Sign.NONNEG)

    @property
    def is_nonpos(self) -> bool:
        return self in (Sign.ZERO, Sign.NONPOS)

    def negate(self) -> "Sign":
        return {Sign.NONNEG: Sign.NONPOS, Sign.NONPOS: Sign.NONNEG}.get(self, self)

    @staticmethod
    def of_value(v: float) -> "Sign":
        if v == 0:
            return Sign.ZERO
        return Sign.NONNEG if v > 0 else Sign.NONPOS

    @staticmethod
    def of_range(lo: float, hi: float) -> "Sign":
        if lo == 0 and hi == 0:
            return Sign.ZERO
        if lo >= 0:
            return Sign.NONNEG
        if hi <= 0:
            return Sign.NONPOS
        return Sign.UNKNOWN


class Monotonicity(str, Enum):
    INCREASING = "nondecreasing"
    DECREASING = "nonincreasing"
    NONE = "not monotone"

    def flip(self) -> "Monotonicity":
        return {Monotonicity.INCREASING: Monotonicity.DECREASING,
                Monotonicity.DECREASING: Monotonicity.INCREASING}.get(self, self)


def _shared_fact(a, b, ladder, fallback):
    """The first fact on `ladder` (most specific first, each with its test) that a and b both have:
    the sum of two expressions has every property both summands share."""
    return next((fact for fact, holds in ladder if holds(a) and holds(b)), fallback)


def sign_add(a: Sign, b: Sign) -> Sign:
    return _shared_fact(a, b, ((Sign.ZERO, lambda s: s == Sign.ZERO), (Sign.NONNEG, lambda s: s.is_nonneg),
                               (Sign.NONPOS, lambda s: s.is_nonpos)), Sign.UNKNOWN)


def sign_mul(a: Sign, b: Sign) -> Sign:
    if a == Sign.ZERO or b == Sign.ZERO:
        return Sign.ZERO
    if Sign.UNKNOWN in (a, b):
        return Sign.UNKNOWN
    return Sign.NONNEG if a == b else Sign.NONPOS


def curvature_add(a: Curvature, b: Curvature) -> Curvature:
    return _shared_fact(a, b, ((Curvature.CONSTANT, lambda c: c == Curvature.CONSTANT),
                               (Curvature.AFFINE, lambda c: c.is_affine), (Curvature.CONVEX, lambda c: c.is_convex),
                               (Curvature.CONCAVE, lambda c: c.is_concave)), Curvature.UNKNOWN)


def curvature_scale(c: Curvature, factor_sign: Sign) -> Curvature:
    """Curvature of a constant factor times an expression of curvature c."""
    if factor_sign == Sign.ZERO or c == Curvature.CONSTANT:
        return Curvature.CONSTANT
    if c == Curvature.AFFINE:
        return Curvature.AFFINE
    if factor_sign == Sign.NONNEG:
        return c
    if factor_sign == Sign.NONPOS:
        return c.negate()
    return Curvature.UNKNOWN


@dataclass(frozen=True)
class ArgumentFault:
    """Why one argument stops a composition from being proved convex (or concave)."""

    index: int
    arg_curvature: Curvature
    monotonicity: Monotonicity
    wanted: str  # "convex" or "concave": what the outer function needed the result to be


def compose(atom_curvature: Curvature, args: list[tuple[Curvature, Monotonicity]]
            ) -> tuple[Curvature, tuple[ArgumentFault, ...]]:
    """The curvature of atom(args) by the composition rules, and the arguments that broke them.

    `args` holds each argument's curvature and the atom's monotonicity in that argument (already
    resolved for the argument's sign).
    """
    if all(c == Curvature.CONSTANT for c, _ in args):
        return Curvature.CONSTANT, ()
    if atom_curvature == Curvature.AFFINE and all(c.is_affine for c, _ in args):
        return Curvature.AFFINE, ()

    def faults_for(target: str) -> list[ArgumentFault]:
        out = []
        for i, (c, m) in enumerate(args):
            if c.is_affine:
                continue
            want_up = Curvature.CONVEX if target == "convex" else Curvature.CONCAVE
            ok = (m == Monotonicity.INCREASING and c == want_up) or (
                m == Monotonicity.DECREASING and c == want_up.negate())
            if not ok:
                out.append(ArgumentFault(i, c, m, target))
        return out

    if atom_curvature in (Curvature.CONVEX, Curvature.AFFINE):
        f = faults_for("convex")
        if not f:
            return Curvature.CONVEX, ()
        if atom_curvature == Curvature.AFFINE:
            g = faults_for("concave")
            if not g:
                return Curvature.CONCAVE, ()
        return Curvature.UNKNOWN, tuple(f)
    if atom_curvature == Curvature.CONCAVE:
        f = faults_for("concave")
        return (Curvature.CONCAVE, ()) if not f else (Curvature.UNKNOWN, tuple(f))
    return Curvature.UNKNOWN, tuple(ArgumentFault(i, c, m, "convex") for i, (c, m) in enumerate(args)
                                    if c != Curvature.CONSTANT)
