#!/usr/bin/env python3
"""The NumPy peer of one pulsar's noise likelihood (docs/noise-estimation.md), written from the
formulas, independent of the engine's code; for benchmarks/noise and the peer comparison.

    noise_likelihood.py RELEASE LABEL [--repeat N]

prints `ln_l VALUE` and `seconds_per_evaluation VALUE` for the pulsar LABEL under the release's
own noise.toml. The model pieces (timing model, Fourier and chromatic bases, ECORR epochs,
power-law prior) are those of ptacorr_ref.py; the likelihood is the timing-model-marginalised
Gaussian (van Haasteren & Levin 2013, MNRAS 428, 1147) in the Woodbury form (van Haasteren &
Vallisneri 2014, MNRAS 446, 1170), with ECORR as epoch columns of T:

    T = [M | F_red | F_dm | U],  B = diag(inf on M, phi elsewhere),  S = B^-1 + T^T N^-1 T,
    r^T P r = r^T N^-1 r - (T^T N^-1 r)^T S^-1 (T^T N^-1 r),
    ln L = -1/2 [r^T P r + ln det N + ln det B + ln det S] - (n - m)/2 ln 2 pi.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import ptacorr_ref as ref  # noqa: E402


def log_likelihood(model: ref.PulsarModel) -> float:
    r = model.residual
    n_inv = 1.0 / model.white_variance
    T = np.column_stack([model.M] + [b for b, _ in model.blocks])
    phi = np.concatenate([p for _, p in model.blocks]) if model.blocks else np.zeros(0)
    m = model.M.shape[1]
    b_inv = np.concatenate([np.zeros(m), 1.0 / phi])
    TN = T * n_inv[:, None]
    S = np.diag(b_inv) + T.T @ TN
    d = 1.0 / np.sqrt(np.diag(S))
    L = np.linalg.cholesky(S * d[:, None] * d[None, :])
    z = np.linalg.solve(L, (TN.T @ r) * d)
    r_p_r = float(r @ (n_inv * r) - z @ z)
    log_det_s = 2.0 * float(np.sum(np.log(np.diag(L)))) - 2.0 * float(np.sum(np.log(d)))
    log_det_n = float(np.sum(np.log(model.white_variance)))
    log_det_b = float(np.sum(np.log(phi)))
    n = r.size
    return -0.5 * (r_p_r + log_det_n + log_det_b + log_det_s) - 0.5 * (n - m) * math.log(2 * math.pi)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("release", type=Path)
    ap.add_argument("label")
    ap.add_argument("--repeat", type=int, default=20)
    a = ap.parse_args(argv)
    _, pulsars = ref.read_release(a.release)
    _, noise = ref.read_noise(a.release)
    all_mjd = np.concatenate([p.mjd for p in pulsars])
    t0 = float(all_mjd.min())
    t_span = (float(all_mjd.max()) - t0) * ref.SECONDS_PER_DAY
    st = ref.Settings(14, 13.0 / 3.0, None, t0, t_span)
    psr = next(p for p in pulsars if p.label == a.label)
    pn = noise.get(psr.label, ref.PulsarNoise())
    # The bases do not depend on the hyperparameters (the engine also builds them once), so
    # only the likelihood itself is timed.
    model = ref.pulsar_model(psr, pn, st)
    value = log_likelihood(model)
    start = time.perf_counter()
    for _ in range(a.repeat):
        log_likelihood(model)
    per = (time.perf_counter() - start) / a.repeat
    print(f"ln_l {value!r}")
    print(f"seconds_per_evaluation {per!r}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
