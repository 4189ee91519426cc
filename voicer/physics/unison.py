"""Coupled unison strings: the partials a listener hears from two or three strings (and
their two polarizations) that share one bridge.

Weinreich (1977, "Coupled piano strings", JASA 62(6), 1474-1484): near one partial, the
strings of a unison are oscillators with their own complex frequencies
``lambda_s = omega_s + i sigma_s`` (their own tuning and their own losses, ``exp(i lambda
t)``), coupled through the bridge, whose motion each string feels and drives. With the
bridge's term ``z = chi + i eta`` (``chi`` reactive, ``eta`` resistive; a string alone on
the bridge decays by ``sigma_s + eta``), the unison moves as ::

    d/dt x = i H x,    H = diag(lambda_s) + z 1 1^T

The eigenvalues of ``H`` are the partials actually heard: with identical strings the
in-phase mode decays at ``sigma + N eta`` (faster than a string alone, the prompt sound)
and the others at ``sigma`` (they leave the bridge still, so a symmetric blow does not
excite them); a small mistuning lets them reach the bridge (the aftersound), and a large
one gives two or three modes of their own frequencies, which beat. The hammer's blow
gives each string's amplitude; projected on the eigenvectors it gives each mode's share,
and the bridge force of a mode is its share times the sum of its eigenvector over the
strings (the bridge is driven by all of them alike).

Two polarizations: each string also moves parallel to the soundboard, a mode of its own
(a little off in frequency: :func:`unison_matrix`), which the bridge moves less (its term
``h z``) and which couples to the vertical motion through the bridge (``x z``). The hammer
strikes vertically and the soundboard radiates the vertical force, so the horizontal
motion is fed and heard only through the coupling: a slower-decaying share of the tone.
"""

from __future__ import annotations

__all__ = ["unison_matrix", "coupled_modes", "heard_amplitudes"]

import numpy as np
from numpy.typing import ArrayLike, NDArray


def unison_matrix(own: ArrayLike, z: ArrayLike, *, polarizations: int = 1, horizontal: ArrayLike = 0.0,
                  cross: ArrayLike = 0.0, own_horizontal: ArrayLike | None = None) -> NDArray[np.complex128]:
    """The coupling matrices ``H`` (..., M, M) of unisons near one partial each.

    Parameters
    ----------
    own : array_like complex (..., S)
        Each string's own complex angular frequency ``omega + i sigma`` (1/s), vertical.
    z : array_like complex (...)
        The bridge's term ``chi + i eta`` (1/s) for the vertical motion.
    polarizations : {1, 2}
        With 2 the matrix is (2S, 2S): the vertical motions of the S strings, then their
        horizontal ones.
    horizontal, cross : array_like (...)
        The horizontal motion's bridge term and the vertical-horizontal coupling, as
        fractions of ``z``.
    own_horizontal : array_like complex (..., S), optional
        The strings' own horizontal complex frequencies (default: as the vertical).
    """
    own = np.asarray(own, dtype=np.complex128)
    z = np.asarray(z, dtype=np.complex128)[..., None, None]
    s = own.shape[-1]
    ones = np.ones((s, s))
    if polarizations == 1:
        return _diag(own) + z * ones
    if polarizations != 2:
        raise ValueError(f"polarizations={polarizations} must be 1 or 2")
    own_h = own if own_horizontal is None else np.asarray(own_horizontal, dtype=np.complex128)
    h = np.asarray(horizontal, dtype=float)[..., None, None]
    x = np.asarray(cross, dtype=float)[..., None, None]
    top = np.concatenate(np.broadcast_arrays(z * ones, x * z * ones), axis=-1)
    bottom = np.concatenate(np.broadcast_arrays(x * z * ones, h * z * ones), axis=-1)
    return _diag(np.concatenate([own, own_h], axis=-1)) + np.concatenate([top, bottom], axis=-2)


def _diag(values: NDArray[np.complex128]) -> NDArray[np.complex128]:
    out = np.zeros(values.shape + values.shape[-1:], dtype=np.complex128)
    idx = np.arange(values.shape[-1])
    out[..., idx, idx] = values
    return out


def coupled_modes(matrix: ArrayLike) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
    """Eigenvalues ``lambda`` (..., M) and eigenvectors (..., M, M; columns) of the
    coupling matrices: mode k sounds at ``Re lambda_k / 2 pi`` Hz and decays at
    ``Im lambda_k`` per second."""
    lam, vec = np.linalg.eig(np.asarray(matrix, dtype=np.complex128))
    return lam, vec


def heard_amplitudes(vec: NDArray[np.complex128], excitation: ArrayLike, *, heard: int | None = None
                     ) -> NDArray[np.complex128]:
    """Bridge-force amplitude of each mode (..., L, M) from each string's amplitude at the
    blow (..., L, S) (as bridge force: the strings' forces add on the bridge).

    ``vec`` is (..., M, M) from :func:`coupled_modes`; with two polarizations M = 2S, the
    blow excites the vertical motions (the first S) and the bridge hears only them
    (``heard`` = S, the default for M = 2S given S amplitudes).
    """
    a = np.asarray(excitation, dtype=np.complex128)
    s = a.shape[-1]
    m = vec.shape[-1]
    heard = s if heard is None else heard
    if m != s:
        a = np.concatenate([a, np.zeros(a.shape[:-1] + (m - s,), dtype=np.complex128)], axis=-1)
    share = np.linalg.solve(vec[..., None, :, :], a[..., None])[..., 0]  # (..., L, M): a = V c
    reach = vec[..., :heard, :].sum(axis=-2)  # (..., M): each mode's force on the bridge per unit share
    return share * reach[..., None, :]
