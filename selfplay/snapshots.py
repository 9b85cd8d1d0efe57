"""The snapshot store: numbered network weights that self-play workers follow.

Layout inside the run directory::

    RUN/snapshots/000001.safetensors   weights (safetensors: tensors only, never a pickle)
    RUN/snapshots/000001.json          metadata, written *after* the weights

A snapshot exists only once its ``.json`` is in place: the weights are written to a temporary
name, fsynced and renamed first, then the metadata the same way, so a reader never sees a
half-written snapshot. Versions only increase and have no gaps: a new version is one more than
the highest complete one, chosen under a file lock so that two publishers (the learner and
``selfplay publish``) never take the same number. Weights without their metadata at that number
can only be left by a publisher killed between its two writes (a live one holds the lock); no
reader ever opened them, and the new version replaces them.

Loading checks, in this order, and raises :class:`~selfplay.errors.SnapshotError` naming the
problem: the metadata parses; the weights file exists and its SHA-256 matches the metadata; the
file is a safetensors file (a pickle or a ``torch.save`` zip archive is refused *before* anything
is deserialised); the game and its options match the caller's; every tensor name and shape
matches the caller's network. :meth:`SnapshotStore.load_into` changes the network only after
every check has passed, so a caller that catches the error keeps its previous weights.
"""

from __future__ import annotations

import contextlib
import copy
import hashlib
import json
import os
import re
import struct
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterator, Mapping

import torch
from safetensors.torch import load as safetensors_load
from safetensors.torch import save as safetensors_save

from selfplay.errors import SelfplayError, SnapshotError
from selfplay.metrics import MetricsLog
from selfplay.rundir import RunDir, atomic_write_bytes

try:  # POSIX advisory locks; on other systems publishing is single-writer by convention
    import fcntl
except ImportError:  # pragma: no cover - not on Linux
    fcntl = None  # type: ignore[assignment]

#: metadata schema version written into every snapshot's JSON
SNAPSHOT_SCHEMA = 1
WEIGHTS_SUFFIX = ".safetensors"
_NAME = re.compile(r"^(\d{6,})\.(json|safetensors)$")
#: refuse a safetensors header bigger than this (a hostile file cannot make us allocate more)
_MAX_HEADER_BYTES = 64 * 1024 * 1024


def version_name(version: int) -> str:
    """File stem of a version: at least six digits, e.g. ``000042``."""
    return f"{int(version):06d}"


@dataclass(frozen=True)
class SnapshotInfo:
    """Metadata of one published snapshot (the content of ``NNNNNN.json``).

    ``architecture`` holds ``blocks``, ``channels``, ``input_shape`` (C, H, W) and
    ``num_actions``; ``published_at`` is Unix time in seconds; ``sha256`` is the hex digest of
    the weights file; ``training_steps`` and ``samples_seen`` count the learner's optimiser steps
    and the positions it trained on up to this snapshot."""

    version: int
    game: str
    game_options: dict[str, Any]
    architecture: dict[str, Any]
    parent_version: int | None
    training_steps: int
    samples_seen: int
    published_at: float
    sha256: str
    weights_file: str
    schema: int = SNAPSHOT_SCHEMA
    extra: dict[str, Any] = field(default_factory=dict)

    def to_json(self) -> bytes:
        return (json.dumps(asdict(self), indent=2, sort_keys=True) + "\n").encode()

    @classmethod
    def from_json(cls, data: bytes, source: str) -> "SnapshotInfo":
        try:
            raw = json.loads(data)
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise SnapshotError(f"snapshot metadata {source} is not valid JSON: {exc}") from None
        if not isinstance(raw, dict):
            raise SnapshotError(f"snapshot metadata {source} is not a JSON object")
        schema = raw.get("schema", SNAPSHOT_SCHEMA)
        if not isinstance(schema, int) or schema > SNAPSHOT_SCHEMA:
            raise SnapshotError(
                f"snapshot metadata {source} has schema {schema!r}; this version reads up to {SNAPSHOT_SCHEMA}")
        required = {"version": int, "game": str, "game_options": dict, "architecture": dict,
                    "training_steps": int, "samples_seen": int, "published_at": (int, float),
                    "sha256": str, "weights_file": str}
        for key, typ in required.items():
            if key not in raw:
                raise SnapshotError(f"snapshot metadata {source} lacks the field {key!r}")
            if not isinstance(raw[key], typ) or isinstance(raw[key], bool):
                raise SnapshotError(f"snapshot metadata {source}: field {key!r} has a bad value {raw[key]!r}")
        parent = raw.get("parent_version")
        if parent is not None and (not isinstance(parent, int) or isinstance(parent, bool)):
            raise SnapshotError(f"snapshot metadata {source}: parent_version {parent!r} is not an integer")
        if "/" in raw["weights_file"] or raw["weights_file"].startswith("."):
            raise SnapshotError(f"snapshot metadata {source}: weights_file {raw['weights_file']!r} is not a plain file name")
        return cls(version=raw["version"], game=raw["game"], game_options=raw["game_options"],
                   architecture=raw["architecture"], parent_version=parent,
                   training_steps=raw["training_steps"], samples_seen=raw["samples_seen"],
                   published_at=float(raw["published_at"]), sha256=raw["sha256"],
                   weights_file=raw["weights_file"], schema=schema,
                   extra=raw.get("extra", {}) if isinstance(raw.get("extra", {}), dict) else {})


# ---- reading and checking weights ------------------------------------------------------------

def check_safetensors_bytes(data: bytes, source: str) -> None:
    """Refuse anything that is not a safetensors file, before any deserialisation.

    A ``torch.save`` file is a zip archive (``PK`` magic) holding a pickle; an old-style torch or
    plain pickle starts with the pickle protocol opcode ``0x80``. Both are refused by name."""
    if data[:2] == b"PK":
        raise SnapshotError(
            f"{source} is a zip archive (the torch.save format, which holds a pickle), not a safetensors "
            "file; pickled weights are never loaded. Save with safetensors.torch.save_file")
    # A safetensors header length whose low byte is 0x80 (e.g. 2944 bytes) also starts with 0x80,
    # so the pickle opcode only counts when the bytes are not a well-formed safetensors header.
    looks_safetensors = len(data) >= 10 and data[8:9] == b"{" and \
        struct.unpack("<Q", data[:8])[0] <= min(len(data) - 8, _MAX_HEADER_BYTES)
    if data[:1] == b"\x80" and not looks_safetensors:
        raise SnapshotError(f"{source} is a pickle stream, not a safetensors file; pickled weights are never loaded")
    if len(data) < 10:
        raise SnapshotError(f"{source} is too short ({len(data)} bytes) to be a safetensors file")
    (header_len,) = struct.unpack("<Q", data[:8])
    if header_len > min(len(data) - 8, _MAX_HEADER_BYTES) or data[8:9] != b"{":
        raise SnapshotError(f"{source} is not a safetensors file (its header is missing or corrupt)")


def tensors_from_safetensors_bytes(data: bytes, source: str) -> dict[str, torch.Tensor]:
    """Parse safetensors bytes into CPU tensors, with a clear error for a corrupt file."""
    check_safetensors_bytes(data, source)
    try:
        tensors = safetensors_load(data)
    except Exception as exc:  # safetensors raises its own error types for corrupt content
        raise SnapshotError(f"{source} is a corrupt safetensors file: {exc}") from None
    return dict(tensors)


def read_weights_file(path: str | os.PathLike[str]) -> dict[str, torch.Tensor]:
    """Read a user's weights file: ``.safetensors``, or a ``.pt``/``.pth`` state_dict saved with
    ``torch.save`` and loaded with ``torch.load(weights_only=True)`` (the restricted unpickler
    that builds tensors and plain containers only). Returns a flat name -> tensor dict."""
    p = Path(path)
    if not p.is_file():
        raise SnapshotError(f"weights file {str(p)!r} does not exist")
    data = p.read_bytes()
    if p.suffix in (".pt", ".pth", ".bin"):
        try:
            obj = torch.load(p, map_location="cpu", weights_only=True)
        except Exception as exc:
            raise SnapshotError(
                f"{str(p)!r} could not be read as a weights-only torch file: {str(exc).splitlines()[0]}") from None
        if isinstance(obj, Mapping) and "state_dict" in obj and isinstance(obj["state_dict"], Mapping):
            obj = obj["state_dict"]
        if not isinstance(obj, Mapping) or not all(isinstance(k, str) and isinstance(v, torch.Tensor)
                                                   for k, v in obj.items()):
            raise SnapshotError(f"{str(p)!r} does not hold a flat state_dict (names mapped to tensors)")
        return {k: v.detach().cpu() for k, v in obj.items()}
    return tensors_from_safetensors_bytes(data, repr(str(p)))


def safetensors_metadata(path: str | os.PathLike[str]) -> dict[str, str]:
    """The ``__metadata__`` strings of a safetensors file's header ({} if none or not safetensors).

    Snapshots written here carry ``game`` and ``game_options`` (JSON) in it."""
    try:
        with open(path, "rb") as f:
            head = f.read(8)
            if len(head) < 8:
                return {}
            (n,) = struct.unpack("<Q", head)
            if n > _MAX_HEADER_BYTES:
                return {}
            header = json.loads(f.read(n))
    except (OSError, ValueError):
        return {}
    meta = header.get("__metadata__") if isinstance(header, dict) else None
    return {str(k): str(v) for k, v in meta.items()} if isinstance(meta, dict) else {}


def shape_mismatches(tensors: Mapping[str, torch.Tensor], expected: Mapping[str, tuple[int, ...]]) -> list[str]:
    """Human-readable differences between a state_dict and the expected name -> shape map."""
    problems: list[str] = []
    missing = sorted(set(expected) - set(tensors))
    unexpected = sorted(set(tensors) - set(expected))
    if missing:
        problems.append(f"missing tensors {', '.join(missing[:5])}{' ...' if len(missing) > 5 else ''}")
    if unexpected:
        problems.append(f"unexpected tensors {', '.join(unexpected[:5])}{' ...' if len(unexpected) > 5 else ''}")
    for name in sorted(set(expected) & set(tensors)):
        got, want = tuple(tensors[name].shape), tuple(expected[name])
        if got != want:
            problems.append(f"{name} has shape {list(got)}, expected {list(want)}")
    return problems


def dtype_mismatches(tensors: Mapping[str, torch.Tensor], expected: Mapping[str, torch.dtype]) -> list[str]:
    """Tensors whose dtype is not the network's (e.g. int8 or float64 weights for a float32 net)."""
    return [f"tensor {name} has dtype {str(tensors[name].dtype).removeprefix('torch.')}, the network's is "
            f"{str(want).removeprefix('torch.')}"
            for name, want in sorted(expected.items()) if name in tensors and tensors[name].dtype != want]


#: positions the output probe runs the network on: the initial position and positions after
#: 1, 2, ... random legal moves (fixed seed)
PROBE_POSITIONS = 8
#: largest policy logit magnitude accepted: softmax stays exact in float32 well past this, and a
#: trained network is orders of magnitude below it
MAX_PROBE_LOGIT = 1e6


def probe_inputs(game: Any, count: int = PROBE_POSITIONS, seed: int = 0) -> torch.Tensor:
    """Network inputs float32 (count, C, H, W) of ``count`` positions of ``game``: the initial
    one and positions reached by random legal moves from it (deterministic for ``seed``)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    state = game.initial_state()
    planes = []
    while len(planes) < count:
        planes.append(game.encode(state))
        if game.is_terminal(state):
            state = game.initial_state()
            continue
        legal = np.flatnonzero(game.legal_mask(state))
        state = game.play(state, int(rng.choice(legal)))
    return torch.from_numpy(np.stack(planes).astype(np.float32))


def output_problems(net: torch.nn.Module, game: Any = None) -> str | None:
    """Run ``net`` on :data:`PROBE_POSITIONS` positions of its game; None if it gives finite
    policy logits (|logit| <= MAX_PROBE_LOGIT) and finite values in [-1, 1] with no layer
    overflowing on the way, else a sentence saying what went wrong (the first layer whose
    output is not finite, e.g. weights of 3e38 that overflow float32). The network's training
    mode is restored afterwards."""
    if game is None:
        from selfplay.games.registry import make_game
        game = make_game(net.game_name, **dict(getattr(net, "game_options", {})))
    x = probe_inputs(game)
    first_bad: list[str] = []
    hooks = []

    def watch(name: str):  # type: ignore[no-untyped-def]
        def hook(_module, _inputs, output):  # type: ignore[no-untyped-def]
            outs = output if isinstance(output, (tuple, list)) else (output,)
            if not first_bad and any(isinstance(o, torch.Tensor) and o.is_floating_point()
                                     and not bool(torch.isfinite(o).all()) for o in outs):
                first_bad.append(name)
        return hook

    for name, module in net.named_modules():
        if name:
            hooks.append(module.register_forward_hook(watch(name)))
    was_training = net.training
    try:
        net.eval()
        with torch.no_grad():
            logits, value = net(x)
    except (RuntimeError, ValueError) as exc:
        return f"the network fails on the probe positions: {str(exc).splitlines()[0]}"
    finally:
        for h in hooks:
            h.remove()
        net.train(was_training)
    if first_bad:
        return f"layer {first_bad[0]} gives non-finite outputs on the probe positions (overflow)"
    if not bool(torch.isfinite(logits).all()):
        return "the policy logits are not finite on the probe positions"
    top = float(logits.abs().max())
    if top > MAX_PROBE_LOGIT:
        return f"a policy logit reaches {top:.3g} on the probe positions (limit {MAX_PROBE_LOGIT:g})"
    if not bool(torch.isfinite(value).all()) or float(value.abs().max()) > 1.0:
        return "the value is not a finite number in [-1, 1] on the probe positions"
    return None


def network_for(tensors: Mapping[str, torch.Tensor], game: str, game_options: Mapping[str, Any],
                run: RunDir | None) -> torch.nn.Module | None:
    """A network of ``game`` holding ``tensors``, built from the run's run.toml when its
    network has these tensor names and shapes; None when none can be built. Tensors of another
    dtype than the network's are refused (SnapshotError naming the tensor)."""
    if run is None or not run.config.exists():
        return None
    try:
        from selfplay.config import load_config
        from selfplay.games.registry import make_game
        from selfplay.network import build_network

        cfg = load_config(run.config)
        if cfg.game.name != game and make_game(game, **dict(game_options)).name != cfg.game.name:
            return None
        net = build_network(make_game(game, **dict(game_options)), cfg.network)
    except (SelfplayError, TypeError, ValueError):  # no template: the caller decides
        return None
    sd = net.state_dict()
    if shape_mismatches(tensors, {k: tuple(v.shape) for k, v in sd.items()}):
        return None
    bad = dtype_mismatches(tensors, {k: v.dtype for k, v in sd.items()})
    if bad:
        raise SnapshotError(f"refusing to publish: {'; '.join(bad[:4])}")
    with torch.no_grad():
        net.load_state_dict(dict(tensors), strict=True)
    return net


def net_architecture(net: torch.nn.Module) -> dict[str, Any]:
    """Architecture facts of a policy-value network (see :mod:`selfplay.network`)."""
    cfg = getattr(net, "config", None)
    return {
        "blocks": getattr(cfg, "blocks", None),
        "channels": getattr(cfg, "channels", None),
        "input_shape": list(getattr(net, "input_shape", ())),
        "num_actions": getattr(net, "num_actions", None),
    }


def state_dict_of(net: torch.nn.Module) -> dict[str, torch.Tensor]:
    """A detached, contiguous CPU copy of ``net``'s state_dict (safe to serialise)."""
    return {k: v.detach().cpu().contiguous().clone() for k, v in net.state_dict().items()}


def _same_options(a: Mapping[str, Any], b: Mapping[str, Any]) -> bool:
    return json.loads(json.dumps(dict(a), sort_keys=True)) == json.loads(json.dumps(dict(b), sort_keys=True))


# ---- the store -------------------------------------------------------------------------------

class SnapshotStore:
    """Numbered snapshots in ``RUN/snapshots``; see the module docstring for the guarantees."""

    def __init__(self, run_dir: RunDir | str | os.PathLike[str], *, source: str = "store",
                 create: bool = False) -> None:
        """``run_dir``: a :class:`RunDir`, or a path that must be a run directory or an empty
        folder (a mistyped path raises RunDirError instead of growing a run's folders);
        ``create=True`` makes a new run directory at a path that does not exist yet."""
        if isinstance(run_dir, RunDir):
            self.run = run_dir
        else:
            self.run = RunDir.create(run_dir) if create else RunDir.open_or_start(run_dir)
        self.dir = self.run.snapshots
        self.dir.mkdir(parents=True, exist_ok=True)
        self._metrics = MetricsLog(self.run.metrics, "snapshots", source)

    # -- listing --
    def _numbers_on_disk(self) -> set[int]:
        out: set[int] = set()
        for entry in os.listdir(self.dir):
            m = _NAME.match(entry)
            if m:
                out.add(int(m.group(1)))
        return out

    def versions(self) -> list[int]:
        """Versions whose metadata is in place (complete snapshots), ascending."""
        return sorted(v for v in self._numbers_on_disk() if (self.dir / f"{version_name(v)}.json").exists())

    def info(self, version: int) -> SnapshotInfo:
        """Metadata of ``version``; SnapshotError if it is missing or unreadable."""
        path = self.dir / f"{version_name(version)}.json"
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            known = self.versions()
            raise SnapshotError(
                f"snapshot {version} does not exist in {self.dir} "
                f"(versions present: {', '.join(map(str, known[-5:])) or 'none'})") from None
        info = SnapshotInfo.from_json(data, str(path))
        if info.version != version:
            raise SnapshotError(f"snapshot metadata {path} says version {info.version}, not {version}")
        return info

    def latest(self) -> SnapshotInfo | None:
        """Metadata of the newest complete snapshot, or None if none has been published.

        A snapshot whose metadata cannot be read is skipped (the previous one is returned)."""
        for v in reversed(self.versions()):
            try:
                return self.info(v)
            except SnapshotError:
                continue
        return None

    def latest_version(self) -> int:
        """Newest complete version, 0 when there is none."""
        info = self.latest()
        return info.version if info else 0

    def iter_infos(self) -> Iterator[SnapshotInfo]:
        """Metadata of every readable snapshot, oldest first."""
        for v in self.versions():
            with contextlib.suppress(SnapshotError):
                yield self.info(v)

    # -- publishing --
    @contextlib.contextmanager
    def _publish_lock(self) -> Iterator[None]:
        if fcntl is None:  # pragma: no cover
            yield
            return
        fd = os.open(self.dir / ".publish.lock", os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    def publish(self, weights: torch.nn.Module | Mapping[str, torch.Tensor], *, game: str | None = None,
                game_options: Mapping[str, Any] | None = None, architecture: Mapping[str, Any] | None = None,
                parent_version: int | None = None, training_steps: int = 0, samples_seen: int = 0,
                extra: Mapping[str, Any] | None = None, template: torch.nn.Module | None = None) -> int:
        """Publish ``weights`` (a network, or a name -> tensor dict) as the next version; return it.

        Before anything is written the network is run on a few probe positions
        (:func:`output_problems`): non-finite or out-of-range outputs are refused. With a dict,
        the network is ``template`` (whose tensor dtypes the dict must have), else the one
        run.toml describes when the tensors fit it; with neither, only finiteness is checked
        here and the workers' load (:meth:`load_into`) probes the outputs.

        With a network, ``game``, ``game_options`` and ``architecture`` default to the network's
        own (``net.game_name``, ``net.game_options``, ``net.config``). Tensors that are not finite
        are refused, so a diverged learner cannot replace a good snapshot."""
        if isinstance(weights, torch.nn.Module):
            tensors = state_dict_of(weights)
            game = game if game is not None else getattr(weights, "game_name", None)
            game_options = game_options if game_options is not None else getattr(weights, "game_options", {})
            architecture = architecture if architecture is not None else net_architecture(weights)
        else:
            tensors = {k: v.detach().cpu().contiguous().clone() for k, v in weights.items()}
        if not game:
            raise SnapshotError("publish needs the game name (pass game= or a network with game_name)")
        if not tensors:
            raise SnapshotError("publish was given no tensors")
        for name, t in tensors.items():
            if t.is_floating_point() and not bool(torch.isfinite(t).all()):
                raise SnapshotError(f"refusing to publish: tensor {name} holds NaN or infinite values")
        probe = weights if isinstance(weights, torch.nn.Module) else template
        if probe is not None and probe is not weights:
            want = {k: v.dtype for k, v in probe.state_dict().items()}
            bad = dtype_mismatches(tensors, want)
            if bad:
                raise SnapshotError(f"refusing to publish: {'; '.join(bad[:4])}")
            probe = copy.deepcopy(probe)
            with torch.no_grad():
                probe.load_state_dict(tensors, strict=True)
        elif probe is None:
            probe = network_for(tensors, str(game), dict(game_options or {}), self.run)
        if probe is not None and getattr(probe, "game_name", None):  # a network of a known game
            problem = output_problems(probe)
            if problem:
                raise SnapshotError(f"refusing to publish: {problem}")
        meta_header = {"game": str(game), "game_options": json.dumps(dict(game_options or {}), sort_keys=True)}
        blob = safetensors_save(tensors, metadata=meta_header)
        digest = hashlib.sha256(blob).hexdigest()
        with self._publish_lock():
            complete = self.versions()
            version = (complete[-1] if complete else 0) + 1
            if parent_version is not None and parent_version >= version:
                raise SnapshotError(f"parent version {parent_version} is not older than the new version {version}")
            stem = version_name(version)
            info = SnapshotInfo(
                version=version, game=str(game), game_options=dict(game_options or {}),
                architecture=dict(architecture or {}), parent_version=parent_version,
                training_steps=int(training_steps), samples_seen=int(samples_seen),
                published_at=time.time(), sha256=digest, weights_file=stem + WEIGHTS_SUFFIX,
                extra=dict(extra or {}))
            atomic_write_bytes(self.dir / info.weights_file, blob)  # weights first ...
            atomic_write_bytes(self.dir / f"{stem}.json", info.to_json())  # ... metadata makes it visible
        self._metrics.write(version=version, published_at=info.published_at, parent_version=parent_version,
                            training_steps=info.training_steps, samples_seen=info.samples_seen)
        return version

    # -- loading --
    def load(self, version: int | None = None, *, game: str | None = None,
             game_options: Mapping[str, Any] | None = None,
             expected_shapes: Mapping[str, tuple[int, ...]] | None = None,
             expected_dtypes: Mapping[str, torch.dtype] | None = None,
             probe_net: torch.nn.Module | None = None) -> tuple[dict[str, torch.Tensor], SnapshotInfo]:
        """Read and check snapshot ``version`` (default: the newest). Returns (state_dict, info).

        ``game``/``game_options``, ``expected_shapes`` and ``expected_dtypes`` are checked when
        given. With ``probe_net`` (a network of the right architecture; it is not changed) the
        weights are also loaded into a copy of it and run on probe positions
        (:func:`output_problems`): a snapshot whose outputs are not finite or out of range is
        refused with a SnapshotError naming the version."""
        if version is None:
            latest = self.latest()
            if latest is None:
                raise SnapshotError(f"no snapshot has been published in {self.dir}")
            version = latest.version
        info = self.info(version)
        if game is not None and info.game != game:
            raise SnapshotError(f"snapshot {version} is for the game {info.game!r}, not {game!r}")
        if game_options is not None and not _same_options(info.game_options, game_options):
            raise SnapshotError(
                f"snapshot {version} is for {info.game} with options {info.game_options}, not {dict(game_options)}")
        path = self.dir / info.weights_file
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            raise SnapshotError(f"snapshot {version}: weights file {path} is missing") from None
        check_safetensors_bytes(data, f"snapshot {version} ({path.name})")
        digest = hashlib.sha256(data).hexdigest()
        if digest != info.sha256:
            raise SnapshotError(
                f"snapshot {version}: weights file {path.name} fails its checksum "
                f"(sha256 {digest[:12]}..., metadata says {info.sha256[:12]}...); the file is corrupt or was replaced")
        tensors = tensors_from_safetensors_bytes(data, f"snapshot {version} ({path.name})")
        if expected_shapes is not None:
            problems = shape_mismatches(tensors, expected_shapes)
            if problems:
                raise SnapshotError(f"snapshot {version} does not fit this network: {'; '.join(problems[:6])}")
        if probe_net is not None and expected_dtypes is None:
            expected_dtypes = {k: v.dtype for k, v in probe_net.state_dict().items()}
        if expected_dtypes is not None:
            bad = dtype_mismatches(tensors, expected_dtypes)
            if bad:
                raise SnapshotError(f"snapshot {version} ({path.name}) does not fit this network: {'; '.join(bad[:4])}")
        if probe_net is not None:
            if probe_net is not None and expected_shapes is None:
                problems = shape_mismatches(tensors, {k: tuple(v.shape) for k, v in probe_net.state_dict().items()})
                if problems:
                    raise SnapshotError(f"snapshot {version} does not fit this network: {'; '.join(problems[:6])}")
            trial = copy.deepcopy(probe_net)
            with torch.no_grad():
                trial.load_state_dict(tensors, strict=True)
            problem = output_problems(trial)
            if problem:
                raise SnapshotError(f"snapshot {version} ({path.name}) is refused: {problem}")
        return tensors, info

    def check_version(self, net: torch.nn.Module, version: int | None = None) -> SnapshotInfo:
        """Every check :meth:`load_into` makes — game, checksum, names, shapes, dtypes and the
        outputs on probe positions — without changing ``net``. For a worker (whatever its
        inference backend) to keep a bad version out: SnapshotError names the version."""
        expected = {k: tuple(v.shape) for k, v in net.state_dict().items()}
        _, info = self.load(version, game=getattr(net, "game_name", None),
                            game_options=getattr(net, "game_options", None), expected_shapes=expected,
                            probe_net=net)
        return info

    def load_into(self, net: torch.nn.Module, version: int | None = None, *, probe: bool = True) -> SnapshotInfo:
        """Check snapshot ``version`` (default newest) against ``net`` — names, shapes, dtypes and,
        with ``probe``, its outputs on probe positions — and copy its weights in.

        ``net`` is changed only after every check passed; on SnapshotError it keeps its weights."""
        expected = {k: tuple(v.shape) for k, v in net.state_dict().items()}
        tensors, info = self.load(version, game=getattr(net, "game_name", None),
                                  game_options=getattr(net, "game_options", None), expected_shapes=expected,
                                  probe_net=net if probe else None)
        with torch.no_grad():
            net.load_state_dict(tensors, strict=True)
        return info
