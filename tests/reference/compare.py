#!/usr/bin/env python3
"""Compare two ptacorr output folders (summary.json and pairs.csv).

    python3 tests/reference/compare.py A_DIR B_DIR [--rtol 1e-8] [--floor 1.0]

A number a is taken to agree with b when
    |a - b| <= rtol * max(|a|, |b|) + atol,   atol = floor * rtol * (scale of its field)
The scale of a pairs.csv column is the largest magnitude in that column (over both folders),
because the rho of an individual pair can be close to zero. In summary.json the scale of a
pattern's amplitude2 is max(|amplitude2|, amplitude2_sigma) (an estimate consistent with zero
is compared on the scale of its uncertainty), of its snr max(|snr|, 1), and of any other number
the number itself. For each field the worst "effective relative difference"
    |a - b| / (max(|a|, |b|) + floor * scale)
is printed; the folders agree when every one is <= rtol. Integer fields and pulsar labels must
match exactly. Numbers present in only one summary.json (for example the engine's provenance)
are listed and ignored, except the required keys, whose absence is a failure.
Exit 0 when everything agrees, 1 otherwise, 2 on unreadable input.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from pathlib import Path

REQUIRED = ["n_pulsars", "n_pairs", "n_frequencies", "spectral_index", "span_years"] + [
    f"patterns.{p}.{k}" for p in ("hd", "monopole", "dipole")
    for k in ("amplitude2", "amplitude2_sigma", "snr")]
PAIR_HEADER = ["pulsar_a", "pulsar_b", "angle_deg", "rho", "sigma", "hd"]


def flatten(obj, prefix=""):
    """{'a': {'b': 1.0, 'c': [2, 3]}} -> {'a.b': 1.0, 'a.c[0]': 2, 'a.c[1]': 3} (numbers only)."""
    out = {}
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.update(flatten(v, f"{prefix}.{k}" if prefix else str(k)))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            out.update(flatten(v, f"{prefix}[{i}]"))
    elif isinstance(obj, bool):
        pass
    elif isinstance(obj, (int, float)):
        out[prefix] = obj
    return out


def effective(a: float, b: float, scale: float, floor: float) -> float:
    denom = max(abs(a), abs(b)) + floor * scale
    return 0.0 if a == b else (abs(a - b) / denom if denom > 0 else float("inf"))


def read_pairs(path: Path):
    with path.open(newline="") as fh:
        rows = list(csv.reader(fh))
    if not rows or [h.strip() for h in rows[0]] != PAIR_HEADER:
        raise ValueError(f"{path}: header is not {','.join(PAIR_HEADER)}")
    return [r for r in rows[1:] if r]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Compare two ptacorr output folders.")
    ap.add_argument("a", type=Path)
    ap.add_argument("b", type=Path)
    ap.add_argument("--rtol", type=float, default=1e-8)
    ap.add_argument("--floor", type=float, default=1.0,
                    help="absolute floor as a multiple of rtol * scale of the field (default 1)")
    args = ap.parse_args(argv)
    rtol, floor = args.rtol, args.floor

    try:
        sa = flatten(json.loads((args.a / "summary.json").read_text()))
        sb = flatten(json.loads((args.b / "summary.json").read_text()))
        pa = read_pairs(args.a / "pairs.csv")
        pb = read_pairs(args.b / "pairs.csv")
    except (OSError, ValueError) as err:
        print(f"error: {err}", file=sys.stderr)
        return 2

    problems = []
    report = []   # (field, worst effective, worst raw relative)

    # --- summary.json -----------------------------------------------------------------------
    for key in REQUIRED:
        for name, s in ((args.a, sa), (args.b, sb)):
            if key not in s:
                problems.append(f"{name}/summary.json has no {key}")
    only = sorted(set(sa) ^ set(sb))
    if only:
        print(f"note: {len(only)} summary number(s) in only one folder, ignored: "
              + ", ".join(only[:8]) + (" ..." if len(only) > 8 else ""))
    for key in [k for k in sa if k in sb]:
        a, b = sa[key], sb[key]
        if isinstance(a, int) and isinstance(b, int):
            if a != b:
                problems.append(f"summary {key}: {a} != {b}")
            report.append((f"summary {key}", 0.0 if a == b else float("inf"), 0.0))
            continue
        a, b = float(a), float(b)
        scale = max(abs(a), abs(b))
        if key.startswith("patterns.") and key.endswith(".amplitude2"):
            sig = key[: -len("amplitude2")] + "amplitude2_sigma"
            scale = max(scale, abs(float(sa.get(sig, 0.0))), abs(float(sb.get(sig, 0.0))))
        elif key.startswith("patterns.") and key.endswith(".snr"):
            scale = max(scale, 1.0)
        eff = effective(a, b, scale, floor)
        raw = effective(a, b, 0.0, 0.0)
        report.append((f"summary {key}", eff, raw))
        if not eff <= rtol:
            problems.append(f"summary {key}: {a!r} vs {b!r} (effective relative difference {eff:.3e})")

    # --- pairs.csv --------------------------------------------------------------------------
    if len(pa) != len(pb):
        problems.append(f"pairs.csv: {len(pa)} rows vs {len(pb)} rows")
    else:
        for i, (ra, rb) in enumerate(zip(pa, pb), start=2):
            if ra[:2] != rb[:2]:
                problems.append(f"pairs.csv line {i}: pair {ra[0]}-{ra[1]} vs {rb[0]}-{rb[1]}")
                break
        else:
            for col in range(2, len(PAIR_HEADER)):
                try:
                    va = [float(r[col]) for r in pa]
                    vb = [float(r[col]) for r in pb]
                except (ValueError, IndexError) as err:
                    problems.append(f"pairs.csv column {PAIR_HEADER[col]}: {err}")
                    continue
                scale = max([abs(v) for v in va + vb] or [0.0])
                worst_eff, worst_raw, worst_line = 0.0, 0.0, None
                for line, (a, b) in enumerate(zip(va, vb), start=2):
                    eff = effective(a, b, scale, floor)
                    worst_raw = max(worst_raw, effective(a, b, 0.0, 0.0))
                    if worst_line is None or eff > worst_eff:
                        worst_eff, worst_line = eff, line
                report.append((f"pairs {PAIR_HEADER[col]}", worst_eff, worst_raw))
                if not worst_eff <= rtol:
                    problems.append(f"pairs.csv column {PAIR_HEADER[col]}: worst effective relative "
                                    f"difference {worst_eff:.3e} at line {worst_line}")

    width = max(len(r[0]) for r in report) if report else 10
    print(f"{'field':<{width}}  {'effective':>10}  {'raw rel':>10}")
    for name, eff, raw in report:
        print(f"{name:<{width}}  {eff:10.3e}  {raw:10.3e}")
    worst = max((r[1] for r in report), default=0.0)
    if problems:
        print(f"\nDISAGREE (rtol {rtol:g}): {len(problems)} problem(s)")
        for p in problems:
            print(f"  {p}")
        return 1
    print(f"\nagree: every field within rtol {rtol:g} (worst effective relative difference {worst:.3e})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
