#!/usr/bin/env python3
"""The NumPy peer: an independent implementation of ptacorr's optimal-statistic analysis.

Written from the published formulas (named beside each one) and docs/conventions.md alone; it
shares no code with the Rust engine. It exists so that the engine's numbers can be checked
against a second, separately written computation (tests/reference/compare.py diffs the two).

    python3 tests/reference/ptacorr_ref.py RELEASE_DIR --out OUT_DIR
        [--frequencies K] [--spectral-index G] [--dense | --fast]
        [--common-log10-amplitude X | --no-common]

Three ways to reduce a pulsar to (X, Z):
  * default ("naive" in benchmarks/run): the Woodbury form with the timing model's improper flat
    prior (van Haasteren & Vallisneri 2014; Lentati et al. 2013), one basis column per ECORR
    epoch, the standard library's csv reader;
  * --fast ("fair" in benchmarks/run): the same Woodbury form with ECORR folded into the white
    noise, inverted per epoch block by the Sherman-Morrison formula (Sherman & Morrison 1950),
    NumPy's C CSV reader (numpy.loadtxt) and the pair stage as two matrix products, as a careful
    NumPy analyst would write it;
  * --dense: the textbook n x n covariance C and the timing-model marginalising projection
    P^-1 = C^-1 - C^-1 M (M^T C^-1 M)^-1 M^T C^-1 (van Haasteren et al. 2009;
    van Haasteren & Vallisneri 2014). Only for small arrays: O(n^3) per pulsar.

Python 3.11 (tomllib), NumPy only, float64 throughout.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import sys
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

# ----------------------------------------------------------------------------------------------
# Constants (docs/conventions.md)
# ----------------------------------------------------------------------------------------------
SECONDS_PER_DAY = 86400.0
YEAR_S = 365.25 * SECONDS_PER_DAY          # Julian year
F_YR = 1.0 / YEAR_S                          # f_yr = 1 / (365.25 d)  [Hz]
NU_REF_MHZ = 1400.0                          # reference radio frequency of the DM basis
ECORR_EPOCH_GAP_S = 3600.0                   # a new ECORR epoch starts after a larger gap
RESIDUAL_HEADER = ["mjd", "residual_s", "sigma_s", "freq_mhz", "backend"]
DEFAULT_FREQUENCIES = 14
DEFAULT_SPECTRAL_INDEX = 13.0 / 3.0          # GW-driven SMBH binaries (Phinney 2001)


class ReleaseError(Exception):
    """Bad input: the message names the file, the line and the field."""


# ----------------------------------------------------------------------------------------------
# Reading a release
# ----------------------------------------------------------------------------------------------
@dataclass
class Pulsar:
    label: str
    direction: np.ndarray            # unit vector, J2000 equatorial
    mjd: np.ndarray
    residual: np.ndarray             # s
    sigma: np.ndarray                # s
    freq_mhz: np.ndarray
    backend: list[str]
    design: np.ndarray | None = None  # raw design matrix (n x m) or None


@dataclass
class WhiteNoise:
    efac: float = 1.0
    equad_log10_s: float | None = None
    ecorr_log10_s: float | None = None


@dataclass
class PowerLaw:
    log10_amplitude: float
    spectral_index: float
    n_frequencies: int | None = None   # None: the analysis's K


@dataclass
class PulsarNoise:
    white: dict[str, WhiteNoise] = field(default_factory=dict)
    red: PowerLaw | None = None
    dm: PowerLaw | None = None


def _number(text: str, where: str, name: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ReleaseError(f'{where}, field {name}: "{text}" is not a number') from None
    if not math.isfinite(value):
        raise ReleaseError(f'{where}, field {name}: "{text}" is not finite')
    return value


def parse_sexagesimal(text: str, where: str, name: str) -> float:
    """'hh:mm:ss.s' or '+dd:mm:ss.s' -> hh + mm/60 + ss/3600 with the sign of the text."""
    s = text.strip()
    sign = -1.0 if s.startswith("-") else 1.0   # keeps the sign of "-00:30:00"
    parts = s.lstrip("+-").split(":")
    if len(parts) != 3:
        raise ReleaseError(f'{where}, field {name}: "{text}" is not of the form dd:mm:ss.s')
    a, b, c = (_number(p, where, name) for p in parts)
    if a < 0 or not (0 <= b < 60) or not (0 <= c < 60):
        raise ReleaseError(f'{where}, field {name}: "{text}" is out of range')
    return sign * (a + b / 60.0 + c / 3600.0)


def sky_direction(ra_rad: float, dec_rad: float) -> np.ndarray:
    """p = (cos dec cos ra, cos dec sin ra, sin dec), J2000 equatorial (docs/conventions.md)."""
    return np.array([math.cos(dec_rad) * math.cos(ra_rad),
                     math.cos(dec_rad) * math.sin(ra_rad),
                     math.sin(dec_rad)])


def _pulsar_sky(entry: dict, where: str) -> np.ndarray:
    if "ra" in entry or "dec" in entry:
        if "ra" not in entry or "dec" not in entry:
            raise ReleaseError(f"{where}: give both ra and dec (or ra_deg and dec_deg)")
        ra_deg = 15.0 * parse_sexagesimal(str(entry["ra"]), where, "ra")
        dec_deg = parse_sexagesimal(str(entry["dec"]), where, "dec")
    elif "ra_deg" in entry and "dec_deg" in entry:
        ra_deg = float(entry["ra_deg"])
        dec_deg = float(entry["dec_deg"])
    else:
        raise ReleaseError(f"{where}: no sky position (ra/dec or ra_deg/dec_deg)")
    if not (0.0 <= ra_deg < 360.0) or not (-90.0 <= dec_deg <= 90.0):
        raise ReleaseError(f"{where}: sky position out of range (ra {ra_deg} deg, dec {dec_deg} deg)")
    return sky_direction(math.radians(ra_deg), math.radians(dec_deg))


def read_residuals(path: Path):
    if not path.is_file():
        raise ReleaseError(f"{path}: no such file")
    with path.open(newline="") as fh:
        rows = list(csv.reader(fh))
    if not rows or [h.strip() for h in rows[0]] != RESIDUAL_HEADER:
        raise ReleaseError(f"{path} line 1: header must be exactly {','.join(RESIDUAL_HEADER)}")
    mjd, res, sig, freq, backend = [], [], [], [], []
    for lineno, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        where = f"{path} line {lineno}"
        if len(row) != 5:
            raise ReleaseError(f"{where}: expected 5 fields, found {len(row)}")
        mjd.append(_number(row[0], where, "mjd"))
        res.append(_number(row[1], where, "residual_s"))
        s = _number(row[2], where, "sigma_s")
        if s <= 0:
            raise ReleaseError(f'{where}, field sigma_s: "{row[2]}" must be positive')
        sig.append(s)
        f = _number(row[3], where, "freq_mhz")
        if f <= 0:
            raise ReleaseError(f'{where}, field freq_mhz: "{row[3]}" must be positive')
        freq.append(f)
        b = row[4].strip()
        if not b:
            raise ReleaseError(f"{where}, field backend: empty")
        backend.append(b)
    if not mjd:
        raise ReleaseError(f"{path}: no TOAs")
    return np.array(mjd), np.array(res), np.array(sig), np.array(freq), backend


def read_design_matrix(path: Path, n_toas: int) -> np.ndarray:
    if not path.is_file():
        raise ReleaseError(f"{path}: no such file")
    with path.open(newline="") as fh:
        rows = [r for r in csv.reader(fh) if r and any(c.strip() for c in r)]
    if len(rows) < 2:
        raise ReleaseError(f"{path}: needs a header line of parameter names and one row per TOA")
    names = [h.strip() for h in rows[0]]
    data = []
    for lineno, row in enumerate(rows[1:], start=2):
        if len(row) != len(names):
            raise ReleaseError(f"{path} line {lineno}: expected {len(names)} fields, found {len(row)}")
        data.append([_number(c, f"{path} line {lineno}", names[k]) for k, c in enumerate(row)])
    if len(data) != n_toas:
        raise ReleaseError(f"{path}: {len(data)} rows but the residual table has {n_toas} TOAs")
    return np.array(data, dtype=np.float64)


def read_release(release_dir: Path, fast: bool = False) -> tuple[str, list[Pulsar]]:
    toml_path = release_dir / "release.toml"
    if not toml_path.is_file():
        raise ReleaseError(f"{toml_path}: no such file")
    try:
        doc = tomllib.loads(toml_path.read_text())
    except tomllib.TOMLDecodeError as err:
        raise ReleaseError(f"{toml_path}: {err}") from None
    title = str(doc.get("release", {}).get("title", ""))
    entries = doc.get("pulsar", [])
    if len(entries) < 2:
        raise ReleaseError(f"{toml_path}: needs at least two [[pulsar]] tables")
    pulsars, seen = [], set()
    for k, entry in enumerate(entries, start=1):
        where = f"{toml_path}, pulsar {k}"
        label = entry.get("label")
        if not isinstance(label, str) or not label:
            raise ReleaseError(f"{where}: missing label")
        if label in seen:
            raise ReleaseError(f"{where}: label {label} given twice")
        seen.add(label)
        where = f"{toml_path}, pulsar {label}"
        direction = _pulsar_sky(entry, where)
        if "residuals" not in entry:
            raise ReleaseError(f"{where}: missing residuals")
        reader = read_residuals_fast if fast else read_residuals
        mjd, res, sig, freq, backend = reader(release_dir / entry["residuals"])
        design = None
        if "design_matrix" in entry:
            dreader = read_design_matrix_fast if fast else read_design_matrix
            design = dreader(release_dir / entry["design_matrix"], len(mjd))
        pulsars.append(Pulsar(label, direction, mjd, res, sig, freq, backend, design))
    return title, pulsars


def _power_law(table: dict, where: str) -> PowerLaw:
    try:
        nf = table.get("n_frequencies")
        return PowerLaw(float(table["log10_amplitude"]), float(table["spectral_index"]),
                        None if nf is None else int(nf))
    except (KeyError, TypeError, ValueError) as err:
        raise ReleaseError(f"{where}: {err!r}") from None


def read_noise(release_dir: Path):
    """noise.toml -> (common PowerLaw or None, {label: PulsarNoise}). Absent file: no noise terms."""
    path = release_dir / "noise.toml"
    if not path.is_file():
        return None, {}
    try:
        doc = tomllib.loads(path.read_text())
    except tomllib.TOMLDecodeError as err:
        raise ReleaseError(f"{path}: {err}") from None
    common = _power_law(doc["common"], f"{path} [common]") if "common" in doc else None
    noise = {}
    for label, table in doc.get("pulsar", {}).items():
        pn = PulsarNoise()
        for w in table.get("white", []):
            if "backend" not in w:
                raise ReleaseError(f"{path} [pulsar.{label}] white: entry without backend")
            pn.white[w["backend"]] = WhiteNoise(
                float(w.get("efac", 1.0)),
                None if "equad_log10_s" not in w else float(w["equad_log10_s"]),
                None if "ecorr_log10_s" not in w else float(w["ecorr_log10_s"]))
        if "red" in table:
            pn.red = _power_law(table["red"], f"{path} [pulsar.{label}] red")
        if "dm" in table:
            pn.dm = _power_law(table["dm"], f"{path} [pulsar.{label}] dm")
        noise[label] = pn
    return common, noise


# ----------------------------------------------------------------------------------------------
# Model pieces
# ----------------------------------------------------------------------------------------------
def power_law_prior(freqs: np.ndarray, log10_amplitude: float, gamma: float,
                    t_span: float) -> np.ndarray:
    """Variance of each Fourier coefficient of a power-law process [s^2]
    (Lentati et al. 2013; van Haasteren & Vallisneri 2014):
        phi(f) = A^2 / (12 pi^2) * f_yr^(gamma-3) * f^(-gamma) / T_span."""
    amp2 = 10.0 ** (2.0 * log10_amplitude)
    return amp2 / (12.0 * math.pi ** 2) * F_YR ** (gamma - 3.0) * freqs ** (-gamma) / t_span


def interleave(per_frequency: np.ndarray) -> np.ndarray:
    """One value per frequency -> the same value for its sin and its cos column."""
    return np.repeat(per_frequency, 2)


def fourier_basis(t: np.ndarray, freqs: np.ndarray) -> np.ndarray:
    """Columns interleaved per frequency: 2(j-1) = sin(2 pi f_j t), 2(j-1)+1 = cos(2 pi f_j t)
    (docs/conventions.md; Lentati et al. 2013)."""
    arg = 2.0 * math.pi * np.outer(t, freqs)
    basis = np.empty((t.size, 2 * freqs.size))
    basis[:, 0::2] = np.sin(arg)
    basis[:, 1::2] = np.cos(arg)
    return basis


def timing_model_basis(psr: Pulsar, t: np.ndarray) -> np.ndarray:
    """The release's design matrix, else [1, t, t^2]; every column divided by its norm."""
    m = psr.design if psr.design is not None else np.column_stack([np.ones_like(t), t, t * t])
    norms = np.linalg.norm(m, axis=0)
    if np.any(norms == 0.0):
        raise ReleaseError(f"pulsar {psr.label}: the design matrix has an all-zero column")
    return m / norms


def ecorr_basis(psr: Pulsar, t: np.ndarray, white: dict[str, WhiteNoise]):
    """Epoch indicator columns U and their prior variances ECORR_b^2. Epochs: the TOAs of one
    backend, sorted by time, split where the gap to the previous TOA exceeds 3600 s; single-TOA
    epochs are kept (docs/conventions.md)."""
    backends = np.array(psr.backend)
    columns, prior = [], []
    for name in sorted(set(psr.backend)):
        w = white.get(name)
        if w is None or w.ecorr_log10_s is None:
            continue
        idx = np.flatnonzero(backends == name)
        idx = idx[np.argsort(t[idx], kind="stable")]
        new_epoch = np.concatenate([[True], np.diff(t[idx]) > ECORR_EPOCH_GAP_S])
        epoch_of = np.cumsum(new_epoch) - 1
        for e in range(epoch_of[-1] + 1):
            col = np.zeros(t.size)
            col[idx[epoch_of == e]] = 1.0
            columns.append(col)
            prior.append((10.0 ** w.ecorr_log10_s) ** 2)
    if not columns:
        return np.zeros((t.size, 0)), np.zeros(0)
    return np.column_stack(columns), np.array(prior)


@dataclass
class Settings:
    n_frequencies: int
    spectral_index: float            # template index of the optimal statistic
    common: PowerLaw | None          # the common process in the auto-power, or None
    t0_mjd: float
    t_span: float

    def freqs(self, k: int) -> np.ndarray:
        """f_j = j / T_span, j = 1..k."""
        return np.arange(1, k + 1, dtype=np.float64) / self.t_span


@dataclass
class PulsarModel:
    """r = M e + F_red c + F_dm d + U j + n (docs/reduction.md, section 1)."""
    residual: np.ndarray
    white_variance: np.ndarray       # N diagonal
    M: np.ndarray                    # normalised timing model (flat improper prior)
    blocks: list[tuple[np.ndarray, np.ndarray]]   # (basis, prior variance per column)
    F: np.ndarray                    # analysis basis, K frequencies


def pulsar_model(psr: Pulsar, pn: PulsarNoise, st: Settings) -> PulsarModel:
    t = (psr.mjd - st.t0_mjd) * SECONDS_PER_DAY
    K = st.n_frequencies

    # White noise: N_ii = (EFAC_b sigma_i)^2 + EQUAD_b^2.
    if isinstance(psr.backend, np.ndarray):
        # The fast reader's backends: one mask per backend instead of a loop over TOAs.
        efac, equad2 = np.ones(t.size), np.zeros(t.size)
        for name in np.unique(psr.backend).tolist():
            w = pn.white.get(name, WhiteNoise())
            mask = psr.backend == name
            efac[mask] = w.efac
            if w.equad_log10_s is not None:
                equad2[mask] = (10.0 ** w.equad_log10_s) ** 2
    else:
        efac = np.array([pn.white.get(b, WhiteNoise()).efac for b in psr.backend])
        equad2 = np.array([0.0 if pn.white.get(b, WhiteNoise()).equad_log10_s is None
                           else (10.0 ** pn.white[b].equad_log10_s) ** 2 for b in psr.backend])
    white_variance = (efac * psr.sigma) ** 2 + equad2

    blocks = []
    # Red basis over K_r = max(K_common, K_red) frequencies; prior = common + intrinsic red.
    k_common = K if st.common is not None else 0
    k_red = 0 if pn.red is None else (pn.red.n_frequencies if pn.red.n_frequencies is not None else K)
    k_r = max(k_common, k_red)
    if k_r > 0:
        f = st.freqs(k_r)
        phi = np.zeros(k_r)
        if k_common:
            phi[:k_common] += power_law_prior(f[:k_common], st.common.log10_amplitude,
                                              st.common.spectral_index, st.t_span)
        if k_red:
            phi[:k_red] += power_law_prior(f[:k_red], pn.red.log10_amplitude,
                                           pn.red.spectral_index, st.t_span)
        blocks.append((fourier_basis(t, f), interleave(phi)))
    # Chromatic (DM) basis: rows scaled by (nu_ref / nu)^2 (cold-plasma delay ~ nu^-2,
    # Lorimer & Kramer 2004), its own power law.
    if pn.dm is not None:
        k_dm = pn.dm.n_frequencies if pn.dm.n_frequencies is not None else K
        if k_dm > 0:
            f = st.freqs(k_dm)
            scale = (NU_REF_MHZ / psr.freq_mhz) ** 2
            blocks.append((fourier_basis(t, f) * scale[:, None],
                           interleave(power_law_prior(f, pn.dm.log10_amplitude,
                                                      pn.dm.spectral_index, st.t_span))))
    # ECORR epoch indicators.
    U, ecorr_prior = ecorr_basis(psr, t, pn.white)
    if U.shape[1]:
        blocks.append((U, ecorr_prior))

    return PulsarModel(psr.residual, white_variance, timing_model_basis(psr, t), blocks,
                       fourier_basis(t, st.freqs(K)))


def spd_solve(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """A^-1 B for symmetric positive-definite A: symmetric diagonal scaling D A D (which does not
    change the answer), Cholesky factor L L^T (numpy.linalg.cholesky), then the two triangular
    systems."""
    d = 1.0 / np.sqrt(np.diag(A))
    L = np.linalg.cholesky(A * d[:, None] * d[None, :])
    y = np.linalg.solve(L, B * d.reshape((-1,) + (1,) * (B.ndim - 1)))
    return np.linalg.solve(L.T, y) * d.reshape((-1,) + (1,) * (B.ndim - 1))


# ----------------------------------------------------------------------------------------------
# Reducing one pulsar to X = F^T P^-1 r, Z = F^T P^-1 F (docs/reduction.md, sections 2-4)
# ----------------------------------------------------------------------------------------------
def reduce_pulsar(model: PulsarModel) -> tuple[np.ndarray, np.ndarray]:
    """Woodbury form (van Haasteren & Vallisneri 2014; Lentati et al. 2013):
        T = [M | F_red | F_dm | U],  B^-1 = diag(0 on M, 1/phi elsewhere),
        S = B^-1 + T^T N^-1 T,  P^-1 = N^-1 - N^-1 T S^-1 T^T N^-1,
    so X = F^T N^-1 r - (F^T N^-1 T) S^-1 (T^T N^-1 r) and likewise Z."""
    n_inv = 1.0 / model.white_variance
    T = np.column_stack([model.M] + [b for b, _ in model.blocks])
    b_inv = np.concatenate([np.zeros(model.M.shape[1])] + [1.0 / p for _, p in model.blocks])
    TN = T * n_inv[:, None]                          # N^-1 T
    S = np.diag(b_inv) + T.T @ TN                    # B^-1 + T^T N^-1 T
    FN = model.F * n_inv[:, None]                    # N^-1 F
    FNT = FN.T @ T                                   # F^T N^-1 T
    rhs = np.column_stack([TN.T @ model.residual, FNT.T])   # [T^T N^-1 r | T^T N^-1 F]
    sol = spd_solve(S, rhs)
    X = FN.T @ model.residual - FNT @ sol[:, 0]
    Z = FN.T @ model.F - FNT @ sol[:, 1:]
    return X, 0.5 * (Z + Z.T)


def reduce_pulsar_dense(model: PulsarModel) -> tuple[np.ndarray, np.ndarray]:
    """Textbook form. C = N + F_red Phi_red F_red^T + F_dm Phi_dm F_dm^T + U E U^T, and the
    timing model marginalised under a flat prior by the projection
        P^-1 = C^-1 - C^-1 M (M^T C^-1 M)^-1 M^T C^-1
    (van Haasteren et al. 2009; van Haasteren & Vallisneri 2014: the infinite-prior limit of the
    Woodbury form). O(n^3): small arrays only."""
    C = np.diag(model.white_variance)
    for basis, prior in model.blocks:
        C += (basis * prior[None, :]) @ basis.T
    M, F, r = model.M, model.F, model.residual
    W = spd_solve(C, np.column_stack([r, F, M]))     # C^-1 [r | F | M]
    Ci_r, Ci_F, Ci_M = W[:, 0], W[:, 1:1 + F.shape[1]], W[:, 1 + F.shape[1]:]
    MCM = M.T @ Ci_M                                 # M^T C^-1 M
    # P^-1 y = C^-1 y - C^-1 M (M^T C^-1 M)^-1 M^T C^-1 y
    proj = spd_solve(MCM, np.column_stack([Ci_M.T @ r, Ci_M.T @ F]))
    Pi_r = Ci_r - Ci_M @ proj[:, 0]
    Pi_F = Ci_F - Ci_M @ proj[:, 1:]
    X = F.T @ Pi_r
    Z = F.T @ Pi_F
    return X, 0.5 * (Z + Z.T)


# ----------------------------------------------------------------------------------------------
# The fast path (--fast): what a careful NumPy analyst would write
# ----------------------------------------------------------------------------------------------
RESIDUAL_DTYPE = np.dtype([("mjd", "f8"), ("residual_s", "f8"), ("sigma_s", "f8"),
                           ("freq_mhz", "f8"), ("backend", "U64")])


def read_residuals_fast(path: Path):
    """The residual table through numpy.loadtxt (NumPy's C reader) in one pass. A file it cannot
    parse goes to the line-by-line reader, whose message names the line and the field."""
    if not path.is_file():
        raise ReleaseError(f"{path}: no such file")
    with path.open() as fh:
        header = fh.readline().strip().split(",")
        if [h.strip() for h in header] != RESIDUAL_HEADER:
            raise ReleaseError(f"{path} line 1: header must be exactly {','.join(RESIDUAL_HEADER)}")
        try:
            rows = np.loadtxt(fh, delimiter=",", dtype=RESIDUAL_DTYPE, ndmin=1)
        except ValueError:
            rows = None
    if (rows is None or rows.size == 0 or not np.all(np.isfinite(rows["mjd"]))
            or not np.all(np.isfinite(rows["residual_s"])) or not np.all(rows["sigma_s"] > 0)
            or not np.all(np.isfinite(rows["sigma_s"])) or not np.all(rows["freq_mhz"] > 0)
            or not np.all(np.char.str_len(np.char.strip(rows["backend"])) > 0)):
        return read_residuals(path)
    backend = np.char.strip(rows["backend"])
    return (rows["mjd"].copy(), rows["residual_s"].copy(), rows["sigma_s"].copy(),
            rows["freq_mhz"].copy(), backend)


def read_design_matrix_fast(path: Path, n_toas: int) -> np.ndarray:
    if not path.is_file():
        raise ReleaseError(f"{path}: no such file")
    try:
        data = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)
    except ValueError:
        return read_design_matrix(path, n_toas)
    if data.shape[0] != n_toas or not np.all(np.isfinite(data)):
        return read_design_matrix(path, n_toas)
    return data


def epoch_blocks(psr: Pulsar, t: np.ndarray, white: dict[str, WhiteNoise]):
    """The ECORR epochs as (order, starts, prior): `order` lists the TOAs that carry ECORR with
    each epoch's TOAs contiguous, `starts` the first position of each epoch in `order`, `prior`
    ECORR_b^2 per epoch. Epochs as in ecorr_basis (docs/conventions.md)."""
    backends = np.asarray(psr.backend)
    order, starts, prior = [], [], []
    n = 0
    for name in sorted(set(backends.tolist())):
        w = white.get(name)
        if w is None or w.ecorr_log10_s is None:
            continue
        idx = np.flatnonzero(backends == name)
        idx = idx[np.argsort(t[idx], kind="stable")]
        first = np.flatnonzero(np.concatenate([[True], np.diff(t[idx]) > ECORR_EPOCH_GAP_S]))
        order.append(idx)
        starts.append(first + n)
        prior.append(np.full(first.size, (10.0 ** w.ecorr_log10_s) ** 2))
        n += idx.size
    if not order:
        return None
    return np.concatenate(order), np.concatenate(starts), np.concatenate(prior)


def reduce_pulsar_fast(model: PulsarModel, blocks) -> tuple[np.ndarray, np.ndarray]:
    """The Woodbury form of reduce_pulsar with ECORR folded into the white noise.
    W = N + U E U^T is block diagonal over epochs; per epoch e with weights w_i = 1/N_ii,
    (N_e + c_e 1 1^T)^-1 = N_e^-1 - beta_e (N_e^-1 1)(N_e^-1 1)^T,
    beta_e = c_e / (1 + c_e sum_e w_i) (Sherman & Morrison 1950), so for any A, B
    A^T W^-1 B = A^T N^-1 B - V_A^T V_B with V_A = beta_e^(1/2) sum_{i in e} w_i A_i.
    Then T = [M | F_red | F_dm] only, S = B^-1 + T^T W^-1 T and
    P^-1 = W^-1 - W^-1 T S^-1 T^T W^-1 as before."""
    w = 1.0 / model.white_variance
    T = np.column_stack([model.M] + [b for b, _ in model.blocks])
    b_inv = np.concatenate([np.zeros(model.M.shape[1])] + [1.0 / p for _, p in model.blocks])
    A = np.column_stack([T, model.F, model.residual])   # [T | F | r]
    WA = A * w[:, None]
    G = A.T @ WA                                        # [T|F|r]^T N^-1 [T|F|r]
    if blocks is not None:
        order, starts, prior = blocks
        sums = np.add.reduceat(WA[order], starts, axis=0)           # sum_e w_i A_i
        wsum = np.add.reduceat(w[order], starts)
        beta = prior / (1.0 + prior * wsum)
        V = sums * np.sqrt(beta)[:, None]
        G -= V.T @ V
    nt, nf = T.shape[1], model.F.shape[1]
    S = G[:nt, :nt] + np.diag(b_inv)
    TF = G[:nt, nt:nt + nf]                             # T^T W^-1 F
    Tr = G[:nt, -1]                                     # T^T W^-1 r
    sol = spd_solve(S, np.column_stack([Tr, TF]))
    X = G[nt:nt + nf, -1] - TF.T @ sol[:, 0]
    Z = G[nt:nt + nf, nt:nt + nf] - TF.T @ sol[:, 1:]
    return X, 0.5 * (Z + Z.T)


def pair_stage_fast(reduced, phi):
    """Every pair's rho and sigma at once: with x~_a = Phi X_a and Z~_a = Phi Z_a Phi (Z
    symmetric), X_a^T Phi X_b = X @ (Phi X)^T and tr(Z_a Phi Z_b Phi) = sum_ij (Phi Z_a Phi)_ij
    (Z_b)_ij, two matrix products over all pulsars (Anholm et al. 2009; Chamberlin et al. 2015)."""
    X = np.array([r[0] for r in reduced])
    Z = np.array([r[1] for r in reduced])
    n = X.shape[0]
    num = X @ (X * phi[None, :]).T
    Zw = (Z * phi[None, :, None] * phi[None, None, :]).reshape(n, -1)
    trace = Zw @ Z.reshape(n, -1).T
    a, b = np.triu_indices(n, 1)
    tr = trace[a, b]
    if not np.all(tr > 0.0):
        k = int(np.flatnonzero(~(tr > 0.0))[0])
        raise ReleaseError(f"pair {a[k]}-{b[k]}: tr(Z_a Phi Z_b Phi) = {tr[k]!r} is not positive")
    return a, b, num[a, b] / tr, tr ** -0.5


# ----------------------------------------------------------------------------------------------
# Correlation patterns (overlap reduction functions)
# ----------------------------------------------------------------------------------------------
def hellings_downs(cos_zeta: np.ndarray) -> np.ndarray:
    """Hellings & Downs 1983 (ApJ 265, L39), distinct pulsars: with x = (1 - cos zeta)/2,
    G = 1/2 - x/4 + (3/2) x ln x, and the x -> 0 limit G = 1/2."""
    x = np.clip((1.0 - np.asarray(cos_zeta, dtype=np.float64)) / 2.0, 0.0, 1.0)
    xlnx = np.where(x > 0.0, x * np.log(np.where(x > 0.0, x, 1.0)), 0.0)
    return 0.5 - x / 4.0 + 1.5 * xlnx


def monopole(cos_zeta: np.ndarray) -> np.ndarray:
    """A clock-like error common to all pulsars: G = 1."""
    return np.ones_like(np.asarray(cos_zeta, dtype=np.float64))


def dipole(cos_zeta: np.ndarray) -> np.ndarray:
    """An error in the solar-system ephemeris: G = cos zeta."""
    return np.asarray(cos_zeta, dtype=np.float64).copy()


PATTERNS = {"hd": hellings_downs, "monopole": monopole, "dipole": dipole}


# ----------------------------------------------------------------------------------------------
# Pairs and the optimal statistic (Anholm et al. 2009; Demorest et al. 2013; Chamberlin et al. 2015)
# ----------------------------------------------------------------------------------------------
def pair_correlation(Xa, Za, Xb, Zb, phi):
    """rho_ab = X_a^T Phi X_b / tr(Z_a Phi Z_b Phi), sigma_ab = tr(Z_a Phi Z_b Phi)^(-1/2),
    Phi = diag(phi) the A = 1 template (Anholm et al. 2009; Chamberlin et al. 2015)."""
    # tr(Z_a Phi Z_b Phi) = sum_ij phi_i (Z_a)_ij phi_j (Z_b)_ji
    trace = float(np.sum((phi[:, None] * Za * phi[None, :]) * Zb.T))
    if not trace > 0.0:
        raise ReleaseError(f"tr(Z_a Phi Z_b Phi) = {trace!r} is not positive: a pulsar of this pair "
                           "has no information left at the analysis frequencies")
    rho = float(Xa @ (phi * Xb)) / trace
    return rho, trace ** -0.5


def optimal_statistic(G: np.ndarray, rho: np.ndarray, sigma: np.ndarray):
    """A2 = sum(G rho / s^2) / sum(G^2 / s^2), sigma0 = (sum G^2 / s^2)^(-1/2), SNR = A2/sigma0
    (Anholm et al. 2009; Chamberlin et al. 2015)."""
    w = 1.0 / sigma ** 2
    fisher = float(np.sum(G * G * w))
    a2 = float(np.sum(G * rho * w)) / fisher
    sigma0 = fisher ** -0.5
    return a2, sigma0, a2 / sigma0


def separation(pa: np.ndarray, pb: np.ndarray) -> tuple[float, float]:
    """(cos zeta, zeta in degrees). The angle from atan2(|pa x pb|, pa . pb), accurate at all
    separations; cos zeta = pa . pb."""
    c = float(np.clip(pa @ pb, -1.0, 1.0))
    s = float(np.linalg.norm(np.cross(pa, pb)))
    return c, math.degrees(math.atan2(s, c))


# ----------------------------------------------------------------------------------------------
# The analysis and its outputs
# ----------------------------------------------------------------------------------------------
def analyse(release_dir: Path, n_frequencies: int, spectral_index: float, dense: bool,
            common_log10_amplitude: float | None, no_common: bool, fast: bool = False):
    _, pulsars = read_release(release_dir, fast)
    common, noise = read_noise(release_dir)
    labels = {p.label for p in pulsars}
    for label in noise:
        if label not in labels:
            print(f"warning: noise.toml has [pulsar.{label}] but the release has no such pulsar",
                  file=sys.stderr)
    if no_common:
        common = None
    elif common_log10_amplitude is not None:
        # Override the amplitude; the index is the [common] one if given, else the template's.
        gamma = common.spectral_index if common is not None else spectral_index
        common = PowerLaw(common_log10_amplitude, gamma)

    all_mjd = np.concatenate([p.mjd for p in pulsars])
    t0 = float(all_mjd.min())
    t_span = (float(all_mjd.max()) - t0) * SECONDS_PER_DAY
    if t_span <= 0.0:
        raise ReleaseError(f"{release_dir}: all TOAs are at one time; no time span")
    st = Settings(n_frequencies, spectral_index, common, t0, t_span)

    # Template: A = 1, the analysis spectral index, each frequency twice.
    phi = interleave(power_law_prior(st.freqs(n_frequencies), 0.0, spectral_index, t_span))

    pairs = []
    if fast:
        reduced = []
        for p in pulsars:
            pn = noise.get(p.label, PulsarNoise())
            no_ecorr = {b: WhiteNoise(w.efac, w.equad_log10_s, None) for b, w in pn.white.items()}
            model = pulsar_model(p, PulsarNoise(no_ecorr, pn.red, pn.dm), st)
            t = (p.mjd - st.t0_mjd) * SECONDS_PER_DAY
            reduced.append(reduce_pulsar_fast(model, epoch_blocks(p, t, pn.white)))
        ia, ib, rho_f, sigma_f = pair_stage_fast(reduced, phi)
        # Every pair's separation at once, as in separation().
        P = np.array([p.direction for p in pulsars])
        cos_all = np.clip(np.einsum("ij,ij->i", P[ia], P[ib]), -1.0, 1.0)
        sin_all = np.linalg.norm(np.cross(P[ia], P[ib]), axis=1)
        angle_all = np.degrees(np.arctan2(sin_all, cos_all))
        for a, b, c, ang, rho, sigma in zip(ia.tolist(), ib.tolist(), cos_all.tolist(),
                                            angle_all.tolist(), rho_f.tolist(), sigma_f.tolist()):
            pairs.append((pulsars[a].label, pulsars[b].label, ang, c, rho, sigma))
    else:
        reduce = reduce_pulsar_dense if dense else reduce_pulsar
        reduced = [reduce(pulsar_model(p, noise.get(p.label, PulsarNoise()), st)) for p in pulsars]
    for a in range(0 if fast else len(pulsars)):
        for b in range(a + 1, len(pulsars)):
            cos_z, angle = separation(pulsars[a].direction, pulsars[b].direction)
            try:
                rho, sigma = pair_correlation(*reduced[a], *reduced[b], phi)
            except ReleaseError as err:
                raise ReleaseError(f"pair {pulsars[a].label}-{pulsars[b].label}: {err}") from None
            pairs.append((pulsars[a].label, pulsars[b].label, angle, cos_z, rho, sigma))
    cos_z = np.array([p[3] for p in pairs])
    rho = np.array([p[4] for p in pairs])
    sigma = np.array([p[5] for p in pairs])

    patterns = {}
    for name, pattern in PATTERNS.items():
        a2, s0, snr = optimal_statistic(pattern(cos_z), rho, sigma)
        patterns[name] = {"amplitude2": a2, "amplitude2_sigma": s0, "snr": snr}
    summary = {
        "n_pulsars": len(pulsars),
        "n_pairs": len(pairs),
        "n_frequencies": n_frequencies,
        "spectral_index": spectral_index,
        "span_years": t_span / YEAR_S,
        "frequencies_hz": [float(f) for f in st.freqs(n_frequencies)],
        "patterns": patterns,
    }
    hd = hellings_downs(cos_z)
    rows = [(p[0], p[1], p[2], p[4], p[5], float(g)) for p, g in zip(pairs, hd)]
    return summary, rows


def write_outputs(out_dir: Path, summary: dict, rows: list) -> None:
    out_dir.mkdir(parents=True, exist_ok=True)
    # json writes floats with repr (shortest round-trip, <= 17 significant digits).
    (out_dir / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    with (out_dir / "pairs.csv").open("w", newline="") as fh:
        fh.write("pulsar_a,pulsar_b,angle_deg,rho,sigma,hd\n")
        for a, b, angle, rho, sigma, g in rows:
            fh.write(f"{a},{b},{angle!r},{rho!r},{sigma!r},{g!r}\n")


def _spectral_index(text: str) -> float:
    """A float, or a fraction such as 13/3."""
    if "/" in text:
        num, den = text.split("/", 1)
        return float(num) / float(den)
    return float(text)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="NumPy peer of the ptacorr optimal-statistic analysis.")
    ap.add_argument("release", type=Path, help="release folder (release.toml, residuals, noise.toml)")
    ap.add_argument("--out", type=Path, required=True, help="output folder")
    ap.add_argument("--frequencies", type=int, default=DEFAULT_FREQUENCIES,
                    help="analysis frequencies K (f_j = j/T_span, j = 1..K); default 14")
    ap.add_argument("--spectral-index", type=_spectral_index, default=DEFAULT_SPECTRAL_INDEX,
                    help="template spectral index gamma; default 13/3")
    form = ap.add_mutually_exclusive_group()
    form.add_argument("--dense", action="store_true",
                      help="textbook n x n covariance and projection instead of Woodbury (small arrays)")
    form.add_argument("--fast", action="store_true",
                      help="ECORR folded into the white noise (Sherman-Morrison per epoch), "
                           "NumPy's CSV reader, matrix-product pair stage")
    g = ap.add_mutually_exclusive_group()
    g.add_argument("--common-log10-amplitude", type=float, default=None,
                   help="amplitude of the common process in the auto-power (overrides noise.toml)")
    g.add_argument("--no-common", action="store_true", help="no common process in the auto-power")
    args = ap.parse_args(argv)
    if args.frequencies < 1:
        ap.error("--frequencies must be at least 1")
    try:
        summary, rows = analyse(args.release, args.frequencies, args.spectral_index, args.dense,
                                args.common_log10_amplitude, args.no_common, args.fast)
    except ReleaseError as err:
        print(f"error: reading release {args.release}\n  caused by: {err}", file=sys.stderr)
        return 2
    except np.linalg.LinAlgError as err:
        print(f"error: linear algebra failed ({err}); is the noise model positive definite?",
              file=sys.stderr)
        return 2
    write_outputs(args.out, summary, rows)
    return 0


if __name__ == "__main__":
    sys.exit(main())
