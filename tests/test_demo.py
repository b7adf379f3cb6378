"""The demo end to end at small size, so that the README's first command cannot rot."""

from __future__ import annotations

import io
import os
import subprocess
import sys
from pathlib import Path

import pytest
import redis

from streamgroup.demo import DemoOptions, error_upper_bound, run_demo


def _script() -> list[str]:
    """The installed console script beside this interpreter, else ``python -m streamgroup``."""
    exe = Path(sys.executable).with_name("streamgroup")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "streamgroup"]


@pytest.mark.slow
def test_readme_demo_command_completes_with_a_summary(tmp_path: Path) -> None:
    """`streamgroup demo` (small) exits 0, its summary shows accuracy, spend and sources,
    and it leaves the HTML report behind."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("STREAMGROUP_")}
    proc = subprocess.run([*_script(), "demo", "--items", "150"], capture_output=True,
                          text=True, env=env, timeout=150, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-2000:]
    out = proc.stdout
    assert "accuracy against the hidden kilns:" in out
    assert "spend:" in out and "per-item limit" in out
    assert "most reliable:" in out and "least reliable:" in out
    assert "s] placed " in proc.stderr and "/150, asking" in proc.stderr  # progress lines
    assert "Traceback" not in proc.stderr
    assert (tmp_path / "demo-report" / "report.html").exists()
    assert "report: demo-report" in out


@pytest.mark.slow
def test_demo_on_fakeredis_places_everything_and_learns_the_sources(tmp_path: Path) -> None:
    """With the in-process server: every shard decided, accuracy high, the bad scanner found."""
    out, err = io.StringIO(), io.StringIO()
    s = run_demo(DemoOptions(items=120, embedded="fakeredis", latency_ms=(5, 40),
                             progress_every=0.5, report=str(tmp_path / "rep")), out, err)
    assert s.finished and s.placed + s.unresolved == 120
    assert s.accuracy is not None and s.accuracy >= 0.97
    assert s.spend >= 120 and s.limit_per_item > 1
    learned = {x["source"]: x["learned"] for x in s.sources}
    assert learned["xrf-scanner-old"] < -0.1 < 0.3 < learned["conservator-1"]
    assert "[" in err.getvalue() and "placed" in err.getvalue()
    assert (tmp_path / "rep" / "report.html").exists()
    assert "report:" in out.getvalue()


@pytest.mark.slow
def test_demo_on_your_own_redis_cleans_up(redis_url: str) -> None:
    """With --redis, the demo works in a fresh namespace and deletes it at the end; shards
    that hit a low answer ceiling are listed as unresolved, for a person."""
    r = redis.Redis.from_url(redis_url)
    r.set("someone-else", "kept")
    out = io.StringIO()
    s = run_demo(DemoOptions(items=60, redis_url=redis_url, quiet=True, latency_ms=(5, 40),
                             item_ceiling=6), out, io.StringIO())
    assert s.finished
    assert sorted(r.keys("*")) == [b"someone-else"]
    assert s.unresolved > 0 and len(s.unresolved_keys) == s.unresolved
    assert "    unresolved: " + s.unresolved_keys[0] in out.getvalue()


@pytest.mark.parametrize("wrong, n", [(0, 100), (3, 2000), (10, 1000), (1, 5), (50, 50)])
def test_error_upper_bound_matches_clopper_pearson(wrong: int, n: int) -> None:
    """The summary's bound equals the Clopper-Pearson upper limit (scipy.stats.beta.ppf)."""
    from scipy.stats import beta

    want = 1.0 if wrong == n else float(beta.ppf(0.975, wrong + 1, n - wrong))
    assert error_upper_bound(wrong, n) == pytest.approx(want, rel=1e-9)


@pytest.mark.slow
def test_interrupted_demo_cleans_up_its_private_redis() -> None:
    """SIGTERM mid-run: a partial summary, exit 130, and the private server is gone."""
    import re
    import signal

    env = {k: v for k, v in os.environ.items() if not k.startswith("STREAMGROUP_")}
    proc = subprocess.Popen([*_script(), "demo", "--items", "400", "--no-report"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env)
    try:
        header = proc.stderr.readline()  # the first line names the server, then progress
        url = re.search(r"redis://127\.0\.0\.1:\d+/0", header)
        assert url, header
        assert proc.stderr.readline().startswith("[")  # running: one progress line
        proc.send_signal(signal.SIGTERM)
        out, _ = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)
    assert proc.returncode == 130
    assert "demo summary" in out
    with pytest.raises(redis.ConnectionError):
        redis.Redis.from_url(url.group(0), socket_connect_timeout=1).ping()
