"""Games between `selfplay gtp` and GNU Go 3.8 (an engine nobody here wrote), refereed over GTP v2.

Checks (GTP v2 draft 2, https://www.lysator.liu.se/~gunnar/gtp/; GNU Go 3.8 documentation for
``--chinese-rules`` area scoring, ``final_score`` and ``final_status_list dead``):
- every move either engine makes is legal for the other (its ``play`` succeeds) and under our rules;
- the game ends (two passes, a resignation, or the rules' move cap);
- where GNU Go finds no dead stones, its ``final_score`` equals our Tromp–Taylor score (and our
  engine's own ``final_score``), since area scoring then counts exactly stones plus surrounded
  empty points.
And `selfplay match --opponent-gtp` plays complete games with GNU Go at level 0 from both colours.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from selfplay.cli import main
from selfplay.games.go import GoGame
from selfplay.gtp.client import GtpClient
from selfplay.gtp.vertex import colour_text, parse_vertex
from selfplay.replay.match_results import MatchResults
from selfplay.strength import ladder
from strength_support import cli_argv, cli_env, make_run

GNUGO = "/usr/games/gnugo" if os.path.exists("/usr/games/gnugo") else shutil.which("gnugo")
pytestmark = [
    pytest.mark.skipif(GNUGO is None, reason="gnugo not found at /usr/games/gnugo; install with apt-get install "
                       "gnugo (the GTP games against GNU Go did NOT run)"),
    pytest.mark.slow,
]
GNUGO_RULES = "--mode gtp --chinese-rules --positional-superko --forbid-suicide --capture-all-dead"


@pytest.fixture(scope="module")
def go_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_run(tmp_path_factory.mktemp("gnugo") / "run", "go", {"size": 5, "komi": 7.5}, snapshots=1).root


def _new_game(clients: tuple[GtpClient, ...], size: int, komi: float) -> GoGame:
    """Our referee's rules for a new game, and every engine told the board and komi."""
    for c in clients:
        c.send(f"boardsize {size}")
        c.send("clear_board")
        c.send(f"komi {komi:g}")
    return GoGame(size=size, komi=komi)


def _referee(ours: GtpClient, gnugo: GtpClient, ours_colour: int, komi: float) -> dict:
    game = _new_game((ours, gnugo), 5, komi)
    state = game.initial_state()
    engines = {ours_colour: ours, 1 - ours_colour: gnugo}
    resigned = None
    while not game.is_terminal(state):
        mover = game.to_play(state)
        colour = colour_text(mover)
        reply = engines[mover].send(f"genmove {colour}")
        if reply.lower() == "resign":
            resigned = mover
            break
        action = parse_vertex(reply, 5)
        assert action is not None, f"genmove answered {reply!r}"
        assert game.legal_mask(state)[action], f"{reply} by {colour} is illegal under our rules"
        engines[1 - mover].send(f"play {colour} {reply}")  # raises if the other engine refuses it
        state = game.play(state, action)
    return {"state": state, "game": game, "resigned": resigned}


def test_selfplay_gtp_against_gnugo(go_run: Path) -> None:
    """A tiny untrained snapshot against GNU Go on 5x5, each colour twice."""
    compared = 0
    ended = 0
    with GtpClient(cli_argv("gtp", str(go_run), "--simulations", "16"), timeout=120, env=cli_env()) as ours:
        for i in range(4):
            komi = (7.5, 0.5)[i // 2]
            # a fresh GNU Go per game (it keeps a position's final_score across komi changes)
            with GtpClient(f"{GNUGO} {GNUGO_RULES} --level 0", timeout=60) as gnugo:
                res = _referee(ours, gnugo, ours_colour=i % 2, komi=komi)
                game, state = res["game"], res["state"]
                assert res["resigned"] is not None or game.is_terminal(state)
                ended += 1
                if res["resigned"] is not None:
                    continue
                assert ours.send("final_score") == game.result_text(state)
                if gnugo.send("final_status_list dead").strip() == "":
                    assert gnugo.send("final_score") == game.result_text(state)
                    compared += 1
    assert ended == 4
    assert compared >= 1, "no game ended without dead stones, so the score was never compared"


def test_gnugo_self_play_followed_by_selfplay_gtp_scores_alike(tmp_path: Path) -> None:
    """GNU Go plays both colours on 7x7 (mixed boards at the end), `selfplay gtp` is told every
    move: each is legal for it, and with no dead stones the three scores agree."""
    run = make_run(tmp_path / "run7", "go", {"size": 7, "komi": 7.5}, snapshots=1).root
    compared = []
    with GtpClient(cli_argv("gtp", str(run), "--simulations", "4"), timeout=120, env=cli_env()) as ours:
        for seed, komi in ((0, 7.5), (1, 13.5), (2, 7.5)):
            # a fresh GNU Go per game: seen here, GNU Go 3.8 keeps a position's final_score after a
            # later komi command changed the komi (a cached status), so one process would compare
            # one game's score under another game's komi
            with GtpClient(f"{GNUGO} {GNUGO_RULES} --level 0", timeout=60) as gnugo:
                game = _new_game((ours, gnugo), 7, komi)
                state = game.initial_state()
                gnugo.send(f"set_random_seed {seed}")
                while not game.is_terminal(state):
                    colour = colour_text(game.to_play(state))
                    reply = gnugo.send(f"genmove {colour}")
                    if reply.lower() == "resign":
                        break
                    ours.send(f"play {colour} {reply}")  # raises GtpCommandError if we refuse a GNU Go move
                    state = game.play(state, parse_vertex(reply, 7))
                assert game.is_terminal(state)
                if gnugo.send("final_status_list dead").strip() == "":
                    expected = game.result_text(state)
                    assert ours.send("final_score") == expected
                    assert gnugo.send("final_score") == expected
                    both_colours = {1, 2} <= set(state.board.tolist())
                    compared.append((expected, both_colours))
    assert any(both for _, both in compared), f"no mixed final board was compared: {compared}"


def test_match_against_gnugo_level_0_from_both_colours(go_run: Path, capsys: pytest.CaptureFixture) -> None:
    code = main(["match", str(go_run), "1", "--opponent-gtp", f"{GNUGO} {GNUGO_RULES} --level 0",
                 "--games", "2", "--simulations", "8", "--json"])
    assert code == 0
    with MatchResults(go_run / "catalog.sqlite", readonly=True) as t:
        games = t.games()
        players = t.players()
    assert len(games) == 2
    gtp_name = next(n for n, p in players.items() if p.kind == "gtp")
    assert "GNU Go" in gtp_name and "--level 0" in gtp_name
    assert players[gtp_name].settings["engine_version"].startswith("3.8")
    assert {g.first for g in games} == {"v1@8", gtp_name}  # each moved first once
    for g in games:
        assert g.ended_by in ("rules", "resign", "move_cap") and g.moves > 0
    table = ladder(go_run)
    assert {r["player"] for r in table["players"]} == {"v1@8", gtp_name}
    assert table["anchor"] == "v1@8"


def test_opponent_gtp_that_does_not_start(go_run: Path, capsys: pytest.CaptureFixture) -> None:
    code = main(["match", str(go_run), "1", "--opponent-gtp", "/nonexistent/engine --mode gtp", "--games", "2"])
    assert code == 2
    assert "cannot be started" in capsys.readouterr().err


def test_evaluation_role_with_gnugo_as_anchor(tmp_path: Path) -> None:
    from selfplay.config import config_from_dict, load_config
    from selfplay.roles.evaluation import EvaluationRole

    run = make_run(tmp_path / "run", "go", {"size": 5, "komi": 7.5}, snapshots=3, simulations=4).root
    data = load_config(run / "run.toml").model_dump(mode="json")
    data["evaluation"].update(enabled=True, every_versions=2, games=2, opponents=1,
                              anchor=f"gtp:{GNUGO} {GNUGO_RULES} --level 0")
    role = EvaluationRole(run, config_from_dict(data))
    line = role.step()
    assert line is not None and line["snapshot_version"] == 3
    assert line["opponents"][0] == "v1@4" and line["opponents"][1].startswith("gtp:GNU Go 3.8")
    assert line["games"] == 4
    rows = {r["player"]: r for r in ladder(run)["players"]}
    assert line["opponents"][1] in rows and rows["v3@4"]["elo"] == line["elo"]


def test_engine_final_score_counts_each_game_in_a_fresh_engine() -> None:
    """engine_final_score after a match against GNU Go 3.8: each game's count is the one a GNU Go
    told those moves one by one gives, and it does not leak from one game into the next (a
    reused GNU Go answers final_score from a cache that survives clear_board: on the empty board
    it repeated the previous game's score)."""
    import re

    from selfplay.evaluation import RandomPlayer, play_match
    from selfplay.gtp.client import GtpPlayer, engine_final_score

    game = GoGame(size=5, komi=7.5)
    command = f"{GNUGO} {GNUGO_RULES} --level 0"
    with GtpClient(command, timeout=60) as client:
        res = play_match(game, RandomPlayer(), GtpPlayer(client, game), 2, seed=3)
    passes = [game.pass_action, game.pass_action]
    empty = engine_final_score(command, game, passes)
    texts = [engine_final_score(command, game, o.actions) for o in res.outcomes]
    assert engine_final_score(command, game, passes) == empty  # not the last game's score
    for outcome, text in zip(res.outcomes, texts):
        assert re.fullmatch(r"[BW]\+\d+(\.\d+)?|0", text), text
        if outcome.ended_by == "rules":
            # every stone on these random boards is alive or captured (GNU Go played them out)
            with GtpClient(command, timeout=60) as fresh:
                fresh.send("boardsize 5")
                fresh.send("komi 7.5")
                for k, a in enumerate(outcome.actions):
                    fresh.send(f"play {colour_text(k % 2)} {game.action_to_text(a)}")
                assert fresh.send("final_score") == text
                if fresh.send("final_status_list dead").strip() == "":
                    assert text == game.result_text(game.play_sequence(outcome.actions))
