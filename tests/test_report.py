"""The run report: read from Redis, four embedded plots, no external assets."""

from __future__ import annotations

import base64
import io
import re
from pathlib import Path

import msgpack
import numpy as np
import pytest
import redis

from streamgroup.core.sprt import ruin_expected_length
from streamgroup.errors import StateError
from streamgroup.keys import Keys
from streamgroup.report import RunData, build_report, per_item_limit, read_run

pytestmark = pytest.mark.redis
NS = "rpt"
IMG = re.compile(r'<img alt="[^"]*" src="data:image/png;base64,([A-Za-z0-9+/=]+)">')


def fill_run(url: str, n: int = 300, samples: int = 60) -> dict:
    """Write a plausible finished run of shard items into NS, the way the worker lays it out."""
    rng = np.random.default_rng(3)
    k = Keys(NS)
    r = redis.Redis.from_url(url)
    status = rng.choice(["placed", "unresolved", "asking"], size=n, p=[0.9, 0.04, 0.06])
    answers = rng.poisson(9, size=n) + 3
    pipe = r.pipeline()
    for i in range(n):
        pipe.hset(k.assign, f"shard-{i:06d}", msgpack.packb({
            "side": str(i % 2) if status[i] == "placed" else None, "status": str(status[i]),
            "llr": 7.1, "answers": int(answers[i]), "rev": int(i % 50 == 0),
            "pinned": i < 4}))
    t0 = 1_700_000_000_000
    for j in range(samples):
        placed = int(n * j / samples)
        pipe.xadd(k.history, {"ts": t0 + 5000 * j, "placed": placed, "asking": 20,
                              "waiting": n - placed - 20, "unresolved": j // 10,
                              "spend": 11 * placed + 40, "outstanding": 20})
    for name, d, a in [("careful-1", 0.61, 900), ("careful-2", 0.58, 850),
                       ("clicker", 0.02, 300), ("contrary", -0.41, 150)]:
        pipe.hset(k.noise, name, msgpack.packb({"delta": d, "se": 0.03, "answers": a}))
    pipe.hset(k.meta, "alpha", "0.001")
    pipe.execute()
    r.close()
    return {"n": n, "revisions": int(sum(i % 50 == 0 for i in range(n)))}


def images(page: str) -> list[np.ndarray]:
    import matplotlib.image as mpimg

    return [mpimg.imread(io.BytesIO(base64.b64decode(b)), format="png")
            for b in IMG.findall(page)]


def test_report_holds_four_decodable_plots_and_no_external_assets(redis_url, tmp_path):
    """The page embeds the four plots as real PNGs and references nothing outside itself."""
    fill_run(redis_url)
    path = build_report(redis_url, NS, str(tmp_path / "out"))
    page = Path(path).read_text(encoding="utf-8")
    for fid in ("progress", "spend", "answers", "sources"):
        assert f'<figure id="{fid}">' in page
    pics = images(page)
    assert len(pics) == 4
    for pic in pics:
        assert pic.shape[0] > 200 and pic.shape[1] > 400
        assert pic[..., :3].std() > 0.05  # drawn, not a blank canvas
    assert not re.search(r'(src|href)="(?!data:)', page)
    assert "http://" not in page and "https://" not in page
    assert "<script" not in page


def test_report_reads_what_the_worker_wrote(redis_url):
    """read_run decodes statuses, answers, revisions, pins and sources from the contract keys."""
    info = fill_run(redis_url)
    r = redis.Redis.from_url(redis_url)
    data = read_run(r, NS)
    r.close()
    assert len(data.status) == info["n"] and data.answers.min() >= 3
    assert data.revisions == info["revisions"] and data.pinned == 4
    assert [s["source"] for s in data.sources] == ["careful-1", "careful-2", "clicker",
                                                   "contrary"]
    assert len(data.history["ts"]) == 60 and data.history["spend"][-1] > 0
    assert data.alpha == pytest.approx(1e-3)


def test_plots_change_with_the_data(redis_url, tmp_path):
    """An empty-history run draws placeholders; a real run draws different pictures."""
    fill_run(redis_url)
    full = images(Path(build_report(redis_url, NS, str(tmp_path / "a"))).read_text())
    r = redis.Redis.from_url(redis_url)
    r.delete(Keys(NS).history, Keys(NS).noise)
    r.close()
    page = Path(build_report(redis_url, NS, str(tmp_path / "b"))).read_text()
    sparse = images(page)
    assert len(sparse) == 4
    assert full[0].shape != sparse[0].shape or not np.allclose(full[0], sparse[0])
    assert full[3].shape != sparse[3].shape or not np.allclose(full[3], sparse[3])


def test_empty_namespace_is_a_clear_error(redis_url, tmp_path):
    """Reporting on a namespace with no run raises StateError naming it, writes nothing."""
    with pytest.raises(StateError, match="nothing|no run"):
        build_report(redis_url, "absent", str(tmp_path / "x"))
    assert not (tmp_path / "x").exists()


def test_limit_single_source_is_the_closed_form():
    """With one learned source the limit is the gambler's-ruin E[N] at its delta."""
    data = RunData(ns="x", alpha=1e-3,
                   sources=[{"source": "", "delta": 0.6, "se": 0.01, "answers": 100}])
    assert per_item_limit(data) == pytest.approx(ruin_expected_length(1e-3, 0.6))


def test_limit_of_a_mixed_crowd_counts_wrong_sources_flipped():
    """A reliably wrong source helps (flipped); a random clicker only dilutes the crowd."""
    careful = {"source": "a", "delta": 0.6, "se": 0.01, "answers": 700}
    both = RunData(ns="x", alpha=1e-3, sources=[careful, {"source": "b", "delta": -0.6,
                                                          "se": 0.01, "answers": 700}])
    diluted = RunData(ns="x", alpha=1e-3, sources=[careful, {"source": "c", "delta": 0.0,
                                                             "se": 0.01, "answers": 700}])
    one = ruin_expected_length(1e-3, 0.6)
    assert per_item_limit(both) == pytest.approx(one, rel=0.03)
    assert per_item_limit(diluted) == pytest.approx(2 * one, rel=0.05)
    assert per_item_limit(RunData(ns="x", alpha=1e-3)) is None


def test_cli_report_writes_the_page_and_fails_in_one_line(redis_url, tmp_path, capsys):
    """`streamgroup report --out DIR` prints the path; an empty namespace exits 2, one line."""
    from streamgroup.cli import main

    fill_run(redis_url)
    out = tmp_path / "r"
    assert main(["report", "--redis", redis_url, "--ns", NS, "--out", str(out)]) == 0
    assert capsys.readouterr().out.strip() == str(out / "report.html")
    assert len(images((out / "report.html").read_text())) == 4
    assert main(["report", "--redis", redis_url, "--ns", "empty", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no run to report on" in err


@pytest.mark.slow
def test_report_of_a_live_worker_run(redis_url, tmp_path):
    """A report of a real worker's run holds its items, progress samples and learned sources."""
    pytest.importorskip("streamgroup.stream.worker")
    from tests.liveworker import LiveWorker

    with LiveWorker(redis_url, ns="live") as live:
        live.client.push_items(live.crowd.keys)
        live.run_to_end()
        live.wait(lambda: live.client.redis.xlen(Keys("live").history) >= 3, 10, "history")
    r = redis.Redis.from_url(redis_url)
    data = read_run(r, "live")
    r.close()
    assert len(data.status) == live.crowd.n and set(data.status) <= {"placed", "unresolved"}
    assert len(data.history["ts"]) >= 3 and data.history["spend"][-1] > 0
    assert {s["source"] for s in data.sources} == set(live.crowd.source_names)
    best = max(data.sources, key=lambda s: s["delta"])
    assert best["delta"] > 0.5 and per_item_limit(data) is not None
    page = Path(build_report(redis_url, "live", str(tmp_path))).read_text()
    assert len(images(page)) == 4
