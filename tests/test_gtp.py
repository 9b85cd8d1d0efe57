"""The GTP v2 engine (`selfplay gtp`) and client, against the protocol's specification.

Source: GTP version 2, draft 2 (G. Farnebäck, https://www.lysator.liu.se/~gunnar/gtp/
gtp2-spec-draft2/gtp2-spec.html): section 2.2 (preprocessing: control characters, comments,
empty lines), 2.6 (replies: '=' or '?', the id, text, an empty line), 2.11 (vertices: letters
without I, rows from the bottom), 6.1 (the required commands), and the standard error messages
"unknown command", "illegal move", "syntax error", "unacceptable size", "cannot undo".
"""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from selfplay.games.go import GoGame
from selfplay.gtp.client import GtpClient, GtpCommandError, GtpError
from selfplay.gtp.engine import COMMANDS, MAX_LINE_BYTES, GtpEngine
from selfplay.gtp.vertex import parse_vertex, vertex_text
from strength_support import cli_argv, cli_env, make_run


def _engine(size: int = 5, komi: float = 7.5) -> GtpEngine:
    def first_legal(game: GoGame, state: object) -> int:
        return int(np.flatnonzero(game.legal_mask(state))[0])

    return GtpEngine(lambda k: GoGame(size=size, komi=k), first_legal, komi=komi)


def test_vertices_skip_the_letter_i() -> None:
    # GTP 2.11: "A1" is the lower left corner; the letter I is not used
    assert parse_vertex("A1", 9) == 8 * 9
    assert parse_vertex("J9", 9) == 8 and vertex_text(8, 9) == "J9"
    assert parse_vertex("j9", 9) == 8  # vertices are case-insensitive
    assert parse_vertex("I5", 9) is None
    assert parse_vertex("K1", 9) is None  # the tenth column does not exist on 9x9
    assert parse_vertex("A10", 9) is None
    assert parse_vertex("PASS", 9) == 81 and vertex_text(81, 9) == "pass"
    for a in range(82):
        assert parse_vertex(vertex_text(a, 9), 9) == a


def test_required_commands_and_reply_format() -> None:
    e = _engine()
    assert e.handle("protocol_version") == "= 2\n\n"
    assert e.handle("1 name") == "=1 plyfoundry\n\n"  # the id is repeated (2.6)
    assert e.handle("known_command genmove") == "= true\n\n"
    assert e.handle("known_command frobnicate") == "= false\n\n"
    listed = e.handle("list_commands")[2:].strip().split("\n")
    for required in ("protocol_version", "name", "version", "known_command", "list_commands", "quit",
                     "boardsize", "clear_board", "komi", "play", "genmove"):  # GTP 6.1
        assert required in listed
    assert set(listed) == set(COMMANDS)
    assert e.handle("frobnicate") == "? unknown command\n\n"
    assert e.handle("7 frobnicate") == "?7 unknown command\n\n"


def test_preprocessing_of_input_lines() -> None:
    e = _engine()
    assert e.handle("") is None
    assert e.handle("   # only a comment") is None
    assert e.handle("\tname\x01 # comment") == "= plyfoundry\n\n"  # tab -> space, control dropped


def test_play_undo_and_errors() -> None:
    e = _engine(size=5)
    assert e.handle("boardsize 9") == "? unacceptable size\n\n"
    assert e.handle("boardsize 5") == "=\n\n"
    assert e.handle("play b C3") == "=\n\n"
    assert e.handle("play w C3") == "? illegal move\n\n"  # occupied
    assert e.handle("play w Z3") == "? syntax error\n\n"  # not a vertex of this board
    assert e.handle("play purple C2") == "? syntax error\n\n"
    assert e.handle("play b C2") == "? illegal move\n\n"  # white is to move
    assert e.handle("play w pass") == "=\n\n"
    assert e.handle("undo") == "=\n\n"
    assert e.handle("undo") == "=\n\n"
    assert e.handle("undo") == "? cannot undo\n\n"
    shown = e.handle("showboard")
    assert shown.startswith("= \n") and " 5 . . . . ." in shown


def test_suicide_is_an_illegal_move_under_the_default_rules() -> None:
    e = _engine(size=5)
    for mv in ("b B5", "w E1", "b A4", "w E2"):
        assert e.handle(f"play {mv}") == "=\n\n"
    assert e.handle("play w A5") == "? illegal move\n\n"  # black is to move here
    assert e.handle("play b E5") == "=\n\n"
    assert e.handle("play w A5") == "? illegal move\n\n"  # A5 would have no liberty: suicide


def test_final_score_is_tromp_taylor_with_komi() -> None:
    e = _engine(size=5, komi=0.5)
    assert e.handle("play b C3") == "=\n\n"
    # one black stone: Black's area is the whole board (25), White 0, komi 0.5
    assert e.handle("final_score") == "= B+24.5\n\n"
    assert e.handle("komi 30") == "=\n\n"
    assert e.handle("final_score") == "= W+5\n\n"
    assert e.handle("komi lots") == "? syntax error\n\n"


def test_genmove_passes_to_end_a_won_game_and_after_the_end() -> None:
    e = _engine(size=5, komi=0.5)
    e.handle("play b C3")
    e.handle("play w pass")
    assert e.handle("genmove b") == "= pass\n\n"  # Black leads by 24.5: passing wins
    assert e.handle("genmove w") == "= pass\n\n"  # the game is over
    assert e.handle("play w C2") == "? illegal move\n\n"


def test_an_overlong_line_is_refused_without_being_kept(tmp_path: Path) -> None:
    import io

    e = _engine()
    data = b"name" + b"x" * (10 * MAX_LINE_BYTES) + b"\nname\nquit\n"
    out = io.BytesIO()
    e.serve(io.BytesIO(data), out)
    assert out.getvalue().decode() == "? command too long\n\n= plyfoundry\n\n=\n\n"


@pytest.fixture(scope="module")
def go_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_run(tmp_path_factory.mktemp("gorun") / "run", "go", {"size": 5, "komi": 7.5}, snapshots=2).root


def test_selfplay_gtp_session_over_a_pipe(go_run: Path) -> None:
    """The whole command over stdin/stdout, driven by the project's client."""
    with GtpClient(cli_argv("gtp", str(go_run), "--simulations", "8"), timeout=120,
                   env=cli_env()) as c:
        assert c.send("protocol_version") == "2"
        assert c.send("name") == "plyfoundry"
        assert "v2@8" in c.send("version")
        c.send("boardsize 5")
        c.send("clear_board")
        c.send("komi 6.5")
        c.send("play b C3")
        move = c.send("genmove w")
        assert parse_vertex(move, 5) is not None and move.upper() != "C3"
        with pytest.raises(GtpCommandError, match="unknown command"):
            c.send("frobnicate")
        with pytest.raises(GtpCommandError, match="illegal move"):
            c.send("play w C3")
        c.send("undo")
        assert c.send("final_score") == "B+18.5"  # one black stone owns 25 points; komi 6.5


def test_selfplay_gtp_refuses_a_game_that_is_not_go(tmp_path: Path) -> None:
    run = make_run(tmp_path / "c4", "fourinrow", {}, snapshots=1)
    out = subprocess.run(cli_argv("gtp", str(run.root)), env=cli_env(), capture_output=True, text=True,
                         input="name\n", timeout=120)
    assert out.returncode == 2
    assert "GTP speaks Go" in out.stderr and "fourinrow" in out.stderr


# ---- the client against peers that break the protocol -------------------------------------------

def _peer(tmp_path: Path, body: str) -> list[str]:
    script = tmp_path / "peer.py"
    script.write_text(textwrap.dedent(body))
    return [sys.executable, str(script)]


def test_client_refuses_a_command_that_does_not_start(tmp_path: Path) -> None:
    with pytest.raises(GtpError, match="cannot be started"):
        GtpClient([str(tmp_path / "no-such-engine")])
    with pytest.raises(GtpError, match="empty"):
        GtpClient("")


def test_client_times_out_on_a_silent_peer(tmp_path: Path) -> None:
    argv = _peer(tmp_path, """
        import sys, time
        sys.stdin.readline()
        time.sleep(60)
    """)
    c = GtpClient(argv, timeout=1.0)
    with pytest.raises(GtpError, match="did not answer 'name' within 1 s"):
        c.send("name")
    assert c.proc.poll() is not None  # the peer was stopped


def test_client_bounds_a_huge_reply(tmp_path: Path) -> None:
    # a peer that streams a reply without end (1 GB would arrive the same way): stopped at the cap
    argv = _peer(tmp_path, """
        import sys
        sys.stdin.readline()
        chunk = b"=" + b"x" * (1 << 16)
        while True:
            sys.stdout.buffer.write(chunk)
            sys.stdout.buffer.flush()
    """)
    c = GtpClient(argv, timeout=30.0, max_reply_bytes=1 << 20)
    with pytest.raises(GtpError, match="more than 1048576 bytes"):
        c.send("name")
    assert c.proc.poll() is not None


def test_client_refuses_nonsense_and_reports_an_exit(tmp_path: Path) -> None:
    argv = _peer(tmp_path, """
        import sys
        sys.stdin.readline()
        sys.stdout.write("hello there\\n\\n")
        sys.stdout.flush()
    """)
    c = GtpClient(argv, timeout=10)
    with pytest.raises(GtpError, match="not a GTP reply"):
        c.send("name")
    argv = _peer(tmp_path, """
        import sys
        sys.stderr.write("engine: cannot load its book\\n")
        sys.exit(3)
    """)
    c = GtpClient(argv, timeout=10)
    with pytest.raises(GtpError, match="exit status 3|stopped before") as err:
        c.send("name")
    assert "cannot load its book" in str(err.value)


def test_client_reads_crlf_replies_with_ids_and_leading_blank_lines(tmp_path: Path) -> None:
    # GTP v2 2.2/2.6: CR is ignored; the reply may carry an id; empty lines before a reply are skipped
    argv = _peer(tmp_path, """
        import sys
        for line in sys.stdin:
            word = line.split()[0]
            if word == "name":
                sys.stdout.write("\\r\\n=12 Dripper\\r\\n\\r\\n")
            elif word == "list_commands":
                sys.stdout.write("= name\\nlist_commands\\nquit\\n\\n")
            else:
                sys.stdout.write("=\\n\\n")
                sys.stdout.flush()
                break
            sys.stdout.flush()
    """)
    with GtpClient(argv, timeout=10) as c:
        assert c.send("name") == "Dripper"
        assert c.send("list_commands").split("\n") == ["name", "list_commands", "quit"]


_SCRIPTED_ENGINE = """
    import sys
    GENMOVE = {genmove!r}
    for line in sys.stdin:
        words = line.split()
        if not words:
            continue
        if words[0] == "name":
            reply = "scripted"
        elif words[0] == "version":
            reply = "1"
        elif words[0] == "genmove":
            reply = GENMOVE
        else:
            reply = ""
        sys.stdout.write("= " + reply + "\\n\\n")
        sys.stdout.flush()
        if words[0] == "quit":
            break
"""


def test_a_gtp_opponent_that_resigns_loses_every_game(tmp_path: Path, go_run: Path) -> None:
    from selfplay.evaluation import play_match
    from selfplay.gtp.client import GtpPlayer
    from selfplay.strength import RunPlayers

    players = RunPlayers(go_run)
    snap = players.player(1, 4)
    with GtpClient(_peer(tmp_path, _SCRIPTED_ENGINE.format(genmove="resign")), timeout=10) as c:
        opp = GtpPlayer(c, players.game)
        assert opp.name.startswith("gtp:scripted 1 [")
        res = play_match(players.game, snap.player, opp, 4, seed=1, opening_plies=2)
    assert (res.wins, res.losses) == (4, 0)
    assert {o.ended_by for o in res.outcomes} == {"resign"}


def test_an_illegal_move_from_a_gtp_opponent_is_named(tmp_path: Path, go_run: Path) -> None:
    from selfplay.errors import IllegalMoveError
    from selfplay.evaluation import play_match
    from selfplay.gtp.client import GtpPlayer
    from selfplay.strength import RunPlayers

    players = RunPlayers(go_run)
    snap = players.player(1, 4)
    # C3 again and again: occupied from its second time on
    with GtpClient(_peer(tmp_path, _SCRIPTED_ENGINE.format(genmove="C3")), timeout=10) as c:
        with pytest.raises(IllegalMoveError, match="gtp:scripted .* chose the illegal move C3"):
            play_match(players.game, snap.player, GtpPlayer(c, players.game), 2, seed=1)
    with GtpClient(_peer(tmp_path, _SCRIPTED_ENGINE.format(genmove="banana")), timeout=10) as c:
        with pytest.raises(GtpError, match="not a vertex"):
            play_match(players.game, snap.player, GtpPlayer(c, players.game), 2, seed=1)


def test_selfplay_gtp_names_a_missing_snapshot(go_run: Path, capsys: pytest.CaptureFixture) -> None:
    from selfplay.cli import main

    assert main(["gtp", str(go_run), "--snapshot", "99"]) == 2
    assert "snapshot 99 does not exist" in capsys.readouterr().err
