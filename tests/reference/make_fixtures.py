#!/usr/bin/env python3
"""Writes the reference fixtures that tests/reference_scipy.rs checks bandwatch against.

Reference library: numpy and scipy from PyPI, versions pinned in
requirements.txt and recorded in every fixture file. Every signal comes from
numpy.random.default_rng with a fixed seed (recorded), so the output is the
same byte for byte on every run with the pinned versions:

    python tests/reference/make_fixtures.py [OUT_DIR]

OUT_DIR defaults to tests/reference/fixtures next to this script.

What is written:

- windows.json: scipy.signal.get_window (periodic) for every window
  bandwatch offers, N = 4096: coherent gain, ENBW in bins, a few samples.
- trend_stats.json: scipy.stats.theilslopes (slope, intercept and the
  95 % interval of the slope), scipy.stats.kendalltau (time index against
  the values, asymptotic p) and pymannkendall.original_test (S, Var(S) with
  ties, Z with the continuity correction, p, tau) of band-history-like
  series: linear and exponential growth with noise, ties from rounding,
  no trend, repeated times, the fewest points; and synthetic growth with a
  known limit crossing time.
- fft_roundtrip.json: numpy.fft.rfft of a short float32 signal and
  numpy.fft.irfft of that spectrum.
- welch_<signal>.json, one per signal: the input as float32 bit patterns
  (hex, big-endian, 8 characters a sample, so Rust reads exactly the values
  scipy saw), and for each case the parameters, scipy.signal.welch with
  scaling 'spectrum' and 'density', and band powers from the density
  (sum(density[k]) * df over the band's lines, with the line weights of a
  unit change or integration where the band asks for one).

scipy computes in the input's precision, so welch gets the float32 samples
converted to float64: the reference is double precision on exactly the
samples bandwatch reads.

Numbers are written with 10 significant digits (far below the tolerances of
the Rust tests, which compare single-precision results), keys sorted, one
JSON document per file, so the output does not depend on dict order or on
float formatting details.
"""

import json
import math
import os
import sys

import numpy as np
import pymannkendall
import scipy
import scipy.signal
import scipy.stats

SEED = 20_260_611
FS = 25_600.0  # the sample rate of bandwatch's built-in source (README, demo)
LOW_CUT_HZ = 2.0  # bandwatch's default integration low cut-off
STANDARD_GRAVITY = 9.80665  # m/s^2, exact (CGPM 1901)
DIGITS = 10

# bandwatch window name -> scipy.signal.get_window spec, with the
# coefficients pinned (bandwatch src/dsp/window.rs uses the same).
WINDOWS = {
    "rectangular": "boxcar",
    "hann": "hann",
    "hamming": "hamming",
    "blackman-harris": ("general_cosine", [0.35875, 0.48829, 0.14128, 0.01168]),
    "flat-top": "flattop",
}


def num(v):
    """A float rounded to DIGITS significant digits (repr is then short)."""
    v = float(v)
    if v == 0.0 or not math.isfinite(v):
        return 0.0 if v == 0.0 else v
    return float(f"{v:.{DIGITS - 1}e}")


def nums(a):
    return [num(v) for v in np.asarray(a, dtype=np.float64).ravel()]


def f32_hex(x):
    return np.asarray(x, dtype=np.float32).astype(">f4").tobytes().hex()


def versions():
    return {"numpy": np.__version__, "scipy": scipy.__version__}


def window_spec_json(spec):
    if isinstance(spec, tuple):
        return [spec[0], list(spec[1])]
    return spec


def get_window(name, n):
    return scipy.signal.get_window(WINDOWS[name], n, fftbins=True)


def rng_for(stream):
    return np.random.default_rng(np.random.SeedSequence(SEED, spawn_key=(stream,)))


# ---------------------------------------------------------------------------
# Signals. Each: name, description, float32 samples, bands, cases.
# ---------------------------------------------------------------------------

N_SAMPLES = 4096  # 7 segments of 1024 at 50 % overlap
T = np.arange(N_SAMPLES) / FS


def cos(a, f, phase=0.0):
    return a * np.cos(2 * np.pi * f * T + phase)


def signals():
    out = []

    # 1. Tone centred on line 100 of a 1024-point spectrum (df = 25 Hz).
    out.append(
        (
            "tone_on_line",
            None,
            "1.5 amplitude cosine at 2500 Hz, on line 100 of fs/1024",
            cos(1.5, 2500.0, 0.3),
        )
    )
    # 2. Tones between lines: half a line and 0.3 of a line off.
    out.append(
        (
            "tone_off_line",
            None,
            "1.0 at 2512.5 Hz (half a line off) and 0.5 at 6257.5 Hz (0.3 line off)",
            cos(1.0, 2512.5, 0.1) + cos(0.5, 6257.5, 1.2),
        )
    )
    # 3. Pump-like tones in white noise (demo scenario frequencies).
    rng = rng_for(3)
    out.append(
        (
            "multitone_noise",
            3,
            "0.8 at 24.75 Hz, 0.3 at 173.25 Hz, 0.2 at 3200 Hz, 0.05 at 9000 Hz, "
            "plus Gaussian white noise sigma 0.02",
            cos(0.8, 24.75)
            + cos(0.3, 173.25, 0.7)
            + cos(0.2, 3200.0, 2.0)
            + cos(0.05, 9000.0)
            + rng.normal(0.0, 0.02, N_SAMPLES),
        )
    )
    # 4. White noise.
    rng = rng_for(4)
    out.append(("white_noise", 4, "Gaussian white noise, sigma 1", rng.normal(0.0, 1.0, N_SAMPLES)))
    # 5. Coloured (red) noise: white through a one-pole low-pass.
    rng = rng_for(5)
    white = rng.normal(0.0, 1.0, N_SAMPLES + 512)
    red = scipy.signal.lfilter([0.1], [1.0, -0.9], white)[512:]
    out.append(
        (
            "red_noise",
            5,
            "Gaussian white noise sigma 1 through lfilter([0.1], [1, -0.9]), first 512 dropped",
            red,
        )
    )
    # 6. DC offset with a small tone.
    out.append(("dc_offset", None, "DC 2.0 plus 0.1 at 1000 Hz", 2.0 + cos(0.1, 1000.0)))
    # 7. A tone exactly at Nyquist (alternating samples) and one below.
    n = np.arange(N_SAMPLES)
    out.append(
        (
            "nyquist_tone",
            None,
            "0.7 at Nyquist (0.7 * (-1)^n) plus 0.2 at 5000 Hz",
            0.7 * np.where(n % 2 == 0, 1.0, -1.0) + cos(0.2, 5000.0),
        )
    )
    # 8. Linear chirp 200 Hz -> 10 kHz over the record.
    out.append(
        (
            "chirp",
            None,
            "scipy.signal.chirp linear 200 Hz to 10000 Hz over the record, amplitude 1",
            scipy.signal.chirp(T, f0=200.0, t1=T[-1], f1=10_000.0, method="linear"),
        )
    )
    # 9. Impacts ringing a resonance: outer-race defect of the demo pump
    #    (BPFO 89.1 Hz) ringing 3.2 kHz, on top of the 1x shaft tone.
    rng = rng_for(9)
    fn, zeta = 3200.0, 0.03
    wn = 2 * np.pi * fn
    wd = wn * math.sqrt(1 - zeta**2)
    x = cos(0.3, 24.75) + rng.normal(0.0, 0.01, N_SAMPLES)
    period = 1.0 / 89.1
    k = 0
    while k * period < T[-1]:
        t0 = k * period
        tau = T - t0
        on = tau >= 0
        x[on] += 1.0 * np.exp(-zeta * wn * tau[on]) * np.sin(wd * tau[on])
        k += 1
    out.append(
        (
            "impacts",
            9,
            "unit impacts every 1/89.1 s ringing 3200 Hz (zeta 0.03) plus 0.3 at 24.75 Hz "
            "and Gaussian noise sigma 0.01",
            x,
        )
    )
    return out


def bands_for(name):
    """Bands (lo_hz, hi_hz inclusive, unit) on a channel measured in g."""
    common = [
        {"name": "all", "lo_hz": 0.0, "hi_hz": FS / 2, "unit": "g"},
        {"name": "low", "lo_hz": 10.0, "hi_hz": 1000.0, "unit": "g"},
        {"name": "mid", "lo_hz": 2000.0, "hi_hz": 4012.5, "unit": "g"},
        {"name": "velocity", "lo_hz": 10.0, "hi_hz": 1000.0, "unit": "mm/s"},
        {"name": "velocity_hi", "lo_hz": 1000.0, "hi_hz": 10_000.0, "unit": "mm/s"},
    ]
    if name == "nyquist_tone":
        common.append({"name": "top", "lo_hz": 12_000.0, "hi_hz": FS / 2, "unit": "g"})
    return common


def cases_for(name):
    """(window, nperseg, noverlap, nfft, detrend) combinations per signal."""
    cases = [(w, 1024, 512, 1024, "constant") for w in WINDOWS]
    if name in ("tone_off_line", "multitone_noise", "white_noise"):
        cases += [(w, 1024, 512, 2048, "constant") for w in ("rectangular", "hann", "flat-top")]
    if name in ("tone_off_line", "red_noise"):
        cases.append(("hann", 1024, 768, 1024, "constant"))
    if name == "white_noise":
        cases.append(("rectangular", 1024, 0, 1024, "constant"))
    if name in ("dc_offset", "nyquist_tone"):
        cases += [(w, 1024, 512, 1024, False) for w in WINDOWS]
    return cases


def band_weights(freqs, unit):
    """Power weight per line for a band on a g channel (bandwatch units.rs
    line_factor: g -> mm/s divides by 2*pi*f, lines below the low cut-off
    and DC are zero)."""
    if unit == "g":
        return np.ones_like(freqs)
    assert unit == "mm/s"
    w = np.zeros_like(freqs)
    ok = (freqs > 0) & (freqs >= LOW_CUT_HZ)
    w[ok] = (STANDARD_GRAVITY * 1000.0 / (2 * np.pi * freqs[ok])) ** 2
    return w


def density_subset(window, dens):
    """Full density for the rectangular and Hann cases; for the other
    windows every 8th line plus the 8 strongest (the 'spectrum' of those
    cases stays full), to keep the fixtures small."""
    if window in ("rectangular", "hann"):
        return {"density": nums(dens)}
    keep = set(range(0, len(dens), 8)) | set(np.argsort(dens)[-8:].tolist())
    keep.add(len(dens) - 1)
    bins = sorted(int(k) for k in keep)
    return {"density": nums(dens[bins]), "density_bins": bins}


def welch_case(x64, window, nperseg, noverlap, nfft, detrend, bands):
    win = get_window(window, nperseg)
    common = dict(
        fs=FS,
        window=win,
        nperseg=nperseg,
        noverlap=noverlap,
        nfft=nfft,
        detrend=detrend,
        return_onesided=True,
        average="mean",
    )
    f, spec = scipy.signal.welch(x64, scaling="spectrum", **common)
    f2, dens = scipy.signal.welch(x64, scaling="density", **common)
    assert np.array_equal(f, f2)
    step = nperseg - noverlap
    segments = (len(x64) - noverlap) // step
    df = FS / nfft
    band_power = {}
    for b in bands:
        k = np.nonzero((f >= b["lo_hz"]) & (f <= b["hi_hz"]))[0]
        band_power[b["name"]] = num(np.sum(dens[k] * band_weights(f[k], b["unit"])) * df)
    return {
        "window": window,
        "scipy_window": window_spec_json(WINDOWS[window]),
        "nperseg": nperseg,
        "noverlap": noverlap,
        "nfft": nfft,
        "detrend": detrend,
        "segments": segments,
        "df_hz": num(df),
        "enbw_bins": num(nperseg * np.sum(win**2) / np.sum(win) ** 2),
        "spectrum": nums(spec),
        **density_subset(window, dens),
        "band_power": band_power,
    }


def write(out_dir, name, doc):
    path = os.path.join(out_dir, name)
    text = json.dumps(doc, sort_keys=True, separators=(",", ":"), allow_nan=False)
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
        fh.write("\n")


def header(what):
    return {
        "generator": "tests/reference/make_fixtures.py",
        "what": what,
        "versions": versions(),
        "seed": SEED,
        "fs_hz": FS,
    }


def windows_fixture():
    n = 4096
    idx = [0, 1, 2, 3, 512, 1024, 1365, 2047, 2048, 2049, 3072, 4094, 4095]
    out = {}
    for name in WINDOWS:
        w = get_window(name, n)
        out[name] = {
            "scipy_window": window_spec_json(WINDOWS[name]),
            "coherent_gain": num(np.sum(w) / n),
            "enbw_bins": num(n * np.sum(w**2) / np.sum(w) ** 2),
            "sample_index": idx,
            "samples": nums(w[idx]),
        }
    doc = header("scipy.signal.get_window(spec, 4096, fftbins=True): periodic windows")
    doc["n"] = n
    doc["windows"] = out
    return doc


def fft_fixture():
    rng = rng_for(100)
    n = 64
    x32 = rng.normal(0.0, 1.0, n).astype(np.float32)
    x64 = x32.astype(np.float64)
    X = np.fft.rfft(x64)
    back = np.fft.irfft(X, n)
    doc = header("numpy.fft.rfft of a float32 signal (as float64) and irfft of the result")
    doc.update(
        {
            "n": n,
            "stream": 100,
            "samples_f32_hex": f32_hex(x32),
            "rfft_re": nums(X.real),
            "rfft_im": nums(X.imag),
            "irfft": nums(back),
        }
    )
    return doc


GAP_AT = 4584  # first sample after the gap (tests/reference_gaps.rs)
GAP_BLOCK = 1024
GAP_HOP = 512
GAP_COUNT = 4


def gap_fixture():
    """gap_resets.json: what a channel must publish after a discontinuity.

    One record of 8192 float32 samples (pump-like tones in noise, stream
    200). The Rust test breaks it at GAP_AT for each discontinuity reason
    and feeds only samples[GAP_AT:] after the break; the spectra here are
    of those post-gap samples alone:

    - linear (and exponential after COUNT blocks, which weighs every block
      1/n while n <= COUNT, so it is the same mean): scipy.signal.welch of
      the first COUNT post-gap blocks, average 'mean';
    - peak_hold: the per-line maximum (numpy) over the same blocks'
      spectra from scipy.signal.spectrogram (mode 'psd', scaling
      'spectrum': each segment as welch scales it);
    - exponential_6: the exponential average after 6 post-gap blocks,
      P = P + (P_n - P)/min(n, COUNT), computed in float64 by numpy on the
      spectrogram's per-block spectra (the rule in the README, "Averaging").
    """
    rng = rng_for(200)
    n = 8192
    t = np.arange(n) / FS

    def tone(a, f, phase=0.0):
        return a * np.cos(2 * np.pi * f * t + phase)

    # Pump P2's 1x and 2x (24.75 Hz), a vane-pass-like 7x, a bearing-band
    # tone, in noise (the demo's scenario, README).
    x = (
        tone(0.8, 24.75)
        + tone(0.3, 49.5, 0.4)
        + tone(0.5, 173.25, 1.1)
        + tone(0.2, 3125.0, 2.0)
        + rng.normal(0.0, 0.05, n)
    )
    x32 = np.asarray(x, dtype=np.float32)
    win = get_window("hann", GAP_BLOCK)
    common = dict(
        fs=FS,
        window=win,
        nperseg=GAP_BLOCK,
        noverlap=GAP_BLOCK - GAP_HOP,
        nfft=GAP_BLOCK,
        detrend="constant",
        return_onesided=True,
        scaling="spectrum",
    )
    span4 = GAP_BLOCK + (GAP_COUNT - 1) * GAP_HOP
    span6 = GAP_BLOCK + 5 * GAP_HOP
    post4 = x32[GAP_AT : GAP_AT + span4].astype(np.float64)
    post6 = x32[GAP_AT : GAP_AT + span6].astype(np.float64)
    _, linear = scipy.signal.welch(post4, average="mean", **common)
    _, _, per4 = scipy.signal.spectrogram(post4, mode="psd", **common)
    _, _, per6 = scipy.signal.spectrogram(post6, mode="psd", **common)
    assert per4.shape[1] == GAP_COUNT and per6.shape[1] == 6
    assert np.allclose(per4.mean(axis=1), linear, rtol=1e-12, atol=0)
    exp = np.zeros_like(per6[:, 0])
    for i in range(per6.shape[1]):
        exp += (per6[:, i] - exp) / min(i + 1, GAP_COUNT)
    doc = header("spectra of post-gap samples only (scipy.signal.welch, spectrogram)")
    doc.update(
        {
            "stream": 200,
            "n_samples": n,
            "samples_f32_hex": f32_hex(x32),
            "window": "hann",
            "block": GAP_BLOCK,
            "hop": GAP_HOP,
            "count": GAP_COUNT,
            "gap_at": GAP_AT,
            "linear": nums(linear),
            "peak_hold": nums(per4.max(axis=1)),
            "exponential_6": nums(exp),
        }
    )
    return doc


def trend_case(name, description, x, y):
    """One series: inputs rounded to DIGITS first, so that the references
    are computed on exactly the numbers the fixture holds."""
    x = np.asarray(nums(x))
    y = np.asarray(nums(y))
    ts = scipy.stats.theilslopes(y, x, 0.95)
    kt = scipy.stats.kendalltau(np.arange(len(y)), y, method="asymptotic")
    mk = pymannkendall.original_test(y, alpha=0.05)
    case = {
        "name": name,
        "description": description,
        "x": nums(x),
        "y": nums(y),
        "theilslopes": {
            "slope": num(ts.slope),
            "intercept": num(ts.intercept),
            "low_slope": num(ts.low_slope),
            "high_slope": num(ts.high_slope),
        },
        "kendalltau": {"tau_b": num(kt.statistic), "p": num(kt.pvalue)},
        "mann_kendall": {
            "s": num(mk.s),
            "var_s": num(mk.var_s),
            "z": num(mk.z),
            "p": num(mk.p),
            "tau": num(mk.Tau),
        },
    }
    if np.all(y > 0):
        tl = scipy.stats.theilslopes(np.log(y), x, 0.95)
        case["theilslopes_log"] = {
            "slope": num(tl.slope),
            "intercept": num(tl.intercept),
            "low_slope": num(tl.low_slope),
            "high_slope": num(tl.high_slope),
        }
    return case


def trend_fixture():
    cases = []
    minute = 60.0
    # Linear growth: 2 mm/s at the start, +0.5 mm/s a day, noise 0.1 mm/s,
    # one point a minute for 6 h (361 points).
    rng = rng_for(300)
    x = np.arange(361) * minute
    y = 2.0 + 0.5 / 86400.0 * x + rng.normal(0, 0.1, x.size)
    cases.append(trend_case("linear", "2 + 0.5/day, N(0, 0.1) noise, 1/min for 6 h", x, y))
    # Exponential growth: 1.5 mm/s, doubling every 5 days, 3 % noise, one
    # point an hour for 10 days (241 points).
    rng = rng_for(301)
    x = np.arange(241) * 3600.0
    y = 1.5 * np.exp(np.log(2) / (5 * 86400.0) * x) * (1 + rng.normal(0, 0.03, x.size))
    cases.append(trend_case("exponential", "1.5 doubling in 5 days, 3 % noise, 1/h for 10 days", x, y))
    # Ties: the linear series rounded to 0.1 (many equal values).
    rng = rng_for(302)
    x = np.arange(120) * minute
    y = np.round(1.0 + 0.2 / 3600.0 * x + rng.normal(0, 0.15, x.size), 1)
    cases.append(trend_case("ties", "a slow rise rounded to 0.1: groups of equal values", x, y))
    # No trend: white noise.
    rng = rng_for(303)
    x = np.arange(200) * minute
    y = 3.0 + rng.normal(0, 0.2, x.size)
    cases.append(trend_case("flat", "3 + N(0, 0.2), no trend", x, y))
    # Repeated times (two values in some minutes) and a gap.
    rng = rng_for(304)
    x = np.sort(np.concatenate([np.arange(30), np.arange(0, 30, 3), np.arange(60, 80)])) * minute
    y = 0.8 + 0.01 / minute * x / 10 + rng.normal(0, 0.05, x.size)
    cases.append(trend_case("repeated_times", "equal times (ties in x) and a 30 min gap", x, y))
    # The fewest points a projection takes.
    rng = rng_for(305)
    x = np.arange(10) * minute
    y = 1.0 + 0.05 * np.arange(10) + rng.normal(0, 0.02, 10)
    cases.append(trend_case("ten_points", "10 points, a clear rise", x, y))
    # Decreasing, for the falling direction.
    rng = rng_for(306)
    x = np.arange(150) * minute
    y = 5.0 - 1.0 / 3600.0 * x + rng.normal(0, 0.3, x.size)
    cases.append(trend_case("falling", "5 - 1/h, N(0, 0.3)", x, y))

    # Known crossing times: the series above are made with known lines, so
    # the time a limit is reached is known exactly.
    crossings = [
        # linear: 2 + 0.5/day * t = 4.5 at t = 5 days.
        {"case": "linear", "growth": "linear", "limit": 4.5, "rising": True,
         "true_crossing_s": num(5 * 86400.0)},
        # exponential: 1.5 * 2^(t / 5 d) = 12 at t = 15 days.
        {"case": "exponential", "growth": "exponential", "limit": 12.0, "rising": True,
         "true_crossing_s": num(15 * 86400.0)},
        # falling: 5 - t/h = 1 at t = 4 h.
        {"case": "falling", "growth": "linear", "limit": 1.0, "rising": False,
         "true_crossing_s": num(4 * 3600.0)},
    ]
    doc = header("trend statistics: scipy.stats.theilslopes, scipy.stats.kendalltau, pymannkendall.original_test")
    doc["versions"]["pymannkendall"] = pymannkendall.__version__
    doc["cases"] = cases
    doc["crossings"] = crossings
    return doc


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    out_dir = sys.argv[1] if len(sys.argv) > 1 else os.path.join(here, "fixtures")
    os.makedirs(out_dir, exist_ok=True)
    write(out_dir, "windows.json", windows_fixture())
    write(out_dir, "fft_roundtrip.json", fft_fixture())
    write(out_dir, "gap_resets.json", gap_fixture())
    write(out_dir, "trend_stats.json", trend_fixture())
    for name, stream, description, x in signals():
        x32 = np.asarray(x, dtype=np.float32)
        x64 = x32.astype(np.float64)
        bands = bands_for(name)
        doc = header(f"scipy.signal.welch of signal {name!r}")
        doc.update(
            {
                "signal": name,
                "stream": stream,
                "description": description,
                "n_samples": len(x32),
                "samples_f32_hex": f32_hex(x32),
                "low_cut_hz": LOW_CUT_HZ,
                "channel_unit": "g",
                "bands": bands,
                "cases": [
                    welch_case(x64, *c, bands=bands) for c in cases_for(name)
                ],
            }
        )
        write(out_dir, f"welch_{name}.json", doc)


if __name__ == "__main__":
    main()
