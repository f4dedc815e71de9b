#!/usr/bin/env python3
"""Write a small, self-consistent, fictional release in ptacorr's format, for checking the NumPy
peer's dense and Woodbury modes against each other (and the engine against the peer).

    python3 tests/reference/make_toy_release.py OUT_DIR [--seed N] [--pulsars 5] [--toas 40]

What it contains (all invented: labels P01.., backends TOY-A and TOY-B):
  * irregular epochs (random gaps), 1-3 TOAs per epoch at different radio frequencies, mostly at
    the same MJD, some minutes apart (same ECORR epoch) and some two hours apart (new epoch);
  * two backends; on P01, EFAC, EQUAD and ECORR on TOY-A and only an EFAC on TOY-B;
  * red noise on P01 (default number of frequencies), P03 (fewer than K) and P04 (more than K);
  * a DM term on P02; a design-matrix file for P03; the other pulsars use the defaults;
  * a common process in noise.toml [common]; sky positions given both as hh:mm:ss / dd:mm:ss and
    in degrees.
Residuals are drawn from that model (white + ECORR + red + DM + a Hellings-Downs-correlated
background, Hellings & Downs 1983) and then have a least-squares fit of the timing model
removed, as a timing package would.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

import numpy as np

YEAR_S = 365.25 * 86400.0
F_YR = 1.0 / YEAR_S
K_SIM = 14
BACKENDS = {"TOY-A": [1300.0, 1400.0, 1500.0], "TOY-B": [700.0, 1400.0, 2500.0]}
COMMON = (-14.3, 13.0 / 3.0)


def phi_power_law(f, log10_a, gamma, t_span):
    """Lentati et al. 2013: A^2/(12 pi^2) f_yr^(gamma-3) f^-gamma / T_span."""
    return 10.0 ** (2 * log10_a) / (12 * math.pi ** 2) * F_YR ** (gamma - 3) * f ** -gamma / t_span


def fourier(t, f):
    arg = 2 * math.pi * np.outer(t, f)
    out = np.empty((t.size, 2 * f.size))
    out[:, 0::2], out[:, 1::2] = np.sin(arg), np.cos(arg)
    return out


def hd(cos_z):
    """Hellings & Downs 1983, distinct pulsars."""
    x = (1 - cos_z) / 2
    return 0.5 - x / 4 + 1.5 * (x * np.log(x) if x > 0 else 0.0)


def sexagesimal(value, plus):
    sign = "-" if value < 0 else ("+" if plus else "")
    v = abs(value)
    a = int(v)
    b = int((v - a) * 60)
    c = (v - a - b / 60) * 3600
    if round(c, 1) >= 60.0:
        c, b = 0.0, b + 1
    if b >= 60:
        b, a = 0, a + 1
    return f"{sign}{a:02d}:{b:02d}:{c:04.1f}"


def toa_times(rng, n_toas, start, span_days):
    """Irregular epochs with 1-3 TOAs each; returns sorted (mjd, freq, backend) lists."""
    mjd, freq, backend = [], [], []
    t = start + rng.uniform(0, 30)
    mean_gap = span_days * 2.0 / n_toas
    while len(mjd) < n_toas:
        be = "TOY-A" if rng.random() < 0.6 else "TOY-B"
        m = min(int(rng.integers(1, 4)), n_toas - len(mjd))
        chans = rng.permutation(BACKENDS[be])[:m]
        for i, ch in enumerate(chans):
            dt = 0.0
            if i > 0:
                u = rng.random()
                if u < 0.2:
                    dt = rng.uniform(5, 50) / 1440.0       # minutes later: same ECORR epoch
                elif u < 0.3:
                    dt = 2.0 / 24.0                        # two hours later: a new epoch
            mjd.append(round(t + dt, 9))
            freq.append(float(ch))
            backend.append(be)
        t += rng.exponential(mean_gap) + 1.0
    order = np.argsort(mjd, kind="stable")
    return ([mjd[i] for i in order], [freq[i] for i in order], [backend[i] for i in order])


def main(argv=None):
    ap = argparse.ArgumentParser(description="Write a small fictional release for checks.")
    ap.add_argument("out", type=Path)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--pulsars", type=int, default=5)
    ap.add_argument("--toas", type=int, default=40)
    args = ap.parse_args(argv)
    if args.pulsars < 2 or args.toas < 20:
        # Fewer TOAs leave too few distinct epochs once P03's six timing-model columns are
        # marginalised: its reduced Z would be zero (pure rounding).
        ap.error("need at least 2 pulsars and 20 TOAs per pulsar")
    rng = np.random.default_rng(args.seed)
    out = args.out
    (out / "residuals").mkdir(parents=True, exist_ok=True)
    (out / "design").mkdir(parents=True, exist_ok=True)

    labels = [f"P{i + 1:02d}" for i in range(args.pulsars)]
    span_days = 8.0 * 365.25
    toas = [toa_times(rng, args.toas, 53000.0 + rng.uniform(0, 200), span_days) for _ in labels]
    all_mjd = np.concatenate([np.array(m) for m, _, _ in toas])
    t0, t_span = all_mjd.min(), (all_mjd.max() - all_mjd.min()) * 86400.0

    # Sky: isotropic.
    ra = rng.uniform(0, 2 * math.pi, args.pulsars)
    dec = np.arcsin(rng.uniform(-1, 1, args.pulsars))
    p = np.column_stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)])

    # Noise model (as written to noise.toml).
    white = {"P01": {"TOY-A": (1.1, -7.2, -6.9), "TOY-B": (0.95, None, None)}}
    red = {"P01": (-13.8, 3.2, None), "P03": (-14.2, 4.0, 8)}
    if args.pulsars >= 4:
        red["P04"] = (-13.5, 2.5, 20)
    dm = {"P02": (-13.6, 2.4, None)}

    # A Hellings-Downs-correlated background on K_SIM frequencies: c ~ N(0, phi G).
    G = np.array([[1.0 if a == b else hd(float(np.clip(p[a] @ p[b], -1, 1)))
                   for b in range(args.pulsars)] for a in range(args.pulsars)])
    f_sim = np.arange(1, K_SIM + 1) / t_span
    phi_c = np.repeat(phi_power_law(f_sim, *COMMON, t_span), 2)
    coeff = (np.linalg.cholesky(G) @ rng.standard_normal((args.pulsars, 2 * K_SIM))) * np.sqrt(phi_c)

    lines = ['[release]', 'title = "Toy release for peer checks (fictional)"', ""]
    for k, label in enumerate(labels):
        mjd, freq, backend = (np.array(x) for x in toas[k])
        backend = list(backend)
        n = mjd.size
        t = (mjd - t0) * 86400.0
        sigma = 1e-7 * rng.uniform(0.8, 2.0, n)
        w = white.get(label, {})
        efac = np.array([w.get(b, (1.0, None, None))[0] for b in backend])
        equad = np.array([0.0 if w.get(b, (1, None))[1] is None else 10 ** w[b][1] for b in backend])
        r = rng.standard_normal(n) * np.sqrt((efac * sigma) ** 2 + equad ** 2)
        for b, (_, _, lec) in w.items():          # ECORR: one offset per epoch (gap > 3600 s)
            if lec is None:
                continue
            idx = [i for i in range(n) if backend[i] == b]
            prev = None
            for i in idx:
                if prev is None or t[i] - t[prev] > 3600.0:
                    jitter = rng.standard_normal() * 10 ** lec
                r[i] += jitter
                prev = i
        if label in red:
            la, g, nf = red[label]
            f = np.arange(1, (nf or K_SIM) + 1) / t_span
            r += fourier(t, f) @ (rng.standard_normal(2 * f.size) * np.sqrt(np.repeat(phi_power_law(f, la, g, t_span), 2)))
        if label in dm:
            la, g, nf = dm[label]
            f = np.arange(1, (nf or K_SIM) + 1) / t_span
            r += (fourier(t, f) @ (rng.standard_normal(2 * f.size) * np.sqrt(np.repeat(phi_power_law(f, la, g, t_span), 2)))) \
                * (1400.0 / freq) ** 2
        r += fourier(t, f_sim) @ coeff[k]

        # Timing model; P03 ships its own design matrix (raw units: the reader normalises).
        if label == "P03":
            yr = 2 * math.pi * t / YEAR_S
            M = np.column_stack([np.ones(n), t, t * t, np.sin(yr), np.cos(yr),
                                 4.148808e3 / freq ** 2])
            names = "offset,spin,spin_down,annual_sin,annual_cos,dispersion"
            with (out / "design" / f"{label}.csv").open("w") as fh:
                fh.write(names + "\n")
                for row in M:
                    fh.write(",".join(repr(float(v)) for v in row) + "\n")
        else:
            M = np.column_stack([np.ones(n), t, t * t])
        Mn = M / np.linalg.norm(M, axis=0)
        r = r - Mn @ np.linalg.lstsq(Mn, r, rcond=None)[0]   # fitted away, as a timing package would

        with (out / "residuals" / f"{label}.csv").open("w") as fh:
            fh.write("mjd,residual_s,sigma_s,freq_mhz,backend\n")
            for i in range(n):
                fh.write(f"{float(mjd[i])!r},{float(r[i])!r},{float(sigma[i])!r},{float(freq[i])!r},{backend[i]}\n")

        lines += ["[[pulsar]]", f'label = "{label}"']
        if k % 2 == 0:
            lines += [f'ra = "{sexagesimal(math.degrees(ra[k]) / 15.0, False)}"',
                      f'dec = "{sexagesimal(math.degrees(dec[k]), True)}"']
        else:
            lines += [f"ra_deg = {math.degrees(ra[k])!r}", f"dec_deg = {math.degrees(dec[k])!r}"]
        lines.append(f'residuals = "residuals/{label}.csv"')
        if label == "P03":
            lines.append(f'design_matrix = "design/{label}.csv"')
        lines.append("")
    (out / "release.toml").write_text("\n".join(lines))

    nz = ["[common]", f"log10_amplitude = {COMMON[0]!r}", f"spectral_index = {COMMON[1]!r}", ""]
    for label in labels:
        if label not in white and label not in red and label not in dm:
            continue
        nz.append(f"[pulsar.{label}]")
        if label in white:
            items = []
            for b, (ef, leq, lec) in white[label].items():
                s = f'{{ backend = "{b}", efac = {ef!r}'
                s += "" if leq is None else f", equad_log10_s = {leq!r}"
                s += "" if lec is None else f", ecorr_log10_s = {lec!r}"
                items.append(s + " }")
            nz.append("white = [\n  " + ",\n  ".join(items) + ",\n]")
        for name, table in (("red", red), ("dm", dm)):
            if label in table:
                la, g, nf = table[label]
                s = f"{name} = {{ log10_amplitude = {la!r}, spectral_index = {g!r}"
                s += "" if nf is None else f", n_frequencies = {nf}"
                nz.append(s + " }")
        nz.append("")
    (out / "noise.toml").write_text("\n".join(nz))


if __name__ == "__main__":
    main()
