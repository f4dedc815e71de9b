"""ptacorr: the optimal-statistic search for a gravitational-wave background in pulsar-timing
residuals, as a Python module.

Every function runs the same engine function as the ``ptacorr`` command, so an output folder
written from Python is byte for byte the command's. Long calls release the GIL; Ctrl-C raises
KeyboardInterrupt (a null run keeps its finished chunks and the same call resumes it; other
calls write nothing). Engine errors raise ``ptacorr.Error`` subclasses whose message names the
file, line and field.

Every p-value and Bayes factor assumes the noise model (and, for Bayes factors, the priors); a
detection claim needs the collaboration's full analysis.
"""

from os import PathLike
from pathlib import Path
from typing import Any, Literal, Optional, Sequence, Union

import numpy as np
import numpy.typing as npt

__version__: str
DEFAULT_FREQUENCIES: int
DEFAULT_SPECTRAL_INDEX: float
DEFAULT_BINS: int

StrPath = Union[str, PathLike[str]]
FloatArray = npt.NDArray[np.float64]
ArrayLike1 = Union[npt.ArrayLike, Sequence[float]]

class Error(Exception):
    """Base class of every error the ptacorr engine reports."""

class InputError(Error):
    """A value in an input file is malformed or out of range."""

    path: Path
    line: Optional[int]
    field: Optional[str]
    message: str

class SettingError(Error):
    """A setting passed by the caller is invalid."""

    name: str
    message: str

class NumericalError(Error):
    """A matrix that must be positive definite is not, or a value came out non-finite."""

class FileError(Error):
    """A file could not be read or written."""

    path: Path
    message: str

class Release:
    """A release of timing residuals as read by the engine (read-only)."""

    @property
    def title(self) -> str: ...
    @property
    def path(self) -> Path:
        """The release folder."""
    @property
    def labels(self) -> list[str]:
        """Pulsar labels in release order."""
    @property
    def n_toa(self) -> int:
        """Total number of TOAs."""
    @property
    def input_hash(self) -> str:
        """``sha256:`` hash of every input file (recorded in every output's provenance)."""
    @property
    def warnings(self) -> list[str]:
        """Warnings about the data (isolated TOAs, duplicate rows, ...)."""
    def pulsar(self, label: str) -> dict[str, Any]:
        """One pulsar as a dict: label, ra_deg, dec_deg, and arrays mjd, residual_s, sigma_s,
        freq_mhz (copies), backend (list of labels)."""
    def __len__(self) -> int: ...

class Correlation:
    """The result of :func:`correlate`."""

    @property
    def labels(self) -> list[str]: ...
    @property
    def n_pulsars(self) -> int: ...
    @property
    def frequencies_hz(self) -> FloatArray:
        """Analysis frequencies f_j = j / T_span (Hz)."""
    @property
    def span_years(self) -> float: ...
    @property
    def spectral_index(self) -> float:
        """Spectral index of the template."""
    @property
    def pairs(self) -> dict[str, Any]:
        """Every pair a < b: ``pulsar_a``, ``pulsar_b`` (lists of labels), ``a``, ``b`` (index
        arrays) and the float arrays ``angle_deg``, ``rho``, ``sigma`` (units of A^2) and ``hd``
        (the pair's Hellings-Downs value): the columns of pairs.csv. The float arrays are
        read-only views of the engine's memory (no copies)."""
    @property
    def bins(self) -> dict[str, FloatArray]:
        """The angular bins: the columns of bins.csv."""
    @property
    def patterns(self) -> dict[str, dict[str, float]]:
        """Per pattern (hd, monopole, dipole): amplitude2, amplitude2_sigma (the no-signal
        uncertainty) and snr (not a false-alarm probability: see :func:`null`)."""
    @property
    def multiple_component(self) -> Optional[dict[str, Any]]:
        """The three patterns fitted at once, or None when they are not separable."""
    def write(self, out: StrPath) -> None:
        """Write summary.json, pairs.csv and bins.csv into ``out`` (as ``ptacorr correlate``)."""

def read_release(
    path: StrPath, *, strict: bool = False, allow_outside_paths: bool = False
) -> Release:
    """Read a release folder. Bad input raises InputError naming file, line and field;
    ``strict`` turns data warnings into errors."""

def simulate(
    scenario: StrPath, out: StrPath, *, seed: Optional[int] = None, replace: bool = False
) -> Release:
    """Simulate a scenario file into a release folder (as ``ptacorr simulate``) and read it."""

def build_release(
    out: StrPath,
    *,
    labels: Sequence[str],
    ra_deg: ArrayLike1,
    dec_deg: ArrayLike1,
    mjd: Sequence[ArrayLike1],
    residual_s: Sequence[ArrayLike1],
    sigma_s: Sequence[ArrayLike1],
    freq_mhz: Sequence[ArrayLike1],
    backend: Sequence[Sequence[str]],
    title: str = "Release built in Python",
    noise: Optional[str] = None,
    replace: bool = False,
) -> Release:
    """Write a release folder from arrays (one array per pulsar for each TOA column; ``noise``
    is the text of a noise.toml) and read it back through the release reader, so it is checked
    exactly as a release from disk. Nothing is left in ``out`` when a check fails."""

def correlate(
    release: Union[Release, StrPath],
    *,
    out: Optional[StrPath] = None,
    frequencies: int = ...,
    spectral_index: float = ...,
    bins: int = ...,
    equal_width_bins: bool = False,
    common_log10_amplitude: Optional[float] = None,
    no_common: bool = False,
    common_fit: Optional[StrPath] = None,
    common_fit_value: Literal["median", "map"] = "median",
) -> Correlation:
    """The optimal-statistic analysis (as ``ptacorr correlate``); with ``out``, also write its
    folder."""

def null(
    release: Union[Release, StrPath],
    *,
    out: StrPath,
    method: Literal["scramble", "phase", "simulate"],
    trials: int,
    seed: int = 1,
    pattern: Literal["hd", "monopole", "dipole"] = "hd",
    match_threshold: Optional[float] = None,
    mutual_match: bool = False,
    time_domain: bool = False,
    analytic: bool = True,
    shard: Optional[str] = None,
    frequencies: int = ...,
    spectral_index: float = ...,
    bins: int = ...,
    equal_width_bins: bool = False,
    common_log10_amplitude: Optional[float] = None,
    no_common: bool = False,
) -> dict[str, Any]:
    """Null trials and the false-alarm probability of the observed SNR (as ``ptacorr null``);
    returns null.json as a dict. Ctrl-C stops after the current chunk; the same call resumes.
    The p-values assume the noise model."""

def merge_null(dirs: Sequence[StrPath], *, out: StrPath) -> dict[str, Any]:
    """Merge the shard folders of one null run (as ``ptacorr merge``)."""

def inject(
    target: Union[Release, StrPath],
    *,
    out: StrPath,
    amplitudes: str,
    realizations: int = ...,
    spectral_index: float = ...,
    pattern: Literal["hd", "monopole", "dipole"] = "hd",
    seed: int = 1,
    shard: Optional[str] = None,
    mode: Literal["reduced", "time-domain"] = "reduced",
    auto_power: Literal["injected", "fixed"] = "injected",
    common_log10_amplitude: Optional[float] = None,
    no_common: bool = False,
    frequencies: int = ...,
    false_alarm: Optional[float] = None,
    null_trials: int = ...,
    null: Optional[StrPath] = None,
    signal_frequencies: Optional[int] = None,
    signal_span_factor: Optional[int] = None,
) -> dict[str, Any]:
    """An injection-recovery campaign (as ``ptacorr inject``) on a release or a scenario file.
    Returns ``recovery`` and ``coverage_plugin`` (columns as arrays), ``campaign``,
    ``assumptions`` and ``provenance``."""

def merge_inject(dirs: Sequence[StrPath], *, out: StrPath) -> dict[str, Any]:
    """Merge the shard folders of one injection campaign (as ``ptacorr inject --merge``)."""

def noise(
    release: Union[Release, StrPath],
    *,
    out: StrPath,
    priors: Optional[StrPath] = None,
    seed: int = 1,
    starts: int = 4,
    max_iterations: int = 500,
    shard: Optional[str] = None,
    mode: Literal["full", "fixed-white", "map-only"] = "full",
    values: Literal["median", "map"] = "median",
    chains: Optional[int] = None,
    warmup: Optional[int] = None,
    draws: Optional[int] = None,
) -> dict[str, Any]:
    """Noise estimation of every pulsar (as ``ptacorr noise``): MAP, then NUTS chains unless
    ``mode="map-only"``; returns ``estimates`` and ``diagnostics`` as columns, and
    ``provenance``."""

def merge_noise(dirs: Sequence[StrPath], *, out: StrPath) -> None:
    """Merge the shard folders of one noise run (as ``ptacorr merge-noise``)."""

def common(
    release: Union[Release, StrPath],
    *,
    out: StrPath,
    frequencies: int = 14,
    log10_amplitude_range: tuple[float, float] = (-18.0, -12.0),
    index_range: tuple[float, float] = (0.0, 7.0),
    index_points: int = 41,
    fixed_index: float = ...,
    amplitude_points: int = 121,
    amplitude_prior: Literal["uniform-log10", "uniform-amplitude"] = "uniform-log10",
    draws: int = 1000,
    draw_index: Literal["varied", "fixed"] = "varied",
    seed: int = 2026,
) -> dict[str, Any]:
    """The common red process under CURN, HD, monopole and dipole correlations (as
    ``ptacorr common``); returns its summary.json. Bayes factors assume the noise model and the
    priors; a detection claim needs the collaboration's full analysis."""
