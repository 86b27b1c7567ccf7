"""``casecloud demo``: a made-up season in the fictional Brackenford district.

A hidden "true" epidemic is simulated from the two-band SEIR example; its
daily emergency-department visit counts (children, adults) are written as an
NDJSON feed and streamed day by day through the same service code the Kafka
deployment uses, over the file transport. The service is stopped part-way and
restarted, resuming from its checkpoints without replaying history. The demo
ends with a short comparison of the estimates against the hidden truth.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import sys
from pathlib import Path

import numpy as np
import orjson

from filters import CompartmentalModel, simulate_season
from schemas import DeploymentConfig, example_model_path, load_model_spec

from ..runtime.app import Service
from ..runtime.processor import Outcome
from ..transports import FileTransport

__all__ = ["run_demo", "DEMO_STREAM", "CAUTION"]

DEMO_STREAM = "brackenford-ed-ili"
DEMO_START = dt.date(2025, 9, 1)
CAUTION = (
    "Cautions: these are model-based estimates with stated uncertainty, for decision support only. "
    "Local public-health judgement and reporting rules prevail. casecloud handles aggregated counts only, "
    "never personal identifiers. The demo district, feed and epidemic are invented."
)
# Known truth for the demo (the filter is not told these).
TRUE_PARAMS = {"beta": 0.20, "rho": 0.12, "k": 25.0}


def demo_config(out: Path, particles: int) -> DeploymentConfig:
    return DeploymentConfig.model_validate(
        {
            "service": {"seed": 7, "checkpoint_dir": str(out / "checkpoints"), "keep_checkpoints": 3},
            "metrics": {"enabled": False},
            "transport": "file",
            "file": {"input": str(out / "observations.ndjson"), "output_dir": str(out)},
            "streams": [
                {
                    "id": DEMO_STREAM,
                    "model": "seir_two_band",
                    "start": DEMO_START.isoformat(),
                    "particles": particles,
                    "forecast_trajectories": 400,
                    "alerts": [
                        {
                            "name": "child_ed_surge",
                            "series": "ed_child",
                            "threshold": 40,
                            "horizon_days": 7,
                            "raise_level": 0.7,
                            "clear_level": 0.4,
                            "persistence": 2,
                        }
                    ],
                }
            ],
        }
    )


def _feed_lines(observations, days: int) -> list[bytes]:
    lines = []
    for obs in observations[:days]:
        period = (DEMO_START + dt.timedelta(days=obs.time)).isoformat()
        counts = {k: int(v) for k, v in obs.values.items()}
        lines.append(orjson.dumps({"stream": DEMO_STREAM, "period": period, "counts": counts, "metadata": {"feed": "brackenford-ed-daily"}}))
    return lines


def _with_mistakes(lines: list[bytes]) -> list[bytes]:
    """A real feed is not clean: one truncated line, one negative count, one re-sent day."""
    out = list(lines)
    # Short feeds (``--days`` below 46) get the mistakes that fit.
    if len(lines) >= 20:
        out.insert(20, lines[19][: len(lines[19]) // 2])
    if len(lines) >= 31:
        bad = orjson.loads(lines[30])
        bad["counts"]["ed_child"] = -3
        out.insert(31, orjson.dumps(bad))
    resent = min(46, len(out))
    if resent:
        out.insert(resent, out[resent - 1])
    return out


async def _run_service(config: DeploymentConfig, progress) -> dict[str, int]:
    transport = FileTransport(config.file.input, config.file.output_dir)
    service = Service(config, transport, today=lambda: DEMO_START + dt.timedelta(days=400), on_outcome=progress)
    return await service.run(until_exhausted=True)


def run_demo(out: Path, days: int = 120, particles: int = 2000, seed: int = 7, quiet: bool = False) -> str:
    """Run the demo into ``out``; returns the readable summary (also written to summary.txt)."""
    out.mkdir(parents=True, exist_ok=True)
    for name in ("observations.ndjson", "estimates.ndjson", "alerts.ndjson", "dead_letters.ndjson", "committed.json"):
        (out / name).unlink(missing_ok=True)
    ckpt = out / "checkpoints"
    if ckpt.exists():
        for f in sorted(ckpt.rglob("*"), reverse=True):
            f.unlink() if f.is_file() else f.rmdir()
    model = CompartmentalModel(load_model_spec(example_model_path("seir_two_band")))
    truth = simulate_season(model, days, np.random.default_rng(seed), params=TRUE_PARAMS)
    lines = _with_mistakes(_feed_lines(truth.observations, days))
    config = demo_config(out, particles)
    first = len(lines) * 3 // 5
    seen = {"n": 0}

    def progress(outcome: Outcome) -> None:
        seen["n"] += 1
        if not quiet and (seen["n"] % 25 == 0 or seen["n"] == len(lines)):
            print(f"  record {seen['n']}/{len(lines)}", file=sys.stderr, flush=True)

    feed = out / "observations.ndjson"
    feed.write_bytes(b"\n".join(lines[:first]) + b"\n")
    if not quiet:
        print(f"casecloud demo: {days} days of made-up ED visits, {particles} particles -> {out}", file=sys.stderr)
    counts1 = asyncio.run(_run_service(config, progress))
    if not quiet:
        print("  (service stopped; more data arrives; restarting from checkpoints)", file=sys.stderr)
    with open(feed, "ab") as f:
        f.write(b"\n".join(lines[first:]) + b"\n")
    counts2 = asyncio.run(_run_service(config, progress))
    summary = summarise_demo(out, model, truth, counts1, counts2)
    (out / "summary.txt").write_text(summary, encoding="utf-8")
    return summary


def summarise_demo(out: Path, model, truth, counts1: dict, counts2: dict) -> str:
    estimates = [orjson.loads(line) for line in (out / "estimates.ndjson").read_bytes().splitlines() if line]
    alerts = [orjson.loads(line) for line in (out / "alerts.ndjson").read_bytes().splitlines() if line]
    dead = [orjson.loads(line) for line in (out / "dead_letters.ndjson").read_bytes().splitlines() if line]
    lines = [
        "casecloud demo: Brackenford district (fictional), ED visits for influenza-like illness",
        "=" * 78,
        f"records: first run applied {counts1['applied']}, skipped {counts1['skipped']}, dead-lettered {counts1['dead_letter']};",
        f"         after restart applied {counts2['applied']}, skipped {counts2['skipped']}, dead-lettered {counts2['dead_letter']}",
        f"dead letters: {', '.join(sorted(d['reason'] for d in dead)) or 'none'}",
        "",
        "How well the cloud tracked the hidden truth (90% interval = 5%..95% posterior quantiles):",
        f"{'quantity':<14}{'days covered by 90% interval':>30}{'mean |error| of median':>26}",
    ]
    for comp in ("E", "I"):
        for g, gname in enumerate(model.groups):
            name = f"{comp}[{gname}]"
            c = model.compartments.index(comp)
            hits, errs = 0, []
            for e in estimates:
                true = truth.states[e["day"], g, c]
                q = e["quantities"][name]["quantiles"]
                hits += q["0.05"] <= true <= q["0.95"]
                errs.append(abs(q["0.5"] - true))
            lines.append(f"{name:<14}{f'{hits}/{len(estimates)} ({100 * hits / len(estimates):.0f}%)':>30}{np.mean(errs):>26.1f}")
    beta_idx = model.param_names.index("beta")
    last = estimates[-1]
    lines += [
        "",
        f"transmission rate beta at the end: truth {truth.params[last['day'], beta_idx]:.3f}, "
        f"estimate {last['quantities']['beta']['quantiles']['0.5']:.3f} "
        f"(90%: {last['quantities']['beta']['quantiles']['0.05']:.3f}-{last['quantities']['beta']['quantiles']['0.95']:.3f})",
        f"effective reproduction number at the end: {last['quantities']['R_eff']['quantiles']['0.5']:.2f} "
        f"(90%: {last['quantities']['R_eff']['quantiles']['0.05']:.2f}-{last['quantities']['R_eff']['quantiles']['0.95']:.2f})",
        f"alerts published: {len(alerts)} ("
        + ", ".join(f"{a['status']} on {a['period']} p={a['probability']:.2f}" for a in alerts)
        + ")",
        f"outputs: {out}/estimates.ndjson, alerts.ndjson, dead_letters.ndjson, checkpoints/",
        f"pictures: casecloud report --estimates {out}/estimates.ndjson --alerts {out}/alerts.ndjson "
        f"--observations {out}/observations.ndjson --out {out}/report",
        "",
        CAUTION,
    ]
    return "\n".join(lines) + "\n"


def cmd_demo(args) -> int:
    summary = run_demo(Path(args.out), days=args.days, particles=args.particles, seed=args.seed, quiet=args.quiet)
    print(summary)
    return 0


def add_demo_parser(sub) -> None:
    demo = sub.add_parser("demo", help="run a made-up season end to end over the file transport (no broker)")
    demo.add_argument("--out", default="casecloud-demo", help="output directory (default: ./casecloud-demo)")
    demo.add_argument("--days", type=int, default=120, help="days to simulate (default 120)")
    demo.add_argument("--particles", type=int, default=2000, help="particles in the cloud (default 2000)")
    demo.add_argument("--seed", type=int, default=7, help="seed of the hidden truth (default 7)")
    demo.add_argument("--quiet", action="store_true", help="no progress lines")
    demo.set_defaults(handler=cmd_demo)
