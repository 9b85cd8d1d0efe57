"""``selfplay bench {rules,search,replay,all}``: benchmarks that print figures measured in one run."""

from __future__ import annotations

import argparse
import importlib

#: bench target -> module exposing ``add_arguments(parser)`` and ``run(args) -> int``
BENCH_MODULES = {
    "rules": ("selfplay.bench.rules", "random-playout moves/s and legal-mask computations/s per game"),
    "search": ("selfplay.bench.search", "inference bound, self-play evals/s, efficiency, batching speedup"),
    "replay": ("selfplay.bench.replay", "buffer ingest and sampling positions/s, bytes per position"),
    "all": ("selfplay.bench.all", "every figure of the project in one run, each beside its target"),
}


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("bench", help="run a benchmark and print its figures",
                       description="Run a benchmark; figures are measured in this run (medians of repeats).")
    bsub = p.add_subparsers(dest="bench_target", metavar="TARGET", required=True)
    for target, (module_name, help_text) in BENCH_MODULES.items():
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name == module_name:
                continue
            raise
        bp = bsub.add_parser(target, help=help_text, description=help_text)
        bp.add_argument("--json", action="store_true", help="print the figures as one JSON object")
        module.add_arguments(bp)
        bp.set_defaults(func=module.run)
