#!/usr/bin/env python3
"""The NumPy peer of the common-process likelihood (docs/common-process.md), the slow and plain way.

Each pulsar is reduced without any common process in its auto-power by the peer's own reduction
(ptacorr_ref.py: X_a = F^T P_a^-1 r_a, Z_a = F^T P_a^-1 F). The reduced data of the array,
X = (X_a), is then Gaussian with covariance

    Sigma(A, gamma) = Z + Z Phi Z,   Z = blockdiag(Z_a),   Phi = A^2 Gamma (x) diag(phi_0(gamma))

(van Haasteren & Vallisneri 2014, eqs. 22-27: X is a sufficient statistic for the common
process), so, up to a constant that does not depend on the common process,

    ln L(A, gamma) - ln L(0) = -1/2 X^T Sigma^-1 X - 1/2 ln det Sigma + 1/2 X^T Z^-1 X + 1/2 ln det Z.

This peer evaluates that with one Cholesky factorisation of the full 2KN x 2KN matrix Sigma per
(model, A, gamma) point: no eigen form, no Woodbury identity, no shared code with the engine.
It is the reference the engine's fast eigen form is checked against (tests/tests/common_peer.rs)
and the baseline of the speed comparison (benchmarks/common).

    python3 tests/reference/common_ref.py RELEASE --points POINTS.csv --out VALUES.csv
        [--frequencies K] [--limit N]

POINTS.csv has the header `model,log10_amplitude,spectral_index` (model: curn, hd, monopole,
dipole); VALUES.csv repeats each point with `log_likelihood_ratio` and `seconds` (the time of that
point's Cholesky evaluation). --limit evaluates only the first N points (for timing a subset).
A JSON line with the reduction time and the mean time per point is printed to stdout.
Python 3.11, NumPy only, float64 throughout.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import ptacorr_ref as ref  # noqa: E402  (the peer's own release reader and reduction)

MODELS = ("curn", "hd", "monopole", "dipole")


def reduce_array(release_dir: Path, k: int):
    """(labels, directions, X list, Z list, freqs, T_span): every pulsar reduced with its own
    noise from noise.toml and no common process."""
    _, pulsars = ref.read_release(release_dir)
    _, noise = ref.read_noise(release_dir)
    all_mjd = np.concatenate([p.mjd for p in pulsars])
    t0 = float(all_mjd.min())
    t_span = (float(all_mjd.max()) - t0) * ref.SECONDS_PER_DAY
    st = ref.Settings(k, ref.DEFAULT_SPECTRAL_INDEX, None, t0, t_span)
    xs, zs = [], []
    for p in pulsars:
        x, z = ref.reduce_pulsar(ref.pulsar_model(p, noise.get(p.label, ref.PulsarNoise()), st))
        xs.append(x)
        zs.append(z)
    return [p.label for p in pulsars], np.array([p.direction for p in pulsars]), xs, zs, \
        st.freqs(k), t_span


def correlation_matrix(model: str, directions: np.ndarray) -> np.ndarray:
    """Gamma_ab with 1 on the diagonal: identity (curn), Hellings & Downs 1983 (hd), 1
    (monopole), cos zeta (dipole) between distinct pulsars."""
    n = directions.shape[0]
    if model == "curn":
        return np.eye(n)
    cos_z = np.clip(directions @ directions.T, -1.0, 1.0)
    g = ref.PATTERNS[model](cos_z)
    np.fill_diagonal(g, 1.0)
    return g


def chol_logdet_solve(s: np.ndarray, x: np.ndarray) -> tuple[float, float]:
    """(ln det S, x^T S^-1 x) for symmetric positive-definite S by one Cholesky factorisation of
    the diagonally scaled matrix D S D, D = diag(S)^-1/2 (the scaling changes neither result
    once undone; it only keeps the factorisation accurate)."""
    d = 1.0 / np.sqrt(np.diag(s))
    L = np.linalg.cholesky(s * d[:, None] * d[None, :])
    y = np.linalg.solve(L, x * d)            # forward substitution (general solve on a triangle)
    logdet = 2.0 * float(np.sum(np.log(np.diag(L)))) - 2.0 * float(np.sum(np.log(d)))
    return logdet, float(y @ y)


class ArrayLikelihood:
    def __init__(self, xs, zs, directions, freqs, t_span):
        self.x = np.concatenate(xs)
        self.m = zs[0].shape[0]
        self.n = len(zs)
        self.zs = zs
        self.directions = directions
        self.freqs = freqs
        self.t_span = t_span
        dim = self.n * self.m
        self.z = np.zeros((dim, dim))
        for a, za in enumerate(zs):
            self.z[a * self.m:(a + 1) * self.m, a * self.m:(a + 1) * self.m] = za
        self.base_logdet, self.base_quad = chol_logdet_solve(self.z, self.x)
        self._cache = {}

    def z_phi0_z(self, model: str, gamma: float) -> np.ndarray:
        """W = Z (Gamma (x) diag(phi_0)) Z, block (a, b) = Gamma_ab Z_a diag(phi_0) Z_b; the
        template phi_0 is the A = 1 power law (Lentati et al. 2013). Cached per (model, gamma):
        Sigma = Z + A^2 W."""
        key = (model, gamma)
        if key not in self._cache:
            self._cache.clear()
            g = correlation_matrix(model, self.directions)
            phi0 = ref.interleave(ref.power_law_prior(self.freqs, 0.0, gamma, self.t_span))
            zd = [za * phi0[None, :] for za in self.zs]           # Z_a diag(phi_0)
            w = np.zeros_like(self.z)
            m = self.m
            for a in range(self.n):
                for b in range(self.n):
                    if g[a, b] != 0.0:
                        w[a * m:(a + 1) * m, b * m:(b + 1) * m] = g[a, b] * (zd[a] @ self.zs[b])
            self._cache[key] = 0.5 * (w + w.T)
        return self._cache[key]

    def log_likelihood_ratio(self, model: str, log10_amplitude: float, gamma: float) -> float:
        sigma = self.z + 10.0 ** (2.0 * log10_amplitude) * self.z_phi0_z(model, gamma)
        logdet, quad = chol_logdet_solve(sigma, self.x)
        return -0.5 * (quad - self.base_quad) - 0.5 * (logdet - self.base_logdet)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="NumPy peer of the common-process likelihood "
                                             "(one dense Cholesky per point).")
    ap.add_argument("release", type=Path)
    ap.add_argument("--points", type=Path, required=True,
                    help="CSV: model,log10_amplitude,spectral_index")
    ap.add_argument("--out", type=Path, required=True, help="CSV of the values")
    ap.add_argument("--frequencies", type=int, default=ref.DEFAULT_FREQUENCIES)
    ap.add_argument("--limit", type=int, default=None, help="evaluate only the first N points")
    args = ap.parse_args(argv)
    points = []
    with args.points.open(newline="") as fh:
        for line, row in enumerate(csv.DictReader(fh), start=2):
            model = row.get("model", "")
            if model not in MODELS:
                print(f"error: {args.points} line {line}, field model: {model!r} is not one of "
                      f"{', '.join(MODELS)}", file=sys.stderr)
                return 2
            try:
                points.append((model, float(row["log10_amplitude"]),
                               float(row["spectral_index"])))
            except (KeyError, ValueError, TypeError):
                print(f"error: {args.points} line {line}: log10_amplitude and spectral_index must "
                      "be numbers", file=sys.stderr)
                return 2
    if args.limit is not None:
        points = points[:args.limit]
    t = time.perf_counter()
    try:
        _, directions, xs, zs, freqs, t_span = reduce_array(args.release, args.frequencies)
        lik = ArrayLikelihood(xs, zs, directions, freqs, t_span)
    except ref.ReleaseError as err:
        print(f"error: reading release {args.release}\n  caused by: {err}", file=sys.stderr)
        return 2
    except np.linalg.LinAlgError as err:
        print(f"error: linear algebra failed ({err}); is the noise model positive definite?",
              file=sys.stderr)
        return 2
    t_reduce = time.perf_counter() - t
    rows = []
    t_all = time.perf_counter()
    for model, u, g in points:
        t = time.perf_counter()
        v = lik.log_likelihood_ratio(model, u, g)
        rows.append((model, u, g, v, time.perf_counter() - t))
    t_points = time.perf_counter() - t_all
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with args.out.open("w", newline="") as fh:
        fh.write("model,log10_amplitude,spectral_index,log_likelihood_ratio,seconds\n")
        for model, u, g, v, s in rows:
            fh.write(f"{model},{u!r},{g!r},{v!r},{s!r}\n")
    print(json.dumps({"pulsars": len(xs), "dimension": int(lik.x.size),
                      "reduce_seconds": t_reduce, "points": len(rows),
                      "points_seconds": t_points,
                      "seconds_per_point": t_points / max(len(rows), 1),
                      "non_finite": sum(1 for r in rows if not math.isfinite(r[3]))}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
