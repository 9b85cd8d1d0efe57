"""``selfplay publish RUN WEIGHTS [--parent N]``: publish a user's own trainer's weights.

WEIGHTS is a ``.safetensors`` file, or a ``.pt``/``.pth`` state_dict saved with ``torch.save``
(read with ``torch.load(weights_only=True)``, which refuses arbitrary pickled objects). The
weights are checked against the run before anything is written: the tensor names and shapes must
be those of the run's network — taken from the newest snapshot, or, when there is none yet, from
the network that the run's ``run.toml`` describes. Workers pick the new version up by themselves.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

from selfplay.errors import SelfplayError, SnapshotError
from selfplay.rundir import RunDir

if TYPE_CHECKING:
    from selfplay.snapshots import SnapshotStore


def reference_for_run(run: RunDir, store: SnapshotStore) -> tuple[str, dict[str, Any], dict[str, Any], dict[str, tuple[int, ...]]]:
    """(game, game_options, architecture, name -> shape) that a snapshot of this run must have."""
    game, options, arch, tensors = _reference(run, store)
    return game, options, arch, {k: tuple(v.shape) for k, v in tensors.items()}


def _reference(run: RunDir, store: SnapshotStore) -> tuple[str, dict[str, Any], dict[str, Any], dict[str, Any]]:
    """(game, game_options, architecture, name -> tensor) of the run's network: the newest
    snapshot's, else the network run.toml describes."""
    latest = store.latest()
    if latest is not None:
        tensors, info = store.load(latest.version)
        return info.game, info.game_options, info.architecture, tensors
    if not run.config.exists():
        raise SnapshotError(
            f"{run.root} has neither a snapshot nor a run.toml, so the weights cannot be checked against "
            "the run's game and network")
    from selfplay.loop import network_from_run_config  # the run config names game and network

    net = network_from_run_config(run.config)
    from selfplay.snapshots import net_architecture

    return net.game_name, dict(net.game_options), net_architecture(net), dict(net.state_dict())


def run_publish(run_path: str, weights_path: str, parent: int | None) -> int:
    # torch comes with the snapshot store: imported here, not when the CLI builds its parser
    from selfplay.snapshots import (SnapshotStore, dtype_mismatches, network_for, read_weights_file,
                                    safetensors_metadata, shape_mismatches)

    run = RunDir.open(run_path)
    store = SnapshotStore(run, source="publish")
    tensors = read_weights_file(weights_path)
    game, options, arch, ref = _reference(run, store)
    shapes = {k: tuple(v.shape) for k, v in ref.items()}
    meta = safetensors_metadata(weights_path)
    if "game" in meta and meta["game"] != game:
        raise SnapshotError(f"{weights_path} says it is for the game {meta['game']!r}, but run {run.root} plays {game!r}")
    problems = shape_mismatches(tensors, shapes)
    if problems:
        raise SnapshotError(
            f"{weights_path} does not fit the network of run {run.root} ({game}, "
            f"{arch.get('blocks')} blocks x {arch.get('channels')} channels): {'; '.join(problems[:6])}")
    bad = dtype_mismatches(tensors, {k: v.dtype for k, v in ref.items()})
    if bad:
        raise SnapshotError(f"{weights_path} does not fit the network of run {run.root}: {'; '.join(bad[:4])}")
    template = network_for(tensors, game, options, run)
    if template is None:
        from selfplay.games.registry import make_game
        from selfplay.network import build_network
        from selfplay.network_config import NetworkConfig
        try:  # a run without run.toml: the architecture the newest snapshot records
            cfg = NetworkConfig(**{k: arch[k] for k in ("blocks", "channels") if arch.get(k)})
            candidate = build_network(make_game(game, **options), cfg)
            if not shape_mismatches(tensors, {k: tuple(v.shape) for k, v in candidate.state_dict().items()}):
                template = candidate
        except (SelfplayError, TypeError, ValueError):
            template = None
    if parent is None:
        parent = store.latest_version() or None
    try:
        version = store.publish(tensors, game=game, game_options=options, architecture=arch,
                                parent_version=parent, template=template,
                                extra={"published_by": "selfplay publish",
                                       "source_file": Path(weights_path).name})
    except SnapshotError as exc:
        raise SnapshotError(f"{weights_path}: {exc}") from None
    print(json.dumps({"version": version, "game": game, "parent_version": parent,
                      "path": str(store.dir / f"{version:06d}.safetensors")}))
    return 0


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "publish", help="publish your own trainer's weights as the run's next snapshot",
        description="Publish WEIGHTS (.safetensors, or a weights-only torch state_dict .pt) as the next "
                    "snapshot of RUN, after checking it fits the run's game and network.")
    p.add_argument("run", metavar="RUN", help="run directory")
    p.add_argument("weights", metavar="WEIGHTS", help=".safetensors file or torch state_dict (.pt/.pth)")
    p.add_argument("--parent", type=int, default=None, metavar="N",
                   help="snapshot version these weights were trained from (default: the newest)")
    p.set_defaults(func=lambda args: run_publish(args.run, args.weights, args.parent))
