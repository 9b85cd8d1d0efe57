"""The evaluation role: rated games during a run, so the ladder grows as snapshots appear.

What it does, per round (:meth:`EvaluationRole.step`): when the newest snapshot is at least
``[evaluation] every_versions`` past the last evaluated one, it plays ``games`` games of that
snapshot against each of up to ``opponents`` earlier rated snapshots (the last evaluated one,
snapshot 1, then others spread over the rated ones) and against the optional fixed ``anchor``
(``mcts`` or ``gtp:COMMAND``). The games go to the run's catalog (origin ``eval``), the ladder
is refitted from every stored game, and one metric line is appended to RUN/metrics.jsonl::

    {"component": "eval", "source": ..., "player": "v15@48", "opponent": "ladder",
     "snapshot_version": 15, "games": 40, "wins": .., "draws": .., "losses": ..,
     "elo": .., "elo_low": .., "elo_high": .., "anchor": "v1@48", "opponents": [...],
     "simulations": 48, "seconds": ..}

``elo`` is the snapshot's ladder rating with its 95% interval (snapshot 1 at 0); wins, draws and
losses are summed over the round's games. ``opponent`` is ``"ladder"`` for every line, so the
report draws one series: Elo against snapshot version.

Which versions are rated, and what was evaluated, is read back from the catalog at every step,
so a restarted role goes on where the last one stopped and a round cut short (nothing stored)
is played again. The cost is bounded: at most ``(opponents + 1) * games`` games per round, in this
process, with ``threads`` torch threads.

Use: ``role = EvaluationRole(run_dir)`` (settings from RUN/run.toml, or pass ``config``), then
call ``role.step()`` from time to time (it returns the metric line, or None when nothing is
due), or ``role.run_pending()`` to evaluate until nothing is due. With ``gate_threshold`` set,
``role.gate_pending()`` plays an AlphaGo Zero gating match of the newest snapshot against the
accepted one and records the winner in RUN/accepted-snapshot.json; ``role.accepted_version()``
is the version workers should then load (wiring that into the workers is the run loop's part). No Ray here: the Ray
layer runs the same object in an actor.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any, Callable

from selfplay.errors import ConfigError, SelfplayError
from selfplay.metrics import MetricsLog
from selfplay.rundir import RunDir

#: the ``opponent`` field of the role's metric lines (the round's games rated on the ladder)
LADDER_OPPONENT = "ladder"
#: the ``opponent`` field of the line of a round that failed as a whole
FAILED_OPPONENT = "failed"


class EvaluationRole:
    """Rated evaluation games of one run; see the module docstring."""

    def __init__(self, run_dir: str | Path | RunDir, config: Any = None, *, source: str = "eval",
                 seed: int | None = None) -> None:
        from selfplay.config import load_config
        from selfplay.strength import RunPlayers

        self.run = run_dir if isinstance(run_dir, RunDir) else RunDir.open(run_dir)
        self.config = config if config is not None else load_config(self.run.config)
        self.settings = self.config.evaluation
        self.players = RunPlayers(self.run, threads=self.settings.threads)
        self.simulations = self.settings.simulations or self.config.search.simulations
        self.metrics = MetricsLog(self.run.metrics, "eval", source)
        self.seed = self.config.run.seed if seed is None else seed
        self.rounds = 0
        #: versions whose round failed in this process -> the reason (not tried again)
        self.failed: dict[int, str] = {}

    # ---- what is rated -----------------------------------------------------------------------
    def _stored(self) -> tuple[list[Any], dict[str, Any]]:
        from selfplay.replay.match_results import MatchResults

        with MatchResults(self.run.catalog, readonly=True) as table:
            return table.games(), table.players()

    def rated_versions(self) -> list[int]:
        """Snapshot versions with stored games at this role's budget, ascending."""
        from selfplay.strength import snapshot_player_name

        games, players = self._stored()
        names = {g.first for g in games} | {g.second for g in games}
        return sorted(p.snapshot for n, p in players.items()
                      if p.kind == "snapshot" and p.snapshot is not None and n in names
                      and n == snapshot_player_name(p.snapshot, self.simulations))

    def evaluated_versions(self) -> list[int]:
        """Versions this role has evaluated (they played as the round's subject), ascending."""
        games, players = self._stored()
        subjects = {g.match_id.split(":")[1] for g in games if g.origin == "eval" and g.match_id.count(":") >= 2}
        return sorted(p.snapshot for n, p in players.items() if n in subjects and p.snapshot is not None)

    def due(self) -> int | None:
        """The snapshot version to evaluate now, or None: the newest version, once it is at least
        ``every_versions`` past the last evaluated one (or past snapshot 1 before any)."""
        if not self.settings.enabled:
            return None
        latest = self.players.store.latest_version()
        if latest in self.failed:
            return None
        done = self.evaluated_versions()
        last = done[-1] if done else 1
        if latest >= last + self.settings.every_versions:
            return latest
        return None

    def opponents_for(self, version: int) -> list[int]:
        """Earlier rated snapshots the round plays: the last evaluated, snapshot 1, then spread."""
        rated = [v for v in self.rated_versions() if v < version]
        chosen: list[int] = []
        done = [v for v in self.evaluated_versions() if v < version]
        for v in ([done[-1]] if done else []) + [1]:
            if v not in chosen and v < version and v in self.players.store.versions():
                chosen.append(v)
        rest = [v for v in rated if v not in chosen]
        want = self.settings.opponents - len(chosen)
        if want > 0 and rest:
            step = len(rest) / want
            for i in range(min(want, len(rest))):
                v = rest[int(i * step)]
                if v not in chosen:
                    chosen.append(v)
        return chosen[:self.settings.opponents]

    # ---- a round -----------------------------------------------------------------------------
    def step(self) -> dict[str, Any] | None:
        """Evaluate the due snapshot, if any (a bounded number of games); return the metric line.

        A round that fails as a whole (the snapshot does not load, no opponent could be played)
        never stops the run: it writes a line with opponent ``"failed"`` and ``error``, and this
        role does not try that version again (a newer one is evaluated when it is due)."""
        version = self.due()
        if version is None:
            return None
        try:
            return self.evaluate(version)
        except SelfplayError as exc:
            self.failed[version] = str(exc)
            return self.metrics.write(player=f"v{version}", opponent=FAILED_OPPONENT, snapshot_version=version,
                                      games=0, wins=0, draws=0, losses=0, error=str(exc))

    def run_pending(self, max_rounds: int = 10) -> list[dict[str, Any]]:
        """Evaluate until nothing is due (at most ``max_rounds`` rounds); return the metric lines."""
        lines = []
        for _ in range(max_rounds):
            line = self.step()
            if line is None:
                break
            lines.append(line)
        return lines

    def evaluate(self, version: int) -> dict[str, Any]:
        """Play ``version`` against its opponents and the anchor, store the games, refit the ladder
        and write the ``eval`` metric line (returned).

        An opponent that fails (a GTP anchor that does not start or stops answering, a snapshot
        that does not load) is named in the line's ``errors`` and the round goes on without it;
        SelfplayError if no opponent could be played."""
        from selfplay.strength import ladder, play_rated_match

        t0 = time.time()
        subject = self.players.player(version, self.simulations)
        totals = {"games": 0, "wins": 0, "draws": 0, "losses": 0}
        names: list[str] = []
        errors: list[dict[str, str]] = []
        makers: list[tuple[str, Callable[[], tuple[Any, Any]]]] = [
            (f"v{v}", lambda v=v: (self.players.player(v, self.simulations), None)) for v in self.opponents_for(version)]
        anchor = self.settings.anchor
        if anchor == "mcts":
            sims = self.settings.anchor_simulations or self.simulations
            makers.append(("mcts", lambda: (self.players.mcts_player(sims), None)))
        elif anchor.startswith("gtp:"):
            makers.append((anchor, lambda: self.players.gtp_player(anchor[4:].strip(), timeout=self.settings.gtp_timeout)))
        if not makers:
            raise ConfigError(f"evaluation of snapshot {version}: no earlier snapshot and no anchor to play")
        for k, (label, make) in enumerate(makers):
            client = None
            try:
                opp, client = make()
                res = play_rated_match(self.players, subject, opp, self.settings.games,
                                       seed=self.seed * 1_000_003 + version * 101 + k,
                                       opening_moves=self.settings.opening_moves, origin="eval",
                                       match_id=f"eval:{subject.name}:{opp.name}")
            except SelfplayError as exc:
                errors.append({"opponent": label, "error": str(exc)})
                continue
            finally:
                if client is not None:
                    client.close()
            names.append(opp.name)
            for key in totals:
                totals[key] += getattr(res, key)
        if not names:
            raise SelfplayError(f"evaluation of snapshot {version}: no opponent could be played: "
                                + "; ".join(f"{e['opponent']}: {e['error']}" for e in errors))
        table = ladder(self.run)
        row = next((r for r in table["players"] if r["player"] == subject.name), {})
        self.rounds += 1
        extra = {"errors": errors} if errors else {}
        return self.metrics.write(player=subject.name, opponent=LADDER_OPPONENT, snapshot_version=version,
                                  **totals, elo=row.get("elo"), elo_low=row.get("elo_low"),
                                  elo_high=row.get("elo_high"), anchor=table["anchor"], opponents=names,
                                  simulations=self.simulations, seconds=round(time.time() - t0, 3), **extra)

    # ---- gating ------------------------------------------------------------------------------
    def gate(self, candidate: int, current: int) -> bool:
        """AlphaGo Zero's gating (Silver et al. 2017, "Mastering the game of Go without human
        knowledge", Methods: evaluator): ``candidate`` plays ``gate_games`` games against
        ``current``; True if it scores at least ``gate_threshold`` (0.55 in the paper). With no
        threshold set every candidate passes (AlphaZero keeps no gate). The games are stored as
        rated games (origin ``gate``) and feed the ladder too."""
        threshold = self.settings.gate_threshold
        if threshold is None:
            return True
        if candidate == current:
            return True
        from selfplay.strength import play_rated_match

        a = self.players.player(candidate, self.simulations)
        b = self.players.player(current, self.simulations)
        res = play_rated_match(self.players, a, b, self.settings.gate_games,
                               seed=self.seed * 1_000_003 + candidate * 101 + 97,
                               opening_moves=self.settings.opening_moves, origin="gate",
                               match_id=f"gate:{a.name}:{b.name}")
        passed = res.score >= threshold
        MetricsLog(self.run.metrics, "gate", self.metrics.source).write(
            candidate=candidate, current=current, games=res.games, wins=res.wins, draws=res.draws,
            losses=res.losses, score=round(res.score, 4), threshold=threshold, passed=passed)
        return passed

    @property
    def accepted_path(self) -> Path:
        """RUN/accepted-snapshot.json: the version gating last accepted (``{"version": N}``)."""
        return self.run.root / "accepted-snapshot.json"

    def accepted_version(self) -> int:
        """The version workers may use: with gating, the last one gating accepted (1 before
        any); without gating, the newest snapshot."""
        if self.settings.gate_threshold is None:
            return self.players.store.latest_version()
        return read_accepted_version(self.run)

    def gate_pending(self) -> int:
        """Gate the newest snapshot against the accepted one if it is newer; returns the accepted
        version afterwards (written atomically to :attr:`accepted_path` when it changes)."""
        import json

        from selfplay.rundir import atomic_write_bytes

        current = self.accepted_version()
        latest = self.players.store.latest_version()
        if self.settings.gate_threshold is None or latest <= current:
            return current
        if self.gate(latest, current):
            atomic_write_bytes(self.accepted_path, json.dumps({"version": latest}).encode())
            return latest
        return current


def read_accepted_version(run: RunDir) -> int:
    """The version gating last accepted (``RUN/accepted-snapshot.json``; 1 before any)."""
    import json

    path = run.root / "accepted-snapshot.json"
    try:
        data = json.loads(path.read_bytes())
        return int(data["version"])
    except FileNotFoundError:
        return 1
    except (ValueError, KeyError, TypeError):
        raise ConfigError(f"{path} is corrupt; it holds only the accepted version "
                          "and may be deleted (gating starts again from snapshot 1)") from None


__all__ = ["EvaluationRole", "FAILED_OPPONENT", "LADDER_OPPONENT", "read_accepted_version"]
