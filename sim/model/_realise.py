"""Transfer-function matrices to minimal state-space models.

A controls engineer brings G(s) as a matrix of num/den entries, or as zeros, poles and
a gain. Each entry is realised on its own (scipy.signal.tf2ss, controllable canonical
form), the entries are stacked into one block model (states add up), and the parts that
the inputs cannot reach or the outputs cannot see are removed by orthogonal staircase
reductions (the Kalman decomposition; Chen, Linear System Theory and Design, 3rd ed.,
section 6.4, and section 7.2 for "controllable and observable = minimal"; sections from
memory). The result has as many states as the McMillan degree of G(s). Orthogonal
transformations keep it well conditioned; the states have no physical meaning, so the
rig file may leave them unnamed.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import scipy.linalg
import scipy.signal
from numpy.typing import NDArray

from plantrig.sim.model._plant import ModelError

Matrix = NDArray[np.float64]
RANK_TOL = 1e-9   # relative to the model's scale: directions below it are cancelled


def _poly(value: Any, key: str) -> NDArray[np.float64]:
    try:
        array = np.atleast_1d(np.array(value, dtype=np.float64))
    except (TypeError, ValueError) as exc:
        raise ModelError(key, f"expected a list of coefficients, found {value!r}") \
            from exc
    if array.ndim != 1:
        raise ModelError(key, "expected a list of coefficients (highest power first)")
    if not np.all(np.isfinite(array)):
        raise ModelError(key, "contains NaN or infinite coefficients")
    return array


def siso_entry(num: Any, den: Any, key: str = "") -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """One proper num(s)/den(s), highest power first, as (A, B, C, D)."""
    num_a = np.trim_zeros(_poly(num, f"num{key}"), "f")
    den_a = np.trim_zeros(_poly(den, f"den{key}"), "f")
    if den_a.size == 0:
        raise ModelError(f"den{key}", "denominator is all zeros")
    if num_a.size == 0:
        num_a = np.zeros(1)
    if num_a.size > den_a.size:
        raise ModelError(
            f"num{key}", f"order {num_a.size - 1} exceeds denominator order "
                         f"{den_a.size - 1} (improper transfer function)")
    if den_a.size == 1:
        return np.zeros((0, 0)), np.zeros((0, 1)), np.zeros((1, 0)), \
            np.array([[num_a[-1] / den_a[0]]])
    a, b, c, d = scipy.signal.tf2ss(num_a, den_a)
    return a, b, c, d


def zpk_to_num_den(zeros: Sequence[complex], poles: Sequence[complex],
                   gain: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """k prod(s - z) / prod(s - p) as real polynomials; complex roots need their conjugates."""
    for key, roots in (("zeros", zeros), ("poles", poles)):
        r = np.asarray(roots, dtype=complex)
        if not np.all(np.isfinite(r)):
            raise ModelError(key, "contains NaN or infinite values")
        if np.any(np.abs(np.sort_complex(r) - np.sort_complex(r.conj())) >
                  1e-9 * max(1.0, float(np.max(np.abs(r), initial=0.0)))):
            raise ModelError(key, "a complex value needs its conjugate in the list "
                                        "(a real system's roots come in conjugate pairs)")
    if len(zeros) > len(poles):
        raise ModelError("zeros", f"{len(zeros)} zeros exceed {len(poles)} poles "
                                        "(improper transfer function)")
    num, den = scipy.signal.zpk2tf(np.asarray(zeros, complex), np.asarray(poles, complex),
                                   float(gain))
    return np.real(np.atleast_1d(num)), np.real(np.atleast_1d(den))


def tf_matrix_to_ss(num: Sequence[Sequence[Any]], den: Sequence[Sequence[Any]],
                    siso: bool = False) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """A p x m matrix of entries num[i][j](s) / den[i][j](s) as a minimal (A, B, C, D)."""
    p = len(num)
    if p == 0 or len(den) != p:
        raise ModelError("den", f"expected {p} rows like num, found {len(den)}")
    m = len(num[0])
    blocks = []
    for i in range(p):
        if len(num[i]) != m or len(den[i]) != m:
            raise ModelError(f"num[{i}]", f"expected {m} entries in every row of num "
                                                "and den")
        for j in range(m):
            where = "" if siso else f"[{i}][{j}]"
            blocks.append((i, j, siso_entry(num[i][j], den[i][j], where)))
    n = sum(b[2][0].shape[0] for b in blocks)
    A = np.zeros((n, n))
    B = np.zeros((n, m))
    C = np.zeros((p, n))
    D = np.zeros((p, m))
    at = 0
    for i, j, (a, b, c, d) in blocks:
        k = a.shape[0]
        A[at:at + k, at:at + k] = a
        B[at:at + k, j:j + 1] = b
        C[i:i + 1, at:at + k] = c
        D[i, j] = d[0, 0]
        at += k
    return minimal(A, B, C, D)


def minimal(A: Matrix, B: Matrix, C: Matrix, D: Matrix) -> tuple[Matrix, Matrix, Matrix, Matrix]:
    """Drop the uncontrollable, then the unobservable part (orthogonal projections).

    A model that is already minimal comes back unchanged (same coordinates).
    """
    V = controllable_basis(A, B)
    if V.shape[1] < A.shape[0]:
        A, B, C = V.T @ A @ V, V.T @ B, C @ V
    W = controllable_basis(A.T, C.T)
    if W.shape[1] < A.shape[0]:
        A, B, C = W.T @ A @ W, W.T @ B, C @ W
    return A, B, C, D


def controllable_basis(A: Matrix, B: Matrix) -> Matrix:
    """Orthonormal basis of the controllable subspace, by the staircase algorithm.

    Each pass takes the range of the part of the input map that acts on the not yet
    reached coordinates (an SVD with a relative rank tolerance), moves it to the front
    and lets the coupling block A21 play the input in the next pass.
    """
    n = A.shape[0]
    if n == 0:
        return np.zeros((0, 0))
    scale = max(1.0, float(np.linalg.norm(A, 1)), float(np.linalg.norm(B, 1)))
    Z = np.eye(n)
    At = A.copy()
    reach = B.copy()
    k = 0
    while k < n and reach.size:
        U, s, _ = scipy.linalg.svd(reach)
        r = int(np.sum(s > RANK_TOL * scale))
        if r == 0:
            break
        T = np.eye(n)
        T[k:, k:] = U
        At = T.T @ At @ T
        Z = Z @ T
        reach = At[k + r:, k:k + r]
        k += r
    return Z[:, :k]
