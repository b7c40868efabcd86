"""Frequency weightings for human vibration exposure, and the exposure arithmetic.

The weightings are those defined by their filter parameters in ISO 8041 (and in the annexes of
ISO 5349-1 and ISO 2631-1): a band-limiting pair (2-pole Butterworth high-pass at f1 and low-pass
at f2), an acceleration-velocity transition and, for Wk, an upward step. ``Wh`` is the hand-arm
weighting (bar, footpeg), ``Wk`` the whole-body vertical and ``Wd`` the whole-body horizontal one.

Digital design
--------------
Every pole is mapped exactly, ``z = exp(s / fs)`` (matched z). The high-pass keeps its double
zero at z = 1 and the upward step its matched zeros (both lie far below fs/2), each with one
least-squares gain. The low-pass and the a-v transition are fitted together: four matched poles
and six zeros whose squared magnitude (a cosine polynomial, linear in its coefficients) is the
least-squares fit of the analog magnitude's relative error on a log-spaced grid up to fs/2, then
factored into its minimum-phase zeros. The plain bilinear transform does not work here: Wh's
band-limiting low-pass (1259 Hz) lies above the Nyquist frequency at fs = 2 kHz and would be
folded down to 702 Hz, and every section whose zeros lie at infinity would be forced to zero at
fs/2. Only the magnitude is fitted (r.m.s. values need no more); the phase is not the analog one.

Error against the analog magnitude at the one-third-octave centres, fs = 2000 Hz (measured):
Wh 0.26 % up to fs/4, 0.46 % up to 800 Hz, 4.2 % at 1000 Hz (= fs/2, where any digital filter's
slope is zero); Wk and Wd 0.42 % up to fs/4, 1.1 % up to 800 Hz, 6.4 % at 1000 Hz (where the
weighting factor is below 0.003, so it hardly moves an r.m.s. value).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal

from crankbeat.errors import InputError

Kind = Literal["Wh", "Wk", "Wd"]

#: Standard acceleration of gravity, m/s² per g (the conventional value of the CGPM, 1901).
G_N = 9.80665

_TWO_PI = 2.0 * np.pi
_Q_BAND = 1.0 / np.sqrt(2.0)

# ISO 8041 parameters: f1, f2, f3, f4, Q4, f5, Q5, f6, Q6 (Hz; None where a stage is absent).
_PARAMS: dict[str, tuple[float, float, float, float, float, float | None, float | None,
                         float | None, float | None]] = {
    "Wh": (10**0.8, 10**3.1, 100 / _TWO_PI, 100 / _TWO_PI, 0.64, None, None, None, None),
    "Wk": (0.4, 100.0, 12.5, 12.5, 0.63, 2.37, 0.91, 3.35, 0.91),
    "Wd": (0.4, 100.0, 2.0, 2.0, 0.63, None, None, None, None),
}

#: Axis multipliers of ISO 2631-1 (seated person, health): x, y, z.
WHOLE_BODY_K = (1.4, 1.4, 1.0)


def _check_kind(kind: str) -> None:
    if kind not in _PARAMS:
        raise InputError(f"kind must be one of {sorted(_PARAMS)}, got {kind!r}")


def _sections(kind: str) -> list[tuple[np.ndarray, np.ndarray, bool]]:
    """Analog second-order sections (b, a in descending powers of s) and a high-pass flag."""
    f1, f2, f3, f4, q4, f5, q5, f6, q6 = _PARAMS[kind]
    w1, w2, w3, w4 = (_TWO_PI * f for f in (f1, f2, f3, f4))
    out = [
        (np.array([1.0, 0.0, 0.0]), np.array([1.0, w1 / _Q_BAND, w1**2]), True),
        (np.array([0.0, 0.0, w2**2]), np.array([1.0, w2 / _Q_BAND, w2**2]), False),
        # (1 + s/w3) / (1 + s/(Q4 w4) + s²/w4²), scaled to monic denominator
        (np.array([0.0, w4**2 / w3, w4**2]), np.array([1.0, w4 / q4, w4**2]), False),
    ]
    if f5 is not None:
        w5, w6 = _TWO_PI * f5, _TWO_PI * f6  # type: ignore[operator]
        # (1 + s/(Q5 w5) + s²/w5²) / (1 + s/(Q6 w6) + s²/w6²) · (w5/w6)²
        num = np.array([1.0, w5 / q5, w5**2])  # type: ignore[operator]
        out.append((num, np.array([1.0, w6 / q6, w6**2]), False))  # type: ignore[operator]
    return out


def weighting_zpk(kind: Kind) -> tuple[np.ndarray, np.ndarray, float]:
    """Analog (s-plane) zeros, poles and gain of a weighting.

    Parameters
    ----------
    kind : {"Wh", "Wk", "Wd"}
        The weighting.

    Returns
    -------
    z, p : ndarray of complex
        Zeros and poles, rad/s.
    k : float
        Gain, so that ``H(s) = k · Π(s - z) / Π(s - p)``.
    """
    _check_kind(kind)
    z_all: list[complex] = []
    p_all: list[complex] = []
    k_all = 1.0
    for b, a, _ in _sections(kind):
        z, p, k = signal.tf2zpk(np.trim_zeros(b, "f"), a)
        z_all.extend(z)
        p_all.extend(p)
        k_all *= float(np.real(k))
    return np.asarray(z_all, dtype=complex), np.asarray(p_all, dtype=complex), k_all


def weighting_response(
    kind: Kind, f_hz: ArrayLike, *, output: Literal["complex", "magnitude"] = "magnitude"
) -> np.ndarray:
    """Frequency response of the analog weighting at frequencies ``f_hz`` (Hz, any shape).

    Returns the magnitude (dimensionless factor, as tabulated in the standards) or, with
    ``output="complex"``, the complex response ``H(j 2π f)``.
    """
    _check_kind(kind)
    if output not in ("complex", "magnitude"):
        raise InputError(f"output must be 'complex' or 'magnitude', got {output!r}")
    f = np.asarray(f_hz, dtype=float)
    s = 1j * _TWO_PI * f
    h = np.ones_like(s)
    for b, a, _ in _sections(kind):
        h = h * np.polyval(b, s) / np.polyval(a, s)
    return h if output == "complex" else np.abs(h)


def _matched_poles(a: np.ndarray, fs: float) -> np.ndarray:
    """Digital denominator with the analog poles mapped by z = exp(s / fs)."""
    return np.real(np.poly(np.exp(np.roots(a) / fs)))


def _fit_numerator(target: np.ndarray, a_d: np.ndarray, w: np.ndarray, n_zeros: int) -> np.ndarray:
    """Minimum-phase numerator whose magnitude over the denominator ``a_d`` fits ``target``.

    ``target`` is the analog magnitude at ``w`` (rad/sample). The squared magnitude of the
    numerator is a cosine polynomial, linear in its coefficients: least squares on its relative
    error, then factored into its zeros inside the unit circle. Coefficients in powers of z^-1.
    """
    ejw = np.exp(1j * w)
    want = (target * np.abs(np.polyval(a_d, ejw))) ** 2
    basis = np.cos(np.outer(w, np.arange(n_zeros + 1))) / want[:, None]
    c, *_ = np.linalg.lstsq(basis, np.ones_like(w), rcond=None)
    # |B(e^jw)|² = Σ c_k cos(k w); the roots of its z-polynomial pair up as (r, 1/r*)
    roots = np.roots(np.concatenate((c[:0:-1] / 2, [c[0]], c[1:] / 2)))
    b_d = np.real(np.poly(roots[np.argsort(np.abs(roots))][:n_zeros]))
    got = np.abs(np.polyval(b_d, ejw) / np.polyval(a_d, ejw))
    return np.exp(np.mean(np.log(target / got))) * b_d


def _analog_mag(sections: list[tuple[np.ndarray, np.ndarray, bool]], s: np.ndarray) -> np.ndarray:
    h = np.ones_like(s)
    for b, a, _ in sections:
        h = h * np.polyval(b, s) / np.polyval(a, s)
    return np.abs(h)


def weighting_sos(kind: Kind, fs: float) -> np.ndarray:
    """Digital second-order sections of a weighting for sampling rate ``fs``.

    Parameters
    ----------
    kind : {"Wh", "Wk", "Wd"}
        The weighting.
    fs : float
        Sampling rate, Hz. Must be at least 8 × the highest transition/step frequency
        (127 Hz for Wh, 100 Hz for Wk and Wd).

    Returns
    -------
    sos : ndarray, shape (n_sections, 6)
        For :func:`scipy.signal.sosfilt`: the high-pass, the upward step (Wk only), then three
        sections that together fit the low-pass and the a-v transition (see the module
        docstring).
    """
    _check_kind(kind)
    f1, f2, f3, f4, q4, f5, q5, f6, q6 = _PARAMS[kind]
    f_top = max(f for f in (f3, f4, f5, f6) if f is not None)
    if not (np.isfinite(fs) and fs >= 8 * f_top):
        raise InputError(f"fs must be >= {8 * f_top:.4g} Hz for {kind}, got {fs!r}")
    secs = _sections(kind)
    w = np.geomspace(1e-4, 1.0, 600) * np.pi  # rad/sample, log-spaced up to Nyquist
    s = 1j * w * fs
    ejw = np.exp(1j * w)
    rows = [_highpass_row(secs, s, w, fs)]
    if len(secs) == 4:  # Wk's upward step lies far below fs/2: zeros and poles both matched
        a_d = _matched_poles(secs[3][1], fs)
        b_d = _matched_poles(secs[3][0], fs)
        got = np.abs(np.polyval(b_d, ejw) / np.polyval(a_d, ejw))
        rows.append(np.concatenate((np.exp(np.mean(np.log(_analog_mag(secs[3:], s) / got))) * b_d,
                                    a_d)))
    # low-pass and transition fitted together, with two extra zeros: one section more than the
    # analog, but three coefficients per section alone cannot follow the analog up to Nyquist
    a_d = np.convolve(_matched_poles(secs[1][1], fs), _matched_poles(secs[2][1], fs))
    b_d = _fit_numerator(_analog_mag(secs[1:3], s), a_d, w, 6)
    rows.extend(signal.tf2sos(b_d, np.concatenate((a_d, [0.0, 0.0]))))
    return np.vstack(rows)


def band_limiting_sos(kind: Kind, fs: float) -> np.ndarray:
    """Digital sections of the weighting's band limiting alone (high-pass f1, low-pass f2).

    The "unweighted" but band-limited acceleration that ISO 8041 instruments report beside the
    weighted value. Designed as :func:`weighting_sos` (the low-pass with two extra zeros).
    """
    _check_kind(kind)
    if not (np.isfinite(fs) and fs > 4 * _PARAMS[kind][0]):
        raise InputError(f"fs must be > {4 * _PARAMS[kind][0]:.4g} Hz for {kind}, got {fs!r}")
    secs = _sections(kind)
    w = np.geomspace(1e-4, 1.0, 600) * np.pi
    s = 1j * w * fs
    rows = [_highpass_row(secs, s, w, fs)]
    a_d = _matched_poles(secs[1][1], fs)
    b_d = _fit_numerator(_analog_mag(secs[1:2], s), a_d, w, 4)
    rows.extend(signal.tf2sos(b_d, np.concatenate((a_d, [0.0, 0.0]))))
    return np.vstack(rows)


def _highpass_row(secs: list, s: np.ndarray, w: np.ndarray, fs: float) -> np.ndarray:
    # the double zero stays at z = 1; only a gain is fitted
    ejw = np.exp(1j * w)
    a_d = _matched_poles(secs[0][1], fs)
    b_d = np.array([1.0, -2.0, 1.0])
    got = np.abs(np.polyval(b_d, ejw) / np.polyval(a_d, ejw))
    return np.concatenate((np.exp(np.mean(np.log(_analog_mag(secs[:1], s) / got))) * b_d, a_d))


def weighted_rms(
    x: ArrayLike, fs: float, *, kind: Kind, axis: int = -1, settle_s: float = 0.0
) -> np.ndarray:
    """Frequency-weighted r.m.s. of a record (same unit as ``x``, e.g. m/s²).

    The weighting filter starts from rest at the first sample; ``settle_s`` seconds at the
    start are left out of the mean (the filter's start-up transient).

    Parameters
    ----------
    x : array_like
        Acceleration samples; time runs along ``axis``.
    fs : float
        Sampling rate, Hz.
    kind : {"Wh", "Wk", "Wd"}
        The weighting.
    axis : int
        Time axis.
    settle_s : float
        Seconds of filter start-up to leave out, >= 0.
    """
    arr = np.asarray(x, dtype=float)
    if arr.ndim == 0 or arr.shape[axis] == 0:
        raise InputError(f"x must have samples along axis {axis}, got shape {arr.shape}")
    if not settle_s >= 0:
        raise InputError(f"settle_s must be >= 0, got {settle_s!r}")
    skip = int(round(settle_s * fs))
    if skip >= arr.shape[axis]:
        raise InputError(
            f"settle_s={settle_s} s leaves no samples of the {arr.shape[axis]} given at fs={fs}"
        )
    y = signal.sosfilt(weighting_sos(kind, fs), arr, axis=axis)
    y = np.moveaxis(y, axis, -1)[..., skip:]
    return np.sqrt(np.mean(y**2, axis=-1))


def vector_sum(a_xyz: ArrayLike, *, k: tuple[float, float, float] = (1.0, 1.0, 1.0)) -> np.ndarray:
    """Root-sum-of-squares of three axis values: ``sqrt(Σ (k_i a_i)²)`` over the last axis.

    With k = (1, 1, 1) this is the hand-arm total value a_hv of ISO 5349-1; with
    :data:`WHOLE_BODY_K` the vibration total value of ISO 2631-1 for a seated person's health.
    """
    a = np.asarray(a_xyz, dtype=float)
    if a.shape[-1:] != (3,):
        raise InputError(f"a_xyz must end in an axis of length 3, got shape {a.shape}")
    return np.sqrt(np.sum((np.asarray(k) * a) ** 2, axis=-1))


def daily_exposure(a_w: ArrayLike, t_hours: ArrayLike) -> np.ndarray:
    """Daily exposure A(8) = a_w · sqrt(T / 8 h) (ISO 5349-1; the same form in ISO 2631-1 use).

    Parameters
    ----------
    a_w : array_like
        Weighted r.m.s. (hand-arm a_hv, or a whole-body value), m/s².
    t_hours : array_like
        Daily exposure duration, hours, >= 0.
    """
    t = np.asarray(t_hours, dtype=float)
    if np.any(~(t >= 0)):
        raise InputError(f"t_hours must be >= 0, got {t_hours!r}")
    return np.asarray(a_w, dtype=float) * np.sqrt(t / 8.0)


def whole_body_exposure(
    aw_xyz: ArrayLike, t_hours: ArrayLike, *, combine: Literal["vector", "max_axis"] = "vector"
) -> np.ndarray:
    """Whole-body A(8) from the three weighted axis values (x, y with Wd; z with Wk), m/s².

    ``combine="vector"``: the ISO 2631-1 vector sum with k = 1.4, 1.4, 1, scaled to 8 h.
    ``combine="max_axis"``: the largest of 1.4·a_wx, 1.4·a_wy, a_wz scaled to 8 h (the common
    practice of occupational limits).
    """
    a = np.asarray(aw_xyz, dtype=float)
    if a.shape[-1:] != (3,):
        raise InputError(f"aw_xyz must end in an axis of length 3, got shape {a.shape}")
    if combine == "vector":
        total = vector_sum(a, k=WHOLE_BODY_K)
    elif combine == "max_axis":
        total = np.max(np.asarray(WHOLE_BODY_K) * a, axis=-1)
    else:
        raise InputError(f"combine must be 'vector' or 'max_axis', got {combine!r}")
    return daily_exposure(total, t_hours)
