"""Shared fixtures of the Python module's tests: the command-line binary to compare with, and
a demo release simulated once per session."""

import os
import pathlib
import shutil
import subprocess

import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]


def _binary() -> pathlib.Path:
    b = os.environ.get("PTACORR_BIN")
    p = pathlib.Path(b) if b else REPO / "target" / "debug" / "ptacorr"
    if not p.is_file():
        # A missing reference must fail, not skip: the tests compare with it.
        raise RuntimeError(
            f"the ptacorr binary {p} is missing: run `cargo build -p ptacorr-cli` "
            "or set PTACORR_BIN (./run test does this)"
        )
    return p


@pytest.fixture(scope="session")
def cli():
    """Run the `ptacorr` command; returns its stdout, raises with stderr on failure."""
    binary = _binary()

    def run(*args, cwd=None, check=True):
        r = subprocess.run(
            [str(binary), *map(str, args)], capture_output=True, text=True, cwd=cwd
        )
        if check and r.returncode != 0:
            raise AssertionError(f"ptacorr {' '.join(map(str, args))} failed:\n{r.stderr}")
        return r

    return run


@pytest.fixture(scope="session")
def work(tmp_path_factory):
    return tmp_path_factory.mktemp("ptacorr-py")


@pytest.fixture(scope="session")
def demo_release(cli, work):
    """The demo array simulated by the command (seed 2026), read back."""
    out = work / "demo-release"
    cli("simulate", REPO / "simulations" / "demo.toml", "--out", out, "--seed", 2026)
    return out


def same_folder(a: pathlib.Path, b: pathlib.Path):
    """Every file of two output folders, byte for byte (the lock file aside)."""
    names_a = sorted(p.relative_to(a) for p in a.rglob("*") if p.is_file() and p.name != ".lock")
    names_b = sorted(p.relative_to(b) for p in b.rglob("*") if p.is_file() and p.name != ".lock")
    assert names_a == names_b, f"{a} holds {names_a}, {b} holds {names_b}"
    assert names_a, f"{a} is empty"
    for n in names_a:
        assert (a / n).read_bytes() == (b / n).read_bytes(), f"{n} differs between {a} and {b}"
    return names_a


def copy_release(src: pathlib.Path, dst: pathlib.Path):
    shutil.copytree(src, dst)
    return dst
