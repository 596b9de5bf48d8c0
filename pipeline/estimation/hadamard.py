"""Hadamard matrices for balanced repeated replication.

A Hadamard matrix of order n is an n x n matrix A of +1/-1 with A A^T = n I. Its columns, after
normalising the first column to all +1, are mutually orthogonal and every other column has as
many +1 as -1: exactly what a balanced set of half-samples needs (Wolter 2007, Introduction to
Variance Estimation, 2nd ed., section 4.2; McCarthy 1969).

Constructions built here (each checked with A A^T = n I when built):
- Sylvester (1867): A_{2n} = [[A_n, A_n], [A_n, -A_n]], from A_1 = [1].
- Paley I (1933): q a prime power, q = 3 (mod 4), order q + 1 (skew type),
  A = I + [[0, 1^T], [-1, Q]] with Q the Jacobsthal matrix Q[a, b] = chi(a - b).
- Paley II (1933): q a prime power, q = 1 (mod 4), order 2 (q + 1), from the symmetric
  conference matrix C = [[0, 1^T], [1, Q]]: A = C (x) [[1, 1], [1, -1]] + I (x) [[1, -1], [-1, -1]].
- Kronecker products A_a (x) A_b (order a b).
chi is the quadratic character of the finite field GF(q) (1 on non-zero squares, -1 on
non-squares, 0 at 0); fields GF(p^k) with k > 1 are built from an irreducible polynomial found by
search. Orders that none of these reach (the smallest are 92, 116, 156, 172, 184, 188) are
skipped by `order_at_least`, which then returns the next constructible order.
"""

from __future__ import annotations

from functools import cache

import numpy as np


def _is_prime(n: int) -> bool:
    return n > 1 and all(n % d for d in range(2, int(n**0.5) + 1))


def _prime_power(q: int) -> tuple[int, int] | None:
    """(p, k) with q = p^k for a prime p, or None."""
    for p in range(2, q + 1):
        if q % p == 0:
            if not _is_prime(p):
                return None
            k = 0
            while q % p == 0:
                q //= p
                k += 1
            return (p, k) if q == 1 else None
    return None


def _irreducible(p: int, k: int) -> np.ndarray:
    """Coefficients c_0..c_{k-1} of a monic irreducible x^k + c_{k-1} x^{k-1} + ... + c_0 over GF(p).

    A polynomial of degree k is irreducible iff it has no monic factor of degree 1..k//2; for
    the small fields used here a search over candidates with a root test and trial division is
    enough (from memory: standard finite-field arithmetic).
    """
    for code in range(p**k):
        c = np.array([(code // p**i) % p for i in range(k)], dtype=np.int64)
        poly = np.concatenate([c, [1]])
        if all(_poly_mod(poly, f, p).any() for d in range(1, k // 2 + 1) for f in _monic(p, d)):
            return c
    raise ValueError(f"no irreducible polynomial of degree {k} over GF({p})")


def _monic(p: int, d: int) -> list[np.ndarray]:
    return [np.array([(code // p**i) % p for i in range(d)] + [1], dtype=np.int64) for code in range(p**d)]


def _poly_mod(a: np.ndarray, b: np.ndarray, p: int) -> np.ndarray:
    """Remainder of polynomial a by monic b over GF(p) (coefficients lowest degree first)."""
    a = a.copy()
    for shift in range(len(a) - len(b), -1, -1):
        lead = a[shift + len(b) - 1]
        if lead:
            a[shift : shift + len(b)] = (a[shift : shift + len(b)] - lead * b) % p
    return a[: len(b) - 1]


def _quadratic_character_table(q: int) -> np.ndarray:
    """chi(a - b) for all elements a, b of GF(q): a (q, q) array of 0, 1, -1."""
    p, k = _prime_power(q)  # type: ignore[misc]
    if k == 1:
        elements = np.arange(q)
        squares = np.zeros(q, dtype=bool)
        squares[(elements * elements) % q] = True
        diff = (elements[:, None] - elements[None, :]) % q
    else:
        digits = np.array([[(e // p**i) % p for i in range(k)] for e in range(q)], dtype=np.int64)
        c = _irreducible(p, k)
        # product of each element with itself: polynomial square, reduced by x^k = -(c_0 + ... )
        sq = np.zeros((q, 2 * k - 1), dtype=np.int64)
        for i in range(k):
            for j in range(k):
                sq[:, i + j] += digits[:, i] * digits[:, j]
        for deg in range(2 * k - 2, k - 1, -1):
            lead = sq[:, deg] % p
            sq[:, deg] = 0
            sq[:, deg - k : deg] -= lead[:, None] * c[None, :]
        sq = sq[:, :k] % p
        weights = p ** np.arange(k)
        squares = np.zeros(q, dtype=bool)
        squares[sq @ weights] = True
        diff_digits = (digits[:, None, :] - digits[None, :, :]) % p
        diff = diff_digits @ weights
    chi = np.where(squares[diff], 1, -1).astype(np.int8)
    chi[diff == 0] = 0
    return chi


def _paley_one(q: int) -> np.ndarray:
    chi = _quadratic_character_table(q)
    s = np.zeros((q + 1, q + 1), dtype=np.int8)
    s[0, 1:] = 1
    s[1:, 0] = -1
    s[1:, 1:] = chi
    return s + np.eye(q + 1, dtype=np.int8)


def _paley_two(q: int) -> np.ndarray:
    chi = _quadratic_character_table(q)
    c = np.zeros((q + 1, q + 1), dtype=np.int8)
    c[0, 1:] = 1
    c[1:, 0] = 1
    c[1:, 1:] = chi
    block_c = np.array([[1, 1], [1, -1]], dtype=np.int8)
    block_i = np.array([[1, -1], [-1, -1]], dtype=np.int8)
    return np.kron(c, block_c) + np.kron(np.eye(q + 1, dtype=np.int8), block_i)


@cache
def _recipe(n: int) -> tuple | None:
    """How to build order n: ("unit",), ("two",), ("paley1", q), ("paley2", q), ("kron", a, b), or None."""
    if n == 1:
        return ("unit",)
    if n == 2:
        return ("two",)
    if n % 4:
        return None
    if _prime_power(n - 1) and (n - 1) % 4 == 3:
        return ("paley1", n - 1)
    if _prime_power(n // 2 - 1) and (n // 2 - 1) % 4 == 1:
        return ("paley2", n // 2 - 1)
    for a in range(2, int(n**0.5) + 1):
        if n % a == 0 and _recipe(a) is not None and _recipe(n // a) is not None:
            return ("kron", a, n // a)
    return None


def _build(n: int) -> np.ndarray:
    recipe = _recipe(n)
    if recipe is None:
        raise ValueError(f"no Hadamard construction of order {n} is built in")
    if recipe[0] == "unit":
        return np.ones((1, 1), dtype=np.int8)
    if recipe[0] == "paley1":
        return _paley_one(recipe[1])
    if recipe[0] == "paley2":
        return _paley_two(recipe[1])
    if recipe[0] == "two":
        return np.array([[1, 1], [1, -1]], dtype=np.int8)
    return np.kron(_build(recipe[1]), _build(recipe[2]))


def is_constructible(n: int) -> bool:
    """Whether `hadamard(n)` can build order n (n = 1, 2, or a multiple of 4 reached above)."""
    return n >= 1 and _recipe(n) is not None


def order_at_least(k: int) -> int:
    """The smallest constructible Hadamard order >= k (a multiple of 4 when k > 2)."""
    n = max(k, 1)
    while not is_constructible(n):
        n += 1
    return n


@cache
def _normalised(n: int) -> np.ndarray:
    a = _build(n).astype(np.int8)
    a = a * a[:, :1]  # rows times their first entry: first column all +1
    a = a * a[:1, :]  # columns times their first entry: first row all +1
    af = a.astype(np.float64)  # exact: entries of A A^T are integers <= n
    if not np.array_equal(af @ af.T, n * np.eye(n)):
        raise AssertionError(f"Hadamard construction of order {n} failed its check")
    a.setflags(write=False)
    return a


def hadamard(n: int) -> np.ndarray:
    """A normalised Hadamard matrix of order n (int8, first row and first column all +1).

    A A^T = n I (checked at construction). Built by Sylvester doubling, Paley I/II and Kronecker
    products (module docstring); raises ValueError for orders not built in.
    """
    return _normalised(n)
