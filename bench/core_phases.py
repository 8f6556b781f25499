"""Per-phase cost of the statistical core (µs per series), this tree against another revision, in one run.

Runs :func:`arflow.core.pipeline.run_core` with the default settings (the job
file's defaults: order selection, seasonal candidate, unit roots, outliers,
diagnostics, forecasts with parameter and selection uncertainty, backtest) on
one process, with every phase timed exclusively in CPU seconds of the process (the roots inside the fit are
counted as roots; work nested in a phase, e.g. the difference fit inside the
unit-root decision, counts for that phase). The other revision's ``arflow``
package is extracted with ``git archive`` and run in a subprocess on the same
panel, interleaved with this tree, ``--repeat`` times (the minimum is kept).
Both sides' results are compared: the largest absolute difference of the
published numbers and whether the gate decisions agree.

    python bench/core_phases.py                          # 20,000 monthly series x 120, against main
    python bench/core_phases.py --series 5000 --against HEAD~3 --repeat 3
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
PHASES = ("fit", "roots", "unit roots", "outliers", "diagnostics", "forecast", "intervals", "backtest", "rest")


def _install_timers(acc: dict[str, float]) -> None:
    """Wrap the core's phase functions so each call's wall time lands in ``acc`` (exclusive)."""
    from arflow.core import autoreg, diagnostics, outliers, pipeline, unitroot

    stack: list[list] = []  # [phase, start, child_time]

    def wrap(mod, name, phase, always=False):
        fn = getattr(mod, name)

        def timed(*a, **k):
            if stack and not always:
                return fn(*a, **k)
            stack.append([phase, time.process_time(), 0.0])
            try:
                return fn(*a, **k)
            finally:
                ph, t0, child = stack.pop()
                dt = time.process_time() - t0
                acc[ph] = acc.get(ph, 0.0) + dt - child
                if stack:
                    stack[-1][2] += dt

        setattr(mod, name, timed)

    wrap(autoreg, "fit_ar", "fit")
    wrap(autoreg, "max_root_modulus", "roots", always=True)
    wrap(pipeline, "unit_root_decision", "unit roots")
    wrap(unitroot, "kpss", "unit roots")
    wrap(outliers, "detect_and_treat", "outliers")
    wrap(diagnostics, "residual_acf", "diagnostics")
    wrap(pipeline, "residual_test", "diagnostics")
    wrap(pipeline, "_interval_terms", "forecast")
    wrap(pipeline, "forecast_ar", "forecast")
    if hasattr(pipeline, "intervals"):
        wrap(pipeline.intervals, "candidate_interval", "intervals")
    wrap(pipeline, "_backtest", "backtest")


def _panel(G: int, T: int):
    from arflow.sample.simulate import mixed_monthly, to_panel

    return to_panel(mixed_monthly(G, T))


def _fingerprint(res) -> dict[str, np.ndarray]:
    out = {
        "coef": res.fit.coef, "intercept": res.fit.intercept, "sigma": res.fit.sigma,
        "root": res.fit.max_root_modulus, "resid": res.fit.resid,
        "mean": res.forecasts.mean, "sd": res.forecasts.sd, "lower": res.forecasts.lower,
        "upper": res.forecasts.upper, "adf": res.adf.statistic, "rstat": res.residual_test.statistic,
        "published": res.outcome.published.astype(np.float64), "differenced": res.differenced.astype(np.float64),
    }
    if res.backtest is not None:
        from dataclasses import fields, is_dataclass

        bt = res.backtest
        for f in fields(bt):
            v = getattr(bt, f.name)
            if is_dataclass(v):
                for g in fields(v):
                    w = getattr(v, g.name)
                    if isinstance(w, np.ndarray) and w.dtype.kind in "fbi":
                        out[f"bt_{f.name}_{g.name}"] = w.astype(np.float64)
            elif isinstance(v, np.ndarray) and v.dtype.kind in "fbi":
                out[f"bt_{f.name}"] = v.astype(np.float64)
    if res.outliers is not None:
        out["out_stat"] = res.outliers.statistic
    return out


def child(args) -> None:
    """One measured run (in this process): phase seconds as JSON on stdout, results to an .npz."""
    from arflow.core.pipeline import run_core
    from arflow.settings import Settings

    panel = _panel(args.series, args.periods)
    settings = Settings(frequency="month")
    run_core(panel.take(np.arange(min(args.series, 2048))), settings)  # warm-up
    acc: dict[str, float] = {}
    _install_timers(acc)
    t0 = time.process_time()
    res = run_core(panel, settings, workers=1)
    total = time.process_time() - t0
    acc["rest"] = total - sum(acc.values())
    acc["total"] = total
    if args.dump:
        np.savez(args.dump, **_fingerprint(res))
    print(json.dumps(acc))


def _run(pythonpath: str, args, dump: str) -> dict[str, float]:
    env = dict(os.environ, PYTHONPATH=pythonpath, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", "--series", str(args.series),
           "--periods", str(args.periods), "--dump", dump]
    out = subprocess.run(cmd, env=env, check=True, capture_output=True, text=True, cwd=tempfile.gettempdir())
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=20_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--against", default="main", help="git revision to compare with (default main)")
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--dump", default="", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args)
        return
    with tempfile.TemporaryDirectory() as tmp:
        old = Path(tmp) / "old"
        old.mkdir()
        arch = subprocess.run(["git", "-C", str(ROOT), "archive", args.against, "arflow"], check=True,
                              capture_output=True).stdout
        subprocess.run(["tar", "-x", "-C", str(old)], input=arch, check=True)
        best = {"old": None, "new": None}
        for _ in range(args.repeat):
            for side, path in (("old", str(old)), ("new", str(ROOT))):
                r = _run(path, args, str(Path(tmp) / f"{side}.npz"))
                if best[side] is None or r["total"] < best[side]["total"]:
                    best[side] = r
        a, b = np.load(Path(tmp) / "old.npz"), np.load(Path(tmp) / "new.npz")
        G = args.series
        print(f"{G:,} monthly series x {args.periods}, default settings, one process, "
              f"best of {args.repeat}; load average {os.getloadavg()[0]:.2f}")
        print(f"{'phase':<12} {args.against + ' µs/series':>16} {'this tree':>12} {'ratio':>7}")
        for ph in PHASES + ("total",):
            o, n = best["old"].get(ph, 0.0) * 1e6 / G, best["new"].get(ph, 0.0) * 1e6 / G
            ratio = f"{o / n:6.2f}x" if n > 0 else "     -"
            print(f"{ph:<12} {o:>16.1f} {n:>12.1f} {ratio:>7}")
        worst = 0.0
        same = True
        for key in a.files:
            x, y = a[key], b[key]
            if x.shape != y.shape:
                print(f"  {key}: shapes differ {x.shape} vs {y.shape}")
                same = False
                continue
            both = np.isfinite(x) & np.isfinite(y)
            if not np.array_equal(np.isfinite(x), np.isfinite(y)):
                print(f"  {key}: finite patterns differ in {np.sum(np.isfinite(x) != np.isfinite(y))} cells")
                same = False
            d = np.abs(x[both] - y[both])
            rel = d / np.maximum(np.abs(x[both]), 1.0)
            if rel.size and rel.max() > 0:
                worst = max(worst, float(rel.max()))
                print(f"  {key}: max relative difference {rel.max():.2e} in {np.sum(d > 0)} cells")
        pub = np.array_equal(a["published"], b["published"]) and np.array_equal(a["differenced"], b["differenced"])
        print(f"results: {'bit-identical' if worst == 0 and same else f'largest relative difference {worst:.2e}'}; "
              f"decisions {'identical' if pub else 'DIFFER'}")


if __name__ == "__main__":
    main()
