"""The Python module against the `ptacorr` command: the same engine calls must give the same
output files byte for byte (the command is the reference here), arrays must equal the numbers
the command printed to its CSV files (round-trip float formatting, so float(text) is exact),
bad input must raise the right exception with the engine's message, and the pair arrays must be
views of the engine's memory, not copies."""

import json
import os
import pathlib
import shutil
import signal
import threading
import time

import numpy as np
import pytest

import ptacorr
from conftest import REPO, copy_release, same_folder


def read_csv_columns(path: pathlib.Path):
    lines = path.read_text().splitlines()
    header = lines[0].split(",")
    rows = [l.split(",") for l in lines[1:]]
    return {h: [r[i] for r in rows] for i, h in enumerate(header)}


# --- the demo --------------------------------------------------------------------------------


def test_simulate_writes_the_commands_release(cli, work, demo_release):
    rel = ptacorr.simulate(REPO / "simulations" / "demo.toml", work / "py-demo-release", seed=2026)
    same_folder(demo_release, work / "py-demo-release")
    assert len(rel) == 40 and rel.n_toa > 0
    assert rel.labels[0] == "P01"


def test_correlate_demo_equals_the_command(cli, work, demo_release):
    cli("correlate", demo_release, "--out", work / "cli-corr")
    rel = ptacorr.read_release(demo_release)
    c = ptacorr.correlate(rel, out=work / "py-corr")
    files = same_folder(work / "cli-corr", work / "py-corr")
    assert {str(f) for f in files} >= {"summary.json", "pairs.csv", "bins.csv", "manifest.json"}
    # The arrays are the numbers in the files, exactly.
    pairs = read_csv_columns(work / "cli-corr" / "pairs.csv")
    for col in ["angle_deg", "rho", "sigma", "hd"]:
        assert np.array_equal(c.pairs[col], np.array([float(x) for x in pairs[col]])), col
    assert c.pairs["pulsar_a"] == pairs["pulsar_a"]
    bins = read_csv_columns(work / "cli-corr" / "bins.csv")
    for col in bins:
        assert np.array_equal(c.bins[col], np.array([float(x) for x in bins[col]])), col
    summary = json.loads((work / "cli-corr" / "summary.json").read_text())
    assert c.patterns == summary["patterns"]
    assert c.multiple_component == summary["multiple_component"]
    assert np.array_equal(c.frequencies_hz, summary["frequencies_hz"])
    # write() later gives the same folder again.
    c.write(work / "py-corr-again")
    same_folder(work / "cli-corr", work / "py-corr-again")


def test_null_demo_equals_the_command(cli, work, demo_release):
    args = dict(method="simulate", trials=3000, seed=5)
    cli("null", demo_release, "--method", "simulate", "--trials", 3000, "--seed", 5,
        "--out", work / "cli-null")
    report = ptacorr.null(demo_release, out=work / "py-null", **args)
    same_folder(work / "cli-null", work / "py-null")
    assert report == json.loads((work / "cli-null" / "null.json").read_text())


def test_null_shards_merge_like_the_command(cli, work, demo_release):
    for i in (1, 2):
        ptacorr.null(demo_release, out=work / f"py-shard-{i}", method="phase", trials=2000,
                     seed=3, shard=f"{i}/2", analytic=False)
        cli("null", demo_release, "--method", "phase", "--trials", 2000, "--seed", 3,
            "--shard", f"{i}/2", "--no-analytic", "--out", work / f"cli-shard-{i}")
    cli("merge", work / "cli-shard-1", work / "cli-shard-2", "--out", work / "cli-merged")
    ptacorr.merge_null([work / "py-shard-1", work / "py-shard-2"], out=work / "py-merged")
    same_folder(work / "cli-merged", work / "py-merged")


def test_inject_demo_equals_the_command(cli, work, demo_release):
    cli("inject", demo_release, "--amplitudes", "0,log:3e-15:3e-14:3", "--realizations", 30,
        "--null-trials", 300, "--seed", 9, "--out", work / "cli-inject")
    out = ptacorr.inject(ptacorr.read_release(demo_release), out=work / "py-inject",
                         amplitudes="0,log:3e-15:3e-14:3", realizations=30, null_trials=300,
                         seed=9)
    same_folder(work / "cli-inject", work / "py-inject")
    rec = read_csv_columns(work / "cli-inject" / "recovery.csv")
    assert np.array_equal(out["recovery"]["amplitude"], [float(x) for x in rec["amplitude"]])
    assert np.array_equal(out["recovery"]["detection_probability"],
                          [float(x) for x in rec["detection_probability"]])


def test_inject_shards_merge_like_the_command(cli, work, demo_release):
    dirs_cli, dirs_py = [], []
    for i in (1, 2):
        common = ["--amplitudes", "1e-14", "--realizations", 20, "--null-trials", 200,
                  "--shard", f"{i}/2"]
        cli("inject", demo_release, *common, "--out", work / f"cli-ishard-{i}")
        ptacorr.inject(demo_release, out=work / f"py-ishard-{i}", amplitudes="1e-14",
                       realizations=20, null_trials=200, shard=f"{i}/2")
        dirs_cli.append(work / f"cli-ishard-{i}")
        dirs_py.append(work / f"py-ishard-{i}")
    cli("inject", *[x for d in dirs_cli for x in ("--merge", d)], "--out", work / "cli-imerged")
    ptacorr.merge_inject(dirs_py, out=work / "py-imerged")
    same_folder(work / "cli-imerged", work / "py-imerged")


def test_common_demo_equals_the_command(cli, work, demo_release):
    cli("common", demo_release, "--index-points", 5, "--amplitude-points", 21,
        "--out", work / "cli-common")
    s = ptacorr.common(demo_release, out=work / "py-common", index_points=5,
                       amplitude_points=21)
    same_folder(work / "cli-common", work / "py-common")
    assert s == json.loads((work / "cli-common" / "summary.json").read_text())
    # correlate with the fitted common process, as `correlate --common-fit`.
    cli("correlate", demo_release, "--common-fit", work / "cli-common", "--out",
        work / "cli-corr-fit")
    ptacorr.correlate(demo_release, common_fit=work / "py-common", out=work / "py-corr-fit")
    same_folder(work / "cli-corr-fit", work / "py-corr-fit")


def test_noise_shard_equals_the_command(cli, work, demo_release):
    # Two of the 40 pulsars (shard 1 of 20) and a short fixed-white chain keep it quick; the
    # chain tables must match too (draws depend on (seed, pulsar, chain) alone).
    cli("noise", demo_release, "--shard", "1/20", "--starts", 2, "--fixed-white",
        "--chains", 2, "--warmup", 100, "--draws", 100, "--out", work / "cli-noise")
    out = ptacorr.noise(demo_release, out=work / "py-noise", shard="1/20", starts=2,
                        mode="fixed-white", chains=2, warmup=100, draws=100)
    same_folder(work / "cli-noise", work / "py-noise")
    est = read_csv_columns(work / "cli-noise" / "estimates.csv")
    assert list(out["estimates"]["pulsar"]) == est["pulsar"]


# --- a second scenario, other settings --------------------------------------------------------


def test_second_scenario_equals_the_command(cli, work):
    cli("simulate", REPO / "simulations" / "precise.toml", "--out", work / "precise", "--seed", 4)
    rel = ptacorr.read_release(work / "precise")
    cli("correlate", work / "precise", "--frequencies", 8, "--bins", 6, "--equal-width-bins",
        "--no-common", "--out", work / "cli-precise")
    ptacorr.correlate(rel, frequencies=8, bins=6, equal_width_bins=True, no_common=True,
                      out=work / "py-precise")
    same_folder(work / "cli-precise", work / "py-precise")
    cli("correlate", work / "precise", "--spectral-index", 3.5, "--common-log10-amplitude",
        -14.2, "--out", work / "cli-precise-2")
    ptacorr.correlate(rel, spectral_index=3.5, common_log10_amplitude=-14.2,
                      out=work / "py-precise-2")
    same_folder(work / "cli-precise-2", work / "py-precise-2")
    cli("null", work / "precise", "--method", "scramble", "--trials", 2000, "--seed", 2,
        "--out", work / "cli-precise-null")
    ptacorr.null(rel, method="scramble", trials=2000, seed=2, out=work / "py-precise-null")
    same_folder(work / "cli-precise-null", work / "py-precise-null")


def test_release_built_from_arrays_gives_the_same_pairs(cli, work):
    # build_release takes no timing-model design matrices, so the release compared is one that
    # ships none (the demo ships DM design matrices for its multi-frequency pulsars).
    cli("simulate", REPO / "simulations" / "precise.toml", "--out", work / "precise-for-build",
        "--seed", 5)
    rel = ptacorr.read_release(work / "precise-for-build")
    ps = [rel.pulsar(l) for l in rel.labels]
    built = ptacorr.build_release(
        work / "built",
        labels=rel.labels,
        ra_deg=np.array([p["ra_deg"] for p in ps]),
        dec_deg=np.array([p["dec_deg"] for p in ps]),
        mjd=[p["mjd"] for p in ps],
        residual_s=[p["residual_s"] for p in ps],
        sigma_s=[p["sigma_s"] for p in ps],
        freq_mhz=[p["freq_mhz"] for p in ps],
        backend=[p["backend"] for p in ps],
        title=rel.title,
        noise=(work / "precise-for-build" / "noise.toml").read_text(),
    )
    assert built.labels == rel.labels
    a = ptacorr.correlate(rel, out=work / "corr-orig")
    b = ptacorr.correlate(built, out=work / "corr-built")
    for col in ["angle_deg", "rho", "sigma", "hd"]:
        assert np.array_equal(a.pairs[col], b.pairs[col]), col
    for f in ["pairs.csv", "bins.csv"]:
        assert (work / "corr-orig" / f).read_bytes() == (work / "corr-built" / f).read_bytes()


# --- bad input -------------------------------------------------------------------------------


def test_bad_residual_raises_input_error_with_the_commands_message(cli, work, demo_release):
    bad = copy_release(demo_release, work / "bad-release")
    f = bad / "residuals" / "P03.csv"
    lines = f.read_text().splitlines()
    cells = lines[9].split(",")
    cells[2] = "abc"
    lines[9] = ",".join(cells)
    f.write_text("\n".join(lines) + "\n")
    with pytest.raises(ptacorr.InputError) as e:
        ptacorr.read_release(bad)
    assert e.value.line == 10 and e.value.field == "sigma_s"
    assert pathlib.Path(e.value.path).name == "P03.csv"
    assert isinstance(e.value, ptacorr.Error)
    r = cli("correlate", bad, "--out", work / "bad-out", check=False)
    assert r.returncode != 0
    assert f"caused by: {e.value}" in r.stderr
    assert not (work / "bad-out").exists()


def test_bad_settings_raise_setting_error(demo_release, work):
    with pytest.raises(ptacorr.SettingError, match="frequencies"):
        ptacorr.correlate(demo_release, frequencies=0)
    with pytest.raises(ptacorr.SettingError, match="pattern"):
        ptacorr.null(demo_release, out=work / "x", method="phase", trials=10, pattern="quad")
    with pytest.raises(ptacorr.SettingError, match="shard"):
        ptacorr.null(demo_release, out=work / "x", method="phase", trials=10, shard="0/4")
    with pytest.raises(ptacorr.SettingError, match="method"):
        ptacorr.null(demo_release, out=work / "x", method="bootstrap", trials=10)
    with pytest.raises(ptacorr.SettingError) as e:
        ptacorr.inject(demo_release, out=work / "x", amplitudes="0", mode="fast")
    assert e.value.name == "mode"
    with pytest.raises(ptacorr.FileError):
        ptacorr.read_release(work / "no-such-release")
    assert not (work / "x").exists()


def test_bad_arrays_raise_before_anything_is_written(work):
    n = 50
    good = dict(labels=["A1", "A2", "A3"], ra_deg=[10.0, 100.0, 200.0],
                dec_deg=[-20.0, 5.0, 40.0], mjd=[np.linspace(55000, 58000, n)] * 3,
                residual_s=[np.zeros(n)] * 3, sigma_s=[np.full(n, 1e-7)] * 3,
                freq_mhz=[np.full(n, 1400.0)] * 3, backend=[["KRK-L"] * n] * 3)

    def but(key, index, value):
        v = list(good[key])
        v[index] = value
        return {**good, key: v}

    with pytest.raises(ptacorr.SettingError, match="residual_s") as e:
        ptacorr.build_release(work / "b1", **but("residual_s", 1, np.zeros(n - 1)))
    assert e.value.name == "residual_s[1]"
    with pytest.raises(ptacorr.InputError, match="sigma_s") as e:
        ptacorr.build_release(work / "b2", **but("sigma_s", 2, np.full(n, -1e-7)))
    assert e.value.field == "sigma_s" and e.value.line == 2
    with pytest.raises(ptacorr.SettingError, match="label"):
        ptacorr.build_release(work / "b3", **but("labels", 0, "../evil"))
    with pytest.raises(ValueError, match="could not convert"):  # numpy's own conversion
        ptacorr.build_release(work / "b4", **but("mjd", 0, np.array(["a"] * n)))
    with pytest.raises(TypeError):
        ptacorr.build_release(work / "b4", **but("mjd", 0, {"not": "an array"}))
    for d in ["b1", "b2", "b3", "b4"]:
        assert not (work / d).exists(), d
    assert not [p for p in work.iterdir() if p.name.startswith(".b")]
    ptacorr.build_release(work / "b5", **good)


# --- memory, GIL, Ctrl-C ---------------------------------------------------------------------


def test_pair_arrays_are_views_of_the_engine_memory(demo_release):
    c = ptacorr.correlate(demo_release)
    rho1 = c.pairs["rho"]
    rho2 = c.pairs["rho"]
    # Two reads share one buffer: the engine's, kept alive by the Correlation object.
    assert np.shares_memory(rho1, rho2)
    assert not rho1.flags.owndata and rho1.base is c
    assert not rho1.flags.writeable
    with pytest.raises(ValueError):
        rho1[0] = 0.0
    del c
    assert np.isfinite(rho1).all()  # the view keeps its owner alive


def test_long_calls_release_the_gil(demo_release, work):
    rel = ptacorr.read_release(demo_release)
    done = threading.Event()
    ticks = 0

    def run():
        ptacorr.null(rel, out=work / "gil-null", method="simulate", trials=20000, seed=1,
                     analytic=False)
        done.set()

    t = threading.Thread(target=run)
    t.start()
    while not done.is_set():
        ticks += 1
        time.sleep(0.001)
    t.join()
    # The main thread kept running Python while the engine worked.
    assert ticks > 50, ticks


def test_ctrl_c_raises_keyboard_interrupt_and_the_same_call_resumes(cli, work, demo_release):
    # 1,200 trials (50 chunks) leave the signal seconds to land even on a loaded machine; with
    # 400 the run once finished first while other builds shared the two cores.
    args = dict(method="simulate", time_domain=True, trials=1200, seed=8, analytic=False)
    out = work / "ctrl-c-null"

    def press_ctrl_c_after_the_first_chunks():
        # Ctrl-C once the run has checkpointed some chunks (what a user sees as progress).
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            if len(list((out / ".partial").glob("chunk-*.csv"))) >= 2:
                break
            time.sleep(0.02)
        os.kill(os.getpid(), signal.SIGINT)

    presser = threading.Thread(target=press_ctrl_c_after_the_first_chunks)
    presser.start()
    with pytest.raises(KeyboardInterrupt, match="rerun the same command to resume"):
        ptacorr.null(demo_release, out=out, **args)
    presser.join()
    chunks = list((out / ".partial").glob("chunk-*.csv"))
    assert 2 <= len(chunks) < 50, len(chunks)  # stopped part-way, finished chunks kept
    assert not (out / "null.json").exists()
    ptacorr.null(demo_release, out=out, **args)
    cli("null", demo_release, "--method", "simulate", "--time-domain", "--trials", 1200,
        "--seed", 8, "--no-analytic", "--out", work / "ctrl-c-cli")
    same_folder(work / "ctrl-c-cli", out)
