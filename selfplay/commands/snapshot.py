"""``selfplay snapshot export RUN [--version V] --format onnx --out FILE``: a snapshot as an ONNX model.

The model's input is the game's float32 input planes ``(N, C, H, W)``; its outputs are the raw
policy logits ``(N, A)`` and the value ``(N,)`` from the side to move's view; its metadata names
the game, its options, the input-plane layout and the action numbering (docs/inference.md), so an
engine in another language can load a snapshot without this project's code.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from selfplay.errors import SelfplayError, SnapshotError
from selfplay.rundir import RunDir, atomic_write_bytes

FORMATS = ("onnx",)


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("snapshot", help="work with a run's snapshots (export one as an ONNX model)",
                       description="Work with a run's published snapshots.")
    ssub = p.add_subparsers(dest="snapshot_command", metavar="ACTION", required=True)
    e = ssub.add_parser("export", help="write a snapshot as an ONNX model for another engine or runtime",
                        description=__doc__.split("\n\n", 1)[1] if __doc__ else None)
    e.add_argument("run", help="run directory")
    e.add_argument("--version", default="latest", help="snapshot version, or 'latest' (default)")
    e.add_argument("--format", default="onnx", choices=FORMATS, help="output format (default onnx)")
    e.add_argument("--out", required=True, help="file to write, e.g. net.onnx")
    e.add_argument("--overwrite", action="store_true", help="replace FILE if it exists")
    e.set_defaults(func=run_export)


def parse_version(text: str) -> int | None:
    """None for 'latest', else a positive version number; SelfplayError otherwise."""
    if text == "latest":
        return None
    try:
        version = int(text)
    except ValueError:
        raise SelfplayError(f"--version {text!r} is not a snapshot number or 'latest'") from None
    if version < 1:
        raise SelfplayError(f"--version {version} must be at least 1 (versions start at 1)")
    return version


def run_export(args: argparse.Namespace) -> int:
    from selfplay.config import load_config
    from selfplay.games.registry import make_game
    from selfplay.inference.onnx_export import export_onnx_model
    from selfplay.network import build_network
    from selfplay.snapshots import SnapshotStore

    out = Path(args.out)
    if out.exists() and not args.overwrite:
        raise SelfplayError(f"{out} exists; pass --overwrite to replace it")
    if not out.parent.is_dir():
        raise SelfplayError(f"the folder of --out ({out.parent}) does not exist")
    wanted = parse_version(args.version)
    run = RunDir.open(args.run)
    store = SnapshotStore(run, source="export")
    versions = store.versions()
    if not versions:
        raise SnapshotError(f"{run.root} has no published snapshot yet")
    if wanted is not None and wanted not in versions:
        raise SnapshotError(f"{run.root} has no snapshot version {wanted} "
                            f"(it has {versions[0]}..{versions[-1]}, {len(versions)} in all)")
    config = load_config(run.config)
    game = make_game(config.game.name, **config.game.options)
    net = build_network(game, config.network)
    info = store.load_into(net, wanted)
    data = export_onnx_model(net, game, version=info.version,
                             extra={"published_at": f"{info.published_at:.3f}",
                                    "training_steps": str(info.training_steps)})
    atomic_write_bytes(out, data)
    print(f"wrote {out} ({len(data) / 1e6:.1f} MB): snapshot {info.version} of {run.root} as ONNX "
          f"(input 'planes' {list(net.input_shape)}, outputs 'policy_logits' [{net.num_actions}] and 'value')")
    return 0
