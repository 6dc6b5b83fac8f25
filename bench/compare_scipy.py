#!/usr/bin/env python3
"""Side-by-side check and speed comparison of bandwatch against
scipy.signal.welch, on the same signal in the same run.

Reference library: numpy and scipy from PyPI, the versions pinned in
tests/reference/requirements.txt. Set up once:

    python3 -m venv .venv
    .venv/bin/pip install -r tests/reference/requirements.txt
    cargo build --release
    .venv/bin/python bench/compare_scipy.py            # 64 channels, N = 8192

What it does:

1. Writes a test signal (pump-like tones and noise from
   numpy.random.default_rng with a fixed seed, float32) for C channels,
   exactly enough samples for K blocks of N at 75 % overlap, to a raw file.
2. Runs `bandwatch bench --only welch --signal FILE` on it, which pushes
   the samples through bandwatch's ring and channel DSP (Hann window,
   mean detrend, realfft, amplitude-corrected one-sided power spectrum,
   linear average of the K blocks, band values) and reports the averaged
   spectra, band values and the time taken, median over repeats, one thread.
3. Computes the same averaged spectra with scipy.signal.welch
   (window='hann' (periodic), nperseg=N, noverlap=3N/4, detrend='constant',
   scaling='spectrum', average='mean') and the same band values from them,
   times it the same way on the same float32 samples (scipy then computes
   in single precision, as bandwatch does), and checks agreement against a
   float64 scipy run.
4. Prints the largest deviations, pass/fail, and the speed ratio.

Agreement (same rule as tests/reference/README.md, with the weak-line term
scaled for the longer FFT): per line |bandwatch - scipy| <= 2e-5*|scipy| +
1e-8*peak; band values within 1e-5 relative.

Band values as bandwatch defines them (src/dsp/bands.rs): the lines whose
centre lies in [lo, hi]; each line's power weighted by the squared unit
factor (g to mm/s: 9806.65/(2*pi*f), zero below the 5 Hz low cut and at
DC); rms = sqrt(sum(P*W) / B) with B = ENBW*nfft/block the window's noise
bandwidth in lines; peak = sqrt(2*max(P*W)).
"""

import argparse
import json
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time

import numpy as np
import scipy
import scipy.signal

FS = 25_600.0
STANDARD_GRAVITY = 9.80665  # m/s^2, exact (CGPM 1901)
LOW_CUT_HZ = 5.0  # the bench channels' integration_low_cut_hz


def signal(channels, samples, seed):
    rng = np.random.default_rng(seed)
    t = np.arange(samples) / FS
    x = np.empty((channels, samples), dtype=np.float32)
    for c in range(channels):
        shaft = 24.75 * (1 + 0.001 * c)
        v = (0.3 * np.sin(2 * np.pi * shaft * t + c)
             + 0.05 * np.sin(2 * np.pi * 7 * shaft * t)
             + 0.02 * np.sin(2 * np.pi * 3200 * t) * np.maximum(np.sin(2 * np.pi * 89.1 * t), 0)
             + 0.01 * c / max(channels, 1)  # a DC offset, removed by the detrend
             + 0.05 * rng.standard_normal(samples))
        x[c] = v.astype(np.float32)
    return x


def band_values(p, bands, n, window):
    df = FS / n
    last = p.shape[-1] - 1
    enbw = n * np.sum(window.astype(np.float64) ** 2) / np.sum(window.astype(np.float64)) ** 2
    nbw_lines = enbw  # nfft == block
    out = []
    for b in bands:
        first = min(math.ceil(b["lo_hz"] / df), last)
        end = max(min(math.floor(b["hi_hz"] / df), last), first)
        k = np.arange(first, end + 1)
        f = k * df
        if b["unit"] == "mm/s":
            w = np.where((f > 0) & (f >= LOW_CUT_HZ),
                         (STANDARD_GRAVITY * 1e3 / (2 * np.pi * np.where(f > 0, f, 1))) ** 2, 0.0)
        elif b["unit"] == "g":
            w = np.ones_like(f)
        else:
            raise SystemExit(f"unit {b['unit']} not handled by this script")
        pw = p[..., first:end + 1] * w
        if b["measure"] == "rms":
            out.append(np.sqrt(np.maximum(pw.sum(axis=-1) / nbw_lines, 0)))
        else:
            out.append(np.sqrt(2 * np.maximum(pw.max(axis=-1), 0)))
    return out


def scipy_run(x, n):
    _, p = scipy.signal.welch(x, fs=FS, window="hann", nperseg=n, noverlap=3 * n // 4,
                              detrend="constant", scaling="spectrum", average="mean", axis=-1)
    return p


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--bandwatch", default=os.path.join(here, "..", "target", "release", "bandwatch"))
    ap.add_argument("--channels", type=int, default=64)
    ap.add_argument("--n", type=int, default=8192)
    ap.add_argument("--blocks", type=int, default=22, help="blocks averaged per channel (K)")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--seed", type=int, default=20_260_611)
    ap.add_argument("--json", help="write the comparison here")
    a = ap.parse_args()

    n, hop = a.n, a.n // 4
    samples = n + (a.blocks - 1) * hop
    x = signal(a.channels, samples, a.seed)
    window = scipy.signal.get_window("hann", n)
    # Timing: bandwatch and scipy alternate, one repeat each per round, so
    # that both see the same machine load; the ratio is taken per round.
    # scipy gets float32, as bandwatch does (it then computes in single
    # precision); one thread each.
    bw_times, times = [], []
    with tempfile.TemporaryDirectory() as d:
        sig = os.path.join(d, "signal.f32")
        out = os.path.join(d, "welch.json")
        x.astype("<f4").tofile(sig)
        cmd = [a.bandwatch, "bench", "--only", "welch", "--signal", sig,
               "--signal-channels", str(a.channels), "--n", str(n),
               "--repeats", "3", "--json", out]
        for _ in range(a.repeats):
            subprocess.run(cmd, check=True)
            with open(out) as f:
                bw = json.load(f)
            bw_times.append(bw["median_seconds"])
            t0 = time.perf_counter()
            p32 = scipy_run(x, n)
            band_values(p32, bw["bands"], n, window)
            times.append(time.perf_counter() - t0)
    times64 = []
    for _ in range(a.repeats):
        t0 = time.perf_counter()
        p64 = scipy_run(x.astype(np.float64), n)
        ref_bands = band_values(p64, bw["bands"], n, window)
        times64.append(time.perf_counter() - t0)

    ours = np.array(bw["spectra"], dtype=np.float64)
    assert ours.shape == p64.shape, (ours.shape, p64.shape)
    assert bw["averages"] == a.blocks, bw["averages"]
    peak = p64.max(axis=-1, keepdims=True)
    err = np.abs(ours - p64)
    allowed = 2e-5 * np.abs(p64) + 1e-8 * peak
    strong = p64 >= peak * 1e-3
    worst_rel_strong = float((err[strong] / p64[strong]).max())
    worst_of_peak = float((err / peak).max())
    spectra_ok = bool((err <= allowed).all())
    band_report = []
    bands_ok = True
    for b, ref in zip(bw["bands"], ref_bands):
        v = np.array(b["values"])
        rel = float(np.max(np.abs(v - ref) / np.maximum(np.abs(ref), 1e-30)))
        ok = rel <= 1e-5
        bands_ok &= ok
        band_report.append({"band": b["name"], "unit": b["unit"], "measure": b["measure"],
                            "max_rel_error": rel, "ok": ok})

    t_bw = statistics.median(bw_times)
    t_sp = statistics.median(times)
    ratios = [sp / b for sp, b in zip(times, bw_times)]
    t_sp64 = statistics.median(times64)
    work = a.channels * samples
    result = {
        "numpy": np.__version__, "scipy": scipy.__version__,
        "channels": a.channels, "n": n, "hop": hop, "blocks": a.blocks, "samples_per_channel": samples,
        "spectra_ok": spectra_ok, "worst_rel_error_strong_lines": worst_rel_strong,
        "worst_error_of_peak": worst_of_peak, "bands": band_report, "bands_ok": bands_ok,
        "bandwatch_seconds": bw_times, "scipy_f32_seconds": times, "scipy_f64_seconds": times64,
        "speed_ratio_vs_scipy_f32_per_round": ratios,
        "speed_ratio_vs_scipy_f32": statistics.median(ratios), "speed_ratio_vs_scipy_f64": t_sp64 / t_bw,
    }
    print(f"numpy {np.__version__}, scipy {scipy.__version__}; {a.channels} channels x {samples} samples, "
          f"N = {n}, hop = {hop}, {a.blocks} blocks averaged")
    print(f"spectra: worst |error|/value on lines within 30 dB of the peak {worst_rel_strong:.2e}, "
          f"worst |error|/peak {worst_of_peak:.2e}: {'ok' if spectra_ok else 'FAIL'}")
    for b in band_report:
        print(f"band {b['band']:<18} ({b['measure']}, {b['unit']}): max rel error {b['max_rel_error']:.2e} "
              f"{'ok' if b['ok'] else 'FAIL'}")
    print(f"time, median of {a.repeats}: bandwatch {t_bw * 1e3:.1f} ms "
          f"({work / t_bw / 1e6:.1f} M samples/s), scipy f32 {t_sp * 1e3:.1f} ms, scipy f64 {t_sp64 * 1e3:.1f} ms")
    print(f"bandwatch is {statistics.median(ratios):.1f}x scipy.signal.welch (f32), median of per-round ratios "
          f"[min-max {min(ratios):.1f}-{max(ratios):.1f}]; {t_sp64 / t_bw:.1f}x scipy in f64; target >= 10x")
    if a.json:
        with open(a.json, "w") as f:
            json.dump(result, f, indent=1)
    return 0 if spectra_ok and bands_ok else 1


if __name__ == "__main__":
    sys.exit(main())
