"""``casecloud calibrate``: PMMH over a model's static parameters on a history CSV.

Writes ``draws.csv`` (kept draws, natural scale, one row per chain and
iteration), ``summary.json`` (R-hat, ESS, acceptance, log-evidence noise and
suggested particles, posterior quantiles) and ``prior.toml`` (the posterior as
priors for a streaming config) into ``--out``; the chains' state is kept there
too (``pmmh_state.json`` + ``pmmh_*.npy``), so a run stopped part-way resumes
where it left off when started again with the same arguments.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import hashlib
import io
import json
import os
import sys
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from filters import (
    CalibrationResult,
    CalibrationSettings,
    CalibrationStateError,
    ModelError,
    calibrate,
    build_model,
    calibration_parameters,
    history_observations,
)
from schemas import SpecError, load_history, load_named_spec

from ..console import Progress

__all__ = ["StateDirectory", "add_calibrate_parser", "run_calibrate_command", "history_observations", "write_outputs", "render_summary"]

CAUTION = (
    "Cautions: these are model-based estimates with stated uncertainty, conditional on the model spec "
    "(its structure, fixed values and observation model) and on the data; check R-hat (< 1.05) and ESS "
    "(> 100 per parameter) before using them, and do not re-calibrate on the same data with these priors. "
    "Decision support only: local public-health judgement and reporting rules prevail. Aggregated counts "
    "only, no personal identifiers."
)



class StateDirectory:
    """A calibration's chains kept in a directory: ``pmmh_state.json`` (header,
    with the SHA-256 of every array) and one ``pmmh_<name>.npy`` per array
    (numpy's format, never pickle), each written atomically."""

    def __init__(self, directory: Path) -> None:
        self.directory = Path(directory)

    def __repr__(self) -> str:
        return f"in {self.directory}"

    @staticmethod
    def _write_atomic(path: Path, data: bytes) -> None:
        tmp = path.with_name(path.name + ".tmp")
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)

    def save(self, header: dict, arrays: dict) -> None:
        self.directory.mkdir(parents=True, exist_ok=True)
        digests = {}
        for name, array in sorted(arrays.items()):
            buf = io.BytesIO()
            np.save(buf, np.ascontiguousarray(array), allow_pickle=False)
            data = buf.getvalue()
            digests[name] = hashlib.sha256(data).hexdigest()
            self._write_atomic(self.directory / f"pmmh_{name}.npy", data)
        body = json.dumps(dict(header, sha256=digests), indent=1, sort_keys=True).encode()
        self._write_atomic(self.directory / "pmmh_state.json", body)

    def load(self):
        head = self.directory / "pmmh_state.json"
        if not head.exists():
            return None
        try:
            header = json.loads(head.read_text())
            digests = dict(header.pop("sha256"))
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise CalibrationStateError(f"{head}: unreadable calibration state ({exc}); delete it to start afresh") from None
        arrays = {}
        for name, digest in digests.items():
            path = self.directory / f"pmmh_{name}.npy"
            try:
                data = path.read_bytes()
            except OSError:
                raise CalibrationStateError(f"{path}: missing; delete {head} to start afresh") from None
            if hashlib.sha256(data).hexdigest() != digest:
                raise CalibrationStateError(f"{path}: checksum does not match {head}; delete both to start afresh")
            arrays[name] = np.load(io.BytesIO(data), allow_pickle=False)
        return header, arrays


def add_calibrate_parser(sub: Any) -> None:
    """Register ``casecloud calibrate`` on the CLI's sub-parsers."""
    p = sub.add_parser(
        "calibrate",
        help="fit a model's static parameters to past counts (particle marginal Metropolis-Hastings)",
        description="Particle marginal Metropolis-Hastings over the static parameters of a model spec, on a "
        "history CSV (header period,<series>...). Resumable: run again with the same --out to continue.",
    )
    p.add_argument("--model", required=True, help="model spec TOML of either family, or a shipped example name (sir, seir, ..., pellingwold_flu)")
    p.add_argument("--history", required=True,
                   help="CSV: period,<series1>,... (dates or ISO weeks; empty = missing); with data vintages "
                        "(period,as_of,<series1>,...) the last vintage of each period is read as its final count")  # fmt: skip
    p.add_argument("--start", required=True, help="calendar date of model day 0 (YYYY-MM-DD), before the first period")
    p.add_argument("--particles", type=int, default=500, help="particles per likelihood estimate (default 500)")
    p.add_argument("--iterations", type=int, default=2000, help="iterations per chain incl. burn-in (default 2000)")
    p.add_argument("--chains", type=int, default=4, help="chains from dispersed prior draws (default 4)")
    p.add_argument("--burn-in", type=int, help="iterations dropped per chain (default: a quarter of --iterations)")
    p.add_argument("--noise-repeats", type=int, default=20, help="filter runs of the log-evidence noise check (0: skip)")
    p.add_argument("--adapt-start", type=int, default=100,
                   help="iterations before the proposal adapts to each chain's history (default 100)")
    p.add_argument("--seed", type=int, default=0, help="seed of the chains (default 0)")
    p.add_argument("--out", default="casecloud-calibration", help="output and state directory")
    p.add_argument("--quiet", action="store_true", help="no progress display")
    p.set_defaults(handler=run_calibrate_command)


def write_outputs(result: CalibrationResult, out: Path) -> dict[str, Path]:
    """draws.csv, summary.json and prior.toml in ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    paths = {"draws": out / "draws.csv", "summary": out / "summary.json", "prior": out / "prior.toml"}
    with open(paths["draws"], "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["chain", "iteration", *result.names, "log_posterior"])
        chains, kept, _ = result.draws.shape
        for c in range(chains):
            for i in range(kept):
                writer.writerow([c, result.settings.burn_in + i, *(f"{v:.10g}" for v in result.draws[c, i]),
                                 f"{result.log_posterior[c, i]:.10g}"])
    paths["summary"].write_bytes(orjson.dumps(result.summary(), option=orjson.OPT_INDENT_2) + b"\n")
    paths["prior"].write_text(result.prior_block())
    return paths


def render_summary(result: CalibrationResult) -> str:
    """A readable table of the posterior and the diagnostics, with cautions."""
    s = result.settings
    lines = [
        f"PMMH calibration: {s.chains} chains x {result.iterations_done} iterations ({s.burn_in} burn-in), "
        f"{s.particles} particles per likelihood estimate",
        "",
        f"{'parameter':<16}{'mean':>11}{'5%':>11}{'50%':>11}{'95%':>11}{'R-hat':>8}{'ESS':>8}",
    ]
    q = result.quantiles()
    flags = []
    for k, name in enumerate(result.names):
        rhat, ess = float(result.rhat[k]), float(result.ess[k])
        lines.append(f"{name:<16}{q[name]['mean']:>11.4g}{q[name]['q0.05']:>11.4g}{q[name]['q0.5']:>11.4g}"
                     f"{q[name]['q0.95']:>11.4g}{rhat:>8.3f}{ess:>8.0f}")
        if not (rhat < 1.05):
            flags.append(f"R-hat of {name} is {rhat:.3f} (>= 1.05): chains disagree; run more iterations")
        if not (ess > 100):
            flags.append(f"ESS of {name} is {ess:.0f} (<= 100): too few effective draws; run more iterations")
    lines.append("")
    lines.append("acceptance per chain: " + ", ".join(f"{a:.2f}" for a in result.acceptance)
                 + " (a random walk does best near 0.23 with an exact likelihood, lower with a noisy one)")
    noise = result.noise
    if noise is not None:
        if noise.advice == "collapses":
            lines.append(f"log-evidence noise: some of {noise.repeats} filter runs at the posterior centre collapsed "
                         f"with {noise.particles} particles: raise --particles (e.g. x4)")
        else:
            verdict = {"ok": "fine", "too_noisy": "too noisy (chains stick)", "wasteful": "lower than needed (slow)"}[noise.advice]
            lines.append(f"log-evidence noise: sd {noise.sd:.2f} over {noise.repeats} filter runs with {noise.particles} "
                         f"particles: {verdict}; aiming at sd 1.2 suggests --particles {noise.suggested_particles}")
    lines += [f"warning: {f}" for f in flags]
    lines += ["", CAUTION]
    return "\n".join(lines)


def run_calibrate_command(args: argparse.Namespace) -> int:
    model_ref = args.model
    try:
        spec = load_named_spec(model_ref)
        model = build_model(spec)
        try:
            start = dt.date.fromisoformat(args.start)
        except ValueError:
            raise SpecError(f"--start {args.start!r} is not a date; allowed: YYYY-MM-DD") from None
        history = load_history(args.history, allowed_series=[s.name for s in spec.series])
        history.check_kinds({s.name: getattr(s, "kind", "incidence") for s in spec.series}, f"model {spec.name!r}")
        observations = history_observations(history, start)
        params = calibration_parameters(model)
        burn_in = args.burn_in if args.burn_in is not None else args.iterations // 4
        settings = CalibrationSettings(
            particles=args.particles, iterations=args.iterations, burn_in=burn_in, chains=args.chains,
            noise_repeats=args.noise_repeats, seed=args.seed,
            adapt_start=args.adapt_start,
            batch=max(1, min(50, args.iterations // 10 or 1)),
        )
    except (SpecError, ModelError, ValueError) as exc:
        print(f"casecloud calibrate: {exc}", file=sys.stderr)
        return 2
    out = Path(args.out)
    shown = Progress("calibrate", settings.chains * settings.iterations, "iterations", enabled=not args.quiet)
    print(f"casecloud calibrate: {len(observations)} periods from {args.history}, static parameters "
          f"{[p.name for p in params]}; state in {out}", file=sys.stderr)
    # The log-evidence noise check runs after the last iteration: say so while it runs.
    noise = f"now {settings.noise_repeats} filter runs to measure log-evidence noise" if settings.noise_repeats else None

    def progress(done: int, total: int) -> None:
        shown.update(done, total, note=noise if done >= total else None)

    try:
        with shown:
            result = calibrate(model, observations, settings, params, state=StateDirectory(out), progress=progress)
    except CalibrationStateError as exc:
        print(f"casecloud calibrate: {exc}", file=sys.stderr)
        return 2
    except ValueError as exc:  # e.g. every starting draw collapses
        print(f"casecloud calibrate: {exc}", file=sys.stderr)
        return 1
    paths = write_outputs(result, out)
    print(render_summary(result))
    print("\nwrote " + ", ".join(str(p) for p in paths.values()))
    return 0
