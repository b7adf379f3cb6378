"""The command line: help with examples, push/lookup/export/status happy paths, user errors.

A user mistake must give exactly one line on stderr and exit code 2, never a traceback.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import msgpack
import pytest
import redis

from streamgroup.cli import SUBCOMMANDS, build_parser, main
from streamgroup.keys import Keys
from tests.redisproc import free_port

K = Keys("t")


@pytest.fixture(autouse=True)
def _isolated_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """No STREAMGROUP_* from the caller's shell; the default URL points at a dead port."""
    for name in list(os.environ):
        if name.startswith("STREAMGROUP_"):
            monkeypatch.delenv(name)
    monkeypatch.setenv("STREAMGROUP_REDIS", f"redis://127.0.0.1:{free_port()}/0")


def sg(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, f"expected one line, got: {err!r}"
    assert "Traceback" not in err
    return lines[0]


def command_names() -> list[str]:
    import importlib

    return [importlib.import_module(m).NAME for m in SUBCOMMANDS]


@pytest.mark.parametrize("name", command_names())
def test_every_command_has_help_with_an_example(name: str, capsys) -> None:
    """`streamgroup CMD --help` exits 0 and shows at least one example line."""
    with pytest.raises(SystemExit) as exc:
        main([name, "--help"])
    out = capsys.readouterr().out
    assert exc.value.code == 0
    assert "example:" in out and f"streamgroup {name}" in out.split("example:")[1]


def test_top_level_help_and_no_command(capsys) -> None:
    """Bare `streamgroup` prints the help and exits 2; every subcommand is listed."""
    code, _out, err = sg(capsys)
    assert code == 2
    for name in command_names():
        assert name in err
    assert build_parser().prog == "streamgroup"


@pytest.mark.parametrize("argv, needle", [
    (["frobnicate"], "invalid choice"),
    (["lookup"], "required"),
    (["push", "things", "-"], "invalid choice"),
    (["export", "--format", "xml"], "invalid choice"),
    (["run", "--alpha", "0.9"], "alpha"),
    (["run", "--batch", "many"], "expected int"),
    (["lookup", "k", "--redis", "http://127.0.0.1:1"], "redis"),
    (["lookup", "k", "--ns", "bad ns"], "ns"),
    (["lookup", "bad\tkey"], "control character"),
    (["lookup", "k" * 300], "limit 256"),
    (["export", "--status", "lost"], "invalid choice"),
    (["push", "answers", "-", "--format", "xml"], "invalid choice"),
    (["demo", "--items", "3"], "--items"),
    (["demo", "--alpha", "0.7"], "--alpha"),
    (["demo", "--inflight", "0"], "--inflight"),
    (["demo", "--embedded", "docker"], "invalid choice"),
    (["status", "--config", "/nonexistent/sg.toml"], "not found"),
])
def test_usage_mistakes_are_one_line_exit_2(argv: list[str], needle: str, capsys) -> None:
    """Bad flags, settings and URLs: one clear line on stderr, exit code 2."""
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse's own errors
        code = exc.code
    line = one_line_error(capsys.readouterr().err)
    assert code == 2
    assert needle in line


@pytest.mark.parametrize("argv", [["lookup", "k"], ["status"], ["export"],
                                  ["run", "--metrics-addr", ""]])
def test_unreachable_redis_is_one_line_exit_2(argv: list[str], capsys) -> None:
    """With nothing listening at the URL, commands say so in one line and exit 2."""
    code, _out, err = sg(capsys, *argv)
    assert code == 2
    assert "cannot reach Redis" in one_line_error(err)


def test_password_in_url_never_printed(capsys) -> None:
    """An error about a URL with a password shows it masked."""
    url = f"redis://:hunter2pw@127.0.0.1:{free_port()}/0"
    code, _out, err = sg(capsys, "lookup", "k", "--redis", url)
    assert code == 2 and "hunter2pw" not in err


def test_console_script_reports_user_error_without_traceback() -> None:
    """The installed entry point (python -m streamgroup) exits 2 with one line, no traceback."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("STREAMGROUP_")}
    proc = subprocess.run(
        [sys.executable, "-m", "streamgroup", "status", "--redis",
         f"redis://127.0.0.1:{free_port()}/0"], capture_output=True, text=True, env=env,
        timeout=60)
    assert proc.returncode == 2
    assert len(proc.stderr.strip().splitlines()) == 1 and "Traceback" not in proc.stderr


# -- push -------------------------------------------------------------------------------

def _write(tmp_path: Path, name: str, text: str) -> str:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return str(p)


def test_push_items_csv_and_answers_jsonl(redis_url: str, tmp_path: Path, capsys) -> None:
    """CSV items (side optional) and JSONL answers land as contract entries."""
    items = _write(tmp_path, "items.csv", "key,side\nshard-1,north\nshard-2,\n\nshard-3,\n")
    answers = _write(tmp_path, "answers.jsonl",
                     '{"a": "shard-1", "b": "shard-2", "same": true, "source": "s1"}\n\n'
                     '{"a": "shard-2", "b": "shard-3", "same": 0, "aid": "x-9"}\n')
    code, _, err = sg(capsys, "push", "items", items, "--redis", redis_url, "--ns", "t")
    assert code == 0 and "pushed 3 items" in err
    code, _, err = sg(capsys, "push", "answers", answers, "--redis", redis_url, "--ns", "t")
    assert code == 0 and "pushed 2 answers" in err
    r = redis.Redis.from_url(redis_url)
    assert [f for _, f in r.xrange(K.items)] == [
        {b"key": b"shard-1", b"side": b"north"}, {b"key": b"shard-2"}, {b"key": b"shard-3"}]
    assert [f for _, f in r.xrange(K.answers)] == [
        {b"a": b"shard-1", b"b": b"shard-2", b"same": b"1", b"source": b"s1"},
        {b"a": b"shard-2", b"b": b"shard-3", b"same": b"0", b"aid": b"x-9"}]


def test_push_answers_packed_from_stdin(redis_url: str, monkeypatch, capsys) -> None:
    """`push answers - --packed` reads CSV from stdin and writes one packed entry."""
    import io

    text = "a,b,same,source\n" + "".join(f"k{i},k{i + 1},{i % 2},src-{i % 3}\n"
                                          for i in range(200))
    monkeypatch.setattr(sys, "stdin", io.TextIOWrapper(io.BytesIO(text.encode())))
    code, _, _ = sg(capsys, "push", "answers", "-", "--packed", "--redis", redis_url,
                    "--ns", "t")
    assert code == 0
    entries = redis.Redis.from_url(redis_url).xrange(K.answers)
    assert len(entries) == 1
    pack = msgpack.unpackb(entries[0][1][b"pack"], raw=False)
    assert len(pack) == 200 and pack[1] == {"a": "k1", "b": "k2", "same": True,
                                            "source": "src-1"}


@pytest.mark.parametrize("what, name, text, needle", [
    ("items", "i.csv", "name\nshard-1\n", "header must name"),
    ("items", "i.csv", "key\nshard-1\nbad\x01key\n", "line 3: item key"),
    ("items", "i.csv", "key,side\nshard-1,north,extra\n", "line 2: 3 fields"),
    ("items", "i.csv", "key\n" + "k" * 300 + "\n", "line 2"),
    ("items", "i.csv", "", "no items found"),
    ("answers", "a.csv", "a,b,same\nx,y,1\nx,x,1\n", "line 3: an answer needs two"),
    ("answers", "a.csv", "a,b,same\nx,y,perhaps\n", "line 2: same must be"),
    ("answers", "a.csv", "a,b\nx,y\n", "header must name"),
    ("answers", "a.jsonl", '{"a": "x", "b": "y", "same": 1}\n{"a": "x", "b"\n', "line 2: not JSON"),
    ("answers", "a.jsonl", '[1, 2, 3]\n', "line 1: expected a JSON object"),
    ("answers", "a.jsonl", '{"a": "x", "b": "y", "same": 1, "weight": 3}\n', "unknown answer"),
    ("answers", "a.jsonl", '{"a": "x", "same": 1}\n', "needs field 'b'"),
])
def test_malformed_file_pushes_nothing(redis_url: str, tmp_path: Path, capsys, what: str,
                                       name: str, text: str, needle: str) -> None:
    """A malformed file: one line naming the problem (and line), exit 2, nothing written."""
    path = _write(tmp_path, name, text)
    code, _, err = sg(capsys, "push", what, path, "--redis", redis_url, "--ns", "t")
    assert code == 2
    assert needle in one_line_error(err)
    assert redis.Redis.from_url(redis_url).dbsize() == 0


def test_push_missing_or_binary_file(redis_url: str, tmp_path: Path, capsys) -> None:
    """A missing file or one that is not UTF-8 is a one-line error, exit 2."""
    code, _, err = sg(capsys, "push", "items", str(tmp_path / "none.csv"), "--redis", redis_url)
    assert code == 2 and "No such file" in one_line_error(err)
    bad = tmp_path / "bin.csv"
    bad.write_bytes(b"key\n\xff\xfe\n")
    code, _, err = sg(capsys, "push", "items", str(bad), "--redis", redis_url)
    assert code == 2 and "not UTF-8" in one_line_error(err)


# -- lookup, export, status --------------------------------------------------------------

def _seed_assign(url: str) -> None:
    r = redis.Redis.from_url(url)
    recs = {
        "shard-1": {"side": "0", "status": "placed", "llr": 7.1, "answers": 8, "rev": 0,
                    "pinned": False},
        "shard-2": {"side": "1", "status": "placed", "llr": 6.9, "answers": 11, "rev": 1,
                    "pinned": False},
        "shard-3": {"side": None, "status": "unresolved", "llr": 0.4, "answers": 200,
                    "rev": 0, "pinned": False},
    }
    r.hset(K.assign, mapping={k: msgpack.packb(v) for k, v in recs.items()})


def test_lookup_prints_json_lines(redis_url: str, capsys) -> None:
    """One JSON line per key, in order; unknown keys say found=false."""
    _seed_assign(redis_url)
    code, out, _ = sg(capsys, "lookup", "shard-2", "shard-9", "--redis", redis_url, "--ns", "t")
    assert code == 0
    lines = [json.loads(x) for x in out.splitlines()]
    assert lines == [{"key": "shard-2", "found": True, "side": "1", "status": "placed",
                      "llr": 6.9, "answers": 11, "rev": 1, "pinned": False},
                     {"key": "shard-9", "found": False}]


def test_export_jsonl_csv_and_status_filter(redis_url: str, tmp_path: Path, capsys) -> None:
    """export writes every record as JSONL or CSV; --status filters; --out is written whole."""
    _seed_assign(redis_url)
    code, out, _ = sg(capsys, "export", "--redis", redis_url, "--ns", "t")
    assert code == 0
    assert sorted(json.loads(x)["key"] for x in out.splitlines()) == [
        "shard-1", "shard-2", "shard-3"]
    dest = tmp_path / "a.csv"
    code, _, _ = sg(capsys, "export", "--format", "csv", "--out", str(dest), "--status",
                    "unresolved", "--redis", redis_url, "--ns", "t")
    assert code == 0
    assert dest.read_text().splitlines() == ["key,side,status,llr,answers,rev,pinned",
                                             "shard-3,,unresolved,0.4,200,0,False"]
    assert [p.name for p in tmp_path.iterdir()] == ["a.csv"]  # no temporary file left


def test_export_to_missing_directory_is_user_error(redis_url: str, tmp_path: Path,
                                                   capsys) -> None:
    """--out into a directory that does not exist: one line, exit 2."""
    code, _, err = sg(capsys, "export", "--out", str(tmp_path / "no" / "x.jsonl"),
                      "--redis", redis_url)
    assert code == 2 and "No such file" in one_line_error(err)


def test_status_reads_meta_noise_and_groups(redis_url: str, capsys) -> None:
    """status shows counts, spend, outstanding, group lag and the learned noise, read-only."""
    _seed_assign(redis_url)
    r = redis.Redis.from_url(redis_url)
    r.hset(K.meta, mapping={"spend": 219, "outstanding": 4})
    r.hset(K.noise, mapping={"bench-a": msgpack.packb({"delta": 0.61, "se": 0.02,
                                                       "answers": 150}),
                             "clicker": msgpack.packb({"delta": 0.01, "se": 0.05,
                                                       "answers": 69})})
    r.xadd(K.answers, {"a": "x", "b": "y", "same": "1"})
    r.xgroup_create(K.answers, "streamgroup", id="0")
    before = {k: r.type(k) for k in r.keys("*")}
    code, out, _ = sg(capsys, "status", "--redis", redis_url, "--ns", "t")
    assert code == 0
    assert "placed 2" in out and "unresolved 1" in out and "spend: 219" in out
    assert "outstanding: 4" in out and "lag 1" in out
    assert out.index("bench-a") < out.index("clicker") and "+0.61" in out
    code, out, _ = sg(capsys, "status", "--json", "--redis", redis_url, "--ns", "t")
    st = json.loads(out)
    assert st["items"]["placed"] == 2 and st["spend"] == 219
    assert {k: r.type(k) for k in r.keys("*")} == before  # status wrote nothing


def test_status_reads_the_workers_progress_sample(redis_url: str, capsys) -> None:
    """Without per-status counters in meta, status shows the latest {NS}:history sample."""
    r = redis.Redis.from_url(redis_url)
    r.xadd(K.history, {"ts": 1, "placed": 5, "asking": 2, "waiting": 1, "unresolved": 0,
                       "spend": 40, "outstanding": 3})
    r.xadd(K.history, {"ts": 2, "placed": 7, "asking": 1, "waiting": 0, "unresolved": 1,
                       "spend": 52, "outstanding": 1})
    code, out, _ = sg(capsys, "status", "--json", "--redis", redis_url, "--ns", "t")
    st = json.loads(out)
    assert code == 0
    assert st["items"] == {"waiting": 0, "asking": 1, "placed": 7, "unresolved": 1}
    assert (st["spend"], st["questions_outstanding"], st["as_of_ms"]) == (52, 1, 2)


def test_push_with_aid_prefix_is_safe_to_repeat(redis_url: str, tmp_path: Path,
                                                capsys) -> None:
    """--aid-prefix gives each answer a stable aid P:LINE (a given aid is kept)."""
    path = _write(tmp_path, "a.csv", "a,b,same,aid\nx,y,1,\nx,z,0,mine\n")
    code, _, _ = sg(capsys, "push", "answers", path, "--aid-prefix", "b17", "--redis",
                    redis_url, "--ns", "t")
    assert code == 0
    entries = [f for _, f in redis.Redis.from_url(redis_url).xrange(K.answers)]
    assert [e[b"aid"] for e in entries] == [b"b17:2", b"mine"]
    code, _, err = sg(capsys, "push", "items", path, "--aid-prefix", "p", "--redis", redis_url)
    assert code == 2 and "answers only" in one_line_error(err)


def test_a_server_that_is_not_redis_is_a_user_error(capsys) -> None:
    """A URL pointing at something else (here an HTTP-ish listener): one line, exit 2."""
    import socket
    import threading

    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen()

    def serve() -> None:
        conn, _ = srv.accept()
        conn.recv(1024)
        conn.sendall(b"HTTP/1.1 400 Bad Request\r\n\r\n")
        conn.close()

    t = threading.Thread(target=serve, daemon=True)
    t.start()
    code, _, err = sg(capsys, "lookup", "k", "--redis",
                      f"redis://127.0.0.1:{srv.getsockname()[1]}/0")
    srv.close()
    assert code == 2 and "Redis protocol" in one_line_error(err)
