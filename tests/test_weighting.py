"""Weighting filters and exposure arithmetic against the standards' tables and scipy.

Where the values come from: tests/reference/README.md.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from crankbeat.dsp.weighting import (
    band_limiting_sos,
    daily_exposure,
    vector_sum,
    weighted_rms,
    weighting_response,
    weighting_sos,
    weighting_zpk,
    whole_body_exposure,
)
from crankbeat.errors import InputError

# ISO 5349-1:2001, Table A.2 (Wh at one-third-octave centres), as transcribed in
# tests/reference/README.md; the standard rounds them to 3 significant figures.
WH_TABLE_A2 = {
    6.3: 0.727, 8: 0.873, 10: 0.951, 12.5: 0.958, 16: 0.896, 20: 0.782, 25: 0.647, 31.5: 0.519,
    40: 0.411, 50: 0.324, 63: 0.256, 80: 0.202, 100: 0.160, 125: 0.127, 160: 0.101,
    200: 0.0799, 250: 0.0634, 315: 0.0503, 400: 0.0398, 500: 0.0314, 630: 0.0245, 800: 0.0186,
    1000: 0.0135, 1250: 0.00894,
}
# ISO 2631-1:1997, Table 3 (factors x 1000), transcribed from a secondary source (tests/reference).
ISO2631_TABLE3_HZ = (0.5, 1, 2, 4, 5, 6.3, 8, 10, 12.5, 16, 31.5, 80)
WK_TABLE3 = (418, 482, 531, 967, 1039, 1054, 1036, 988, 902, 768, 405, 132)
WD_TABLE3 = (853, 1011, 890, 512, 409, 323, 253, 212, 161, 125, 63.2, 21.1)


def exact_centre(nominal_hz: float) -> float:
    """The base-10 one-third-octave centre behind a nominal value (IEC 61260: 10^(n/10) Hz);
    the standards compute their tables at these exact frequencies (common practice)."""
    return 10 ** (round(10 * np.log10(nominal_hz)) / 10)


def half_unit_3_sig(v: float) -> float:
    """Half a unit in the third significant figure: the rounding of a 3-figure table entry."""
    return 0.5 * 10 ** (np.floor(np.log10(abs(v))) - 2)


@pytest.mark.parametrize("nominal, factor", sorted(WH_TABLE_A2.items()))
def test_wh_matches_iso5349_table_a2_to_its_rounding(nominal, factor):
    # ISO 5349-1:2001 Table A.2: the tabulated factor is the filter's value rounded to 3
    # significant figures, so the filter must lie within half a unit of the last figure.
    got = float(weighting_response("Wh", exact_centre(nominal)))
    assert abs(got - factor) <= half_unit_3_sig(factor) * 1.02  # 2 % slack on the half unit


# ISO 8041 states instrument tolerances on the weighting per frequency band; from memory they are
# about +12 %/-11 % (1 dB) inside the nominal range. We check a tighter 2 % (our choice) so that a
# slipped parameter (Q4 = 0.64 instead of 0.63 moves Wk by up to 2.3 %) shows.
ISO2631_TOL = 0.02


@pytest.mark.parametrize("f, factor", list(zip(ISO2631_TABLE3_HZ, WK_TABLE3)))
def test_wk_matches_iso2631_table3(f, factor):
    # ISO 2631-1:1997 Table 3, Wk x 1000
    got = 1000 * float(weighting_response("Wk", exact_centre(f)))
    assert got == pytest.approx(factor, rel=ISO2631_TOL)


WD_ROWS = [
    (f, v) if f != 10 else pytest.param(
        f, v, marks=pytest.mark.xfail(strict=True, reason=(
            "Wd at 10 Hz: the ISO 8041 filter gives 201.7, the transcribed table says 212 (5 % "
            "apart). Its neighbours 253 (8 Hz) and 161 (12.5 Hz) fall by 10^0.1 per third "
            "octave, as the velocity-proportional slope requires, which predicts 201; so the 212 "
            "looks like an error in the table or its transcription. Not checked against the "
            "primary standard (not available here).")))
    for f, v in zip(ISO2631_TABLE3_HZ, WD_TABLE3)
]


@pytest.mark.parametrize("f, factor", WD_ROWS)
def test_wd_matches_iso2631_table3(f, factor):
    # ISO 2631-1:1997 Table 3, Wd x 1000
    got = 1000 * float(weighting_response("Wd", exact_centre(f)))
    assert got == pytest.approx(factor, rel=ISO2631_TOL)


def test_wd_at_10hz_is_what_the_neighbours_slope_predicts():
    # 1/f slope of the velocity-proportional region (a-v transition at 2 Hz): each third octave
    # divides the factor by 10^0.1 (handbook property of a first-order slope). The table's own
    # neighbours (253 at 8 Hz, 161 at 12.5 Hz) give 253/10^0.1 = 201 and 161*10^0.1 = 203.
    got = 1000 * float(weighting_response("Wd", exact_centre(10)))
    assert got == pytest.approx(201.7, abs=0.5)
    assert 253 / 10**0.1 * 0.99 < got < 161 * 10**0.1 * 1.01


@pytest.mark.parametrize("kind", ["Wh", "Wk", "Wd"])
def test_band_limiting_is_scipy_butterworth(kind):
    # band-limiting: 2-pole Butterworth high-pass at f1, low-pass at f2 (ISO 8041), checked
    # against scipy.signal.butter's analog designs
    f1, f2 = {"Wh": (10**0.8, 10**3.1), "Wk": (0.4, 100.0), "Wd": (0.4, 100.0)}[kind]
    z, p, k = weighting_zpk(kind)
    bh, ah = signal.butter(2, 2 * np.pi * f1, "high", analog=True)
    bl, al = signal.butter(2, 2 * np.pi * f2, "low", analog=True)
    ours = np.sort_complex(p)
    for a in (ah, al):
        for root in np.roots(a):
            assert np.min(np.abs(ours - root)) < 1e-9 * abs(root)
    # and with the rest removed, the response is the product of the two Butterworths
    f = np.geomspace(0.1, 2000, 50)
    w = 2 * np.pi * f
    hb = signal.freqs(bh, ah, w)[1] * signal.freqs(bl, al, w)[1]
    rest = weighting_response(kind, f, output="complex") / hb
    # the remaining a-v transition (and step) have no zeros at 0 and no poles at f1/f2
    assert np.all(np.isfinite(rest)) and np.all(np.abs(rest) > 0)
    full = weighting_response(kind, f, output="complex")
    assert np.allclose(signal.freqs_zpk(z, p, k, w)[1], full)


@pytest.mark.parametrize(
    "kind, tol_fs4, tol_800",
    [("Wh", 0.004, 0.006), ("Wk", 0.006, 0.015), ("Wd", 0.006, 0.015)],
)
def test_digital_filter_follows_analog_at_2khz(kind, tol_fs4, tol_800):
    # digital vs analog magnitude at the one-third-octave centres, fs = 2000 Hz; the bounds are
    # our design target (measured 0.26/0.46 % for Wh, 0.42/1.1 % for Wk and Wd)
    fs = 2000.0
    centres = 10 ** (np.arange(-3, 30) / 10)  # 0.5 Hz .. 800 Hz
    _, h = signal.sosfreqz(weighting_sos(kind, fs), worN=centres, fs=fs)
    err = np.abs(h) / weighting_response(kind, centres) - 1
    assert np.max(np.abs(err[centres <= fs / 4])) < tol_fs4
    assert np.max(np.abs(err)) < tol_800


def test_weighted_rms_of_a_sine_is_amplitude_times_factor_over_root2():
    # r.m.s. of A sin(2 pi f t) through a linear filter = |H(f)| A / sqrt(2) (handbook formula)
    fs, f, amp = 2000.0, 31.5, 3.0
    t = np.arange(int(20 * fs)) / fs
    x = amp * np.sin(2 * np.pi * f * t)
    got = weighted_rms(x, fs, kind="Wh", settle_s=2.0)
    assert got == pytest.approx(amp / np.sqrt(2) * 0.519, rel=0.01)  # 0.519: Table A.2, 31.5 Hz


def test_weighted_rms_axis_and_errors():
    fs = 1000.0
    rng = np.random.default_rng(1)
    x = rng.standard_normal((3, 4000))
    by_row = weighted_rms(x, fs, kind="Wd", axis=-1)
    by_col = weighted_rms(x.T, fs, kind="Wd", axis=0)
    assert np.allclose(by_row, by_col)
    with pytest.raises(InputError, match="kind"):
        weighted_rms(x, fs, kind="Wz")  # type: ignore[arg-type]
    with pytest.raises(InputError, match="fs must be"):
        weighting_sos("Wh", 100.0)
    with pytest.raises(InputError, match="settle_s"):
        weighted_rms(x, fs, kind="Wk", settle_s=10.0)


def test_daily_exposure_and_vector_sums():
    # ISO 5349-1: a_hv = sqrt(ax² + ay² + az²), A(8) = a_hv sqrt(T / 8 h) (common formula)
    a_hv = vector_sum([3.0, 4.0, 12.0])
    assert a_hv == pytest.approx(13.0)
    assert daily_exposure(a_hv, 2.0) == pytest.approx(6.5)  # sqrt(2/8) = 1/2
    assert daily_exposure(4.0, 8.0) == pytest.approx(4.0)
    # ISO 2631-1 vector sum with k = 1.4, 1.4, 1 for the seat
    aw = [0.5, 0.0, 0.7]
    assert whole_body_exposure(aw, 8.0) == pytest.approx(np.hypot(0.7, 0.7))
    assert whole_body_exposure(aw, 8.0, combine="max_axis") == pytest.approx(0.7)
    with pytest.raises(InputError, match="t_hours"):
        daily_exposure(1.0, -1.0)
    with pytest.raises(InputError, match="length 3"):
        vector_sum([1.0, 2.0])


@pytest.mark.parametrize("kind", ["Wh", "Wk"])
def test_band_limiting_filter_is_the_two_butterworths(kind):
    # the "unweighted" band-limited filter: 2-pole Butterworth high-pass f1 x low-pass f2
    # (ISO 8041), against scipy.signal.butter's analog designs, digital at fs = 2000 Hz
    fs = 2000.0
    f1, f2 = {"Wh": (10**0.8, 10**3.1), "Wk": (0.4, 100.0)}[kind]
    centres = 10 ** (np.arange(-3, 30) / 10)
    bh, ah = signal.butter(2, 2 * np.pi * f1, "high", analog=True)
    bl, al = signal.butter(2, 2 * np.pi * f2, "low", analog=True)
    w = 2 * np.pi * centres
    ref = np.abs(signal.freqs(bh, ah, w)[1] * signal.freqs(bl, al, w)[1])
    _, h = signal.sosfreqz(band_limiting_sos(kind, fs), worN=centres, fs=fs)
    assert np.max(np.abs(np.abs(h) / ref - 1)) < 0.01  # our design target (measured 0.4-0.8 %)
