"""Linear time-invariant pieces of the simulated bench: rational functions and state space.

Transfer functions are polynomials in ``s`` (rad/s), highest power first (the order
``scipy.signal.freqs`` uses). Circuit polynomials span many decades (s**7 at 1e6 rad/s
is 1e42), so evaluation, roots and realisations work on a frequency-scaled copy
(``s = w_ref * s_hat``) and scale back; that keeps every step well conditioned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.signal


def _trim(coeffs: np.ndarray) -> np.ndarray:
    """Drop leading zeros (keep at least one coefficient)."""
    coeffs = np.atleast_1d(np.asarray(coeffs, dtype=float))
    nonzero = np.flatnonzero(coeffs)
    if nonzero.size == 0:
        return np.zeros(1)
    return coeffs[nonzero[0]:]


def poly_add(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Sum of two polynomials (highest power first), of any lengths."""
    a = np.atleast_1d(np.asarray(a, dtype=float))
    b = np.atleast_1d(np.asarray(b, dtype=float))
    n = max(a.size, b.size)
    return _trim(np.pad(a, (n - a.size, 0)) + np.pad(b, (n - b.size, 0)))


@dataclass(frozen=True)
class StateSpace:
    """``dx/dt = A x + B u``, ``y = C x + D u`` (single input, single output)."""

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: float

    @property
    def order(self) -> int:
        """Number of states."""
        return self.A.shape[0]

    def state_phasor(self, omega_rad_s: float) -> np.ndarray:
        """Complex steady-state state per unit input phasor at ``omega_rad_s``.

        At DC a singular ``A`` (an integrator) has no steady state: the least-squares
        answer is used, which leaves the non-decaying mode where it is.
        """
        if self.order == 0:
            return np.zeros(0, dtype=complex)
        matrix = 1j * omega_rad_s * np.eye(self.order) - self.A
        try:
            if np.linalg.cond(matrix) > 1e14:
                raise np.linalg.LinAlgError("singular")
            return np.linalg.solve(matrix, self.B.astype(complex))
        except np.linalg.LinAlgError:
            return np.linalg.lstsq(matrix, self.B.astype(complex), rcond=None)[0]

    def response(self, omega_rad_s: float) -> complex:
        """Frequency response ``C (jw I - A)^-1 B + D`` at one angular frequency."""
        if self.order == 0:
            return complex(self.D)
        return complex(self.C @ self.state_phasor(omega_rad_s) + self.D)


@dataclass(frozen=True)
class Rational:
    """``H(s) = num(s) / den(s)``, coefficients highest power first, ``s`` in rad/s.

    Attributes
    ----------
    num, den
        Polynomial coefficients; ``den`` must not be all zero and ``H`` must be proper
        (degree of ``num`` at most that of ``den``) to be realised in state space.
    """

    num: np.ndarray
    den: np.ndarray

    def __post_init__(self) -> None:
        num = _trim(self.num)
        den = _trim(self.den)
        if not np.any(den):
            raise ValueError("the denominator is zero")
        object.__setattr__(self, "num", num)
        object.__setattr__(self, "den", den)

    # --- construction -------------------------------------------------------------
    @classmethod
    def constant(cls, value: float) -> Rational:
        """A frequency-independent gain."""
        return cls(np.array([float(value)]), np.array([1.0]))

    @classmethod
    def from_zpk(cls, zeros_rad_s, poles_rad_s, gain: float) -> Rational:
        """From zeros and poles in rad/s (conjugate pairs complete) and the zpk gain."""
        num = np.real_if_close(np.poly(np.asarray(zeros_rad_s, dtype=complex)), tol=1e6)
        den = np.real_if_close(np.poly(np.asarray(poles_rad_s, dtype=complex)), tol=1e6)
        if np.iscomplexobj(num) or np.iscomplexobj(den):
            raise ValueError("complex zeros and poles must come in conjugate pairs")
        return cls(gain * np.atleast_1d(num), np.atleast_1d(den))

    # --- arithmetic -----------------------------------------------------------------
    def __mul__(self, other: Rational) -> Rational:
        return Rational(np.polymul(self.num, other.num), np.polymul(self.den, other.den))

    def __add__(self, other: Rational) -> Rational:
        return Rational(poly_add(np.polymul(self.num, other.den), np.polymul(other.num, self.den)),
                        np.polymul(self.den, other.den))

    def __neg__(self) -> Rational:
        return Rational(-self.num, self.den)

    def __sub__(self, other: Rational) -> Rational:
        return self + (-other)

    def reciprocal(self) -> Rational:
        """``1 / H``."""
        return Rational(self.den, self.num)

    # --- scaling ----------------------------------------------------------------------
    @property
    def reference_rad_s(self) -> float:
        """A frequency scale: the geometric mean of the nonzero pole (or zero) magnitudes."""
        for poly in (self.den, self.num):
            if poly.size > 1:
                roots = np.roots(poly)
                mags = np.abs(roots[np.abs(roots) > 0])
                if mags.size:
                    return float(np.exp(np.mean(np.log(mags))))
        return 1.0

    def _scaled(self) -> tuple[np.ndarray, np.ndarray, float]:
        w_ref = self.reference_rad_s
        n = self.den.size - 1
        powers_den = w_ref ** np.arange(n, -1, -1, dtype=float)
        m = self.num.size - 1
        powers_num = w_ref ** np.arange(m, -1, -1, dtype=float)
        den_hat = self.den * powers_den
        num_hat = self.num * powers_num
        norm = np.max(np.abs(den_hat))
        return num_hat / norm, den_hat / norm, w_ref

    # --- evaluation -------------------------------------------------------------------
    def __call__(self, s) -> np.ndarray:
        """Evaluate at complex ``s`` (rad/s)."""
        num_hat, den_hat, w_ref = self._scaled()
        s_hat = np.asarray(s, dtype=complex) / w_ref
        return np.polyval(num_hat, s_hat) / np.polyval(den_hat, s_hat)

    def at_hz(self, frequency_hz) -> np.ndarray:
        """Evaluate on the imaginary axis at ``frequency_hz``."""
        return self(2j * np.pi * np.asarray(frequency_hz, dtype=float))

    def poles(self) -> np.ndarray:
        """Poles in rad/s."""
        _, den_hat, w_ref = self._scaled()
        return np.roots(den_hat) * w_ref

    def zeros(self) -> np.ndarray:
        """Zeros in rad/s."""
        num_hat, _, w_ref = self._scaled()
        return np.roots(num_hat) * w_ref if num_hat.size > 1 else np.zeros(0, dtype=complex)

    @property
    def strictly_proper(self) -> bool:
        """True when the degree of the numerator is below that of the denominator."""
        return self.num.size < self.den.size

    def realise(self) -> StateSpace:
        """A balanced state-space realisation in SI time (seconds).

        Raises
        ------
        ValueError
            For an improper function (more zeros than poles).
        """
        if self.num.size > self.den.size:
            raise ValueError("the transfer function is improper (more zeros than poles)")
        num_hat, den_hat, w_ref = self._scaled()
        if den_hat.size == 1:
            return StateSpace(np.zeros((0, 0)), np.zeros(0), np.zeros(0),
                              float(num_hat[0] / den_hat[0]))
        A, B, C, D = scipy.signal.tf2ss(num_hat, den_hat)
        # Balance (a diagonal similarity) so that the homogeneous decay is accurate.
        _, (scale, _perm) = scipy.linalg.matrix_balance(A, permute=False, separate=True)
        A_bal = A * scale[None, :] / scale[:, None]
        B_bal = B[:, 0] / scale
        C_bal = C[0] * scale
        return StateSpace(A_bal * w_ref, B_bal * w_ref, C_bal, float(D[0, 0]))
