"""Exact samplers of discrete Laplace and discrete Gaussian noise, in integer arithmetic only.

The algorithms are those of Canonne, Kamath & Steinke, "The Discrete Gaussian for Differential
Privacy" (NeurIPS 2020), Algorithms 1-3. Every probability is a ``fractions.Fraction`` and every
coin is drawn as a uniform integer, so no floating-point number takes part in a draw: the
attack on floating-point Laplace noise (Mironov, CCS 2012) has nothing to work on.
"""

from __future__ import annotations

import math
import random
import secrets
from fractions import Fraction
from typing import Protocol

__all__ = [
    "IntegerSource",
    "bernoulli",
    "bernoulli_exp",
    "discrete_gaussian",
    "discrete_laplace",
    "integer_source",
]


class IntegerSource(Protocol):
    """What the samplers need of a random source: uniform integers in [0, n)."""

    def randrange(self, n: int, /) -> int:
        """A uniform integer in [0, n)."""
        ...


def integer_source(seed: int | None) -> IntegerSource:
    """The operating system's randomness (``secrets``), or a seeded source for tests only.

    A seeded source makes a release reproducible, and so not private against anyone who knows
    the seed.
    """
    if seed is None:
        return secrets.SystemRandom()
    return random.Random(seed)


def bernoulli(p: Fraction, rng: IntegerSource) -> bool:
    """True with probability ``p`` (0 <= p <= 1): a uniform integer below p's denominator."""
    return rng.randrange(p.denominator) < p.numerator


def _bernoulli_exp_unit(num: int, den: int, rng: IntegerSource) -> bool:
    """True with probability exp(-num/den), 0 <= num <= den (CKS 2020, Algorithm 1, first part).

    Draw Bernoulli(gamma / k) for k = 1, 2, ... until one fails; true when k is odd.
    """
    k = 1
    while rng.randrange(den * k) < num:
        k += 1
    return k % 2 == 1


def _bernoulli_exp_ratio(num: int, den: int, rng: IntegerSource) -> bool:
    """True with probability exp(-num/den), num >= 0, den > 0 (CKS 2020, Algorithm 1)."""
    whole, rest = divmod(num, den)
    for _ in range(whole):
        if not _bernoulli_exp_unit(1, 1, rng):
            return False
    return _bernoulli_exp_unit(rest, den, rng)


def bernoulli_exp(gamma: Fraction, rng: IntegerSource) -> bool:
    """True with probability exp(-gamma), gamma >= 0 (CKS 2020, Algorithm 1)."""
    if gamma < 0:
        raise ValueError(f"bernoulli_exp needs gamma >= 0, got {gamma}")
    return _bernoulli_exp_ratio(gamma.numerator, gamma.denominator, rng)


def discrete_laplace(scale: Fraction, rng: IntegerSource) -> int:
    """One draw with P(x) proportional to exp(-|x| / scale) over the integers (CKS 2020, Alg. 2).

    ``scale`` = t / s in the paper's notation; its numerator and denominator are the integers t
    and s. A scale of 0 gives 0 (no noise).
    """
    if scale < 0:
        raise ValueError(f"a discrete Laplace scale must be >= 0, got {scale}")
    if scale == 0:
        return 0
    t, s = scale.numerator, scale.denominator
    while True:
        u = rng.randrange(t)
        if not _bernoulli_exp_unit(u, t, rng):
            continue
        v = 0
        while _bernoulli_exp_unit(1, 1, rng):
            v += 1
        y = (u + t * v) // s
        negative = rng.randrange(2) == 1
        if negative and y == 0:
            continue
        return -y if negative else y


def discrete_gaussian(sigma2: Fraction, rng: IntegerSource) -> int:
    """One draw with P(x) proportional to exp(-x^2 / (2 sigma2)) over the integers.

    CKS 2020, Algorithm 3. A variance of 0 gives 0 (no noise).
    """
    if sigma2 < 0:
        raise ValueError(f"a discrete Gaussian variance must be >= 0, got {sigma2}")
    if sigma2 == 0:
        return 0
    # floor(sqrt(p/q)) = floor(isqrt(p*q) / q), exactly.
    p, q = sigma2.numerator, sigma2.denominator
    t = math.isqrt(p * q) // q + 1
    scale = Fraction(t)
    while True:
        y = discrete_laplace(scale, rng)
        # gamma = (|y| - sigma2/t)^2 / (2 sigma2) = (|y| t q - p)^2 / (2 t^2 q p), exactly.
        num = (abs(y) * t * q - p) ** 2
        if _bernoulli_exp_ratio(num, 2 * t * t * q * p, rng):
            return y
