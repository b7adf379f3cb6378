"""The HTML page, ``build_report`` and the ``report`` subcommand."""

from __future__ import annotations

import html
import os
import time

from ..errors import StateError, StreamgroupError
from ..keys import STATUSES
from ..settings import redact_url
from .data import RunData, per_item_limit, read_run
from .plots import plot_answers, plot_progress, plot_sources, plot_spend

_CSS = """body{font-family:system-ui,sans-serif;margin:2em auto;max-width:1000px;color:#222}
h1{font-size:1.5em}table{border-collapse:collapse;margin:1em 0}
td,th{border:1px solid #ccc;padding:.3em .8em;text-align:right}th{background:#f3f3f3}
td:first-child,th:first-child{text-align:left}figure{margin:1.5em 0}
img{max-width:100%;border:1px solid #eee}.note{color:#555;font-size:.9em}"""


def render_html(data: RunData, source: str) -> str:
    """The whole page as one string; every image is inline."""
    try:
        import matplotlib
    except ImportError:
        raise StreamgroupError("the report needs matplotlib: "
                               "pip install 'streamgroup[report]'") from None
    matplotlib.use("Agg", force=True)  # no display, no GUI toolkit, in any thread
    limit = per_item_limit(data)
    counts = {s: int((data.status == s).sum()) for s in STATUSES}
    n = len(data.status)
    last = {k: v[-1] for k, v in data.history.items()} if data.history else {}
    rows = [("items", n), *((f"· {s}", counts[s]) for s in STATUSES),
            ("pinned items", data.pinned), ("revisions", data.revisions),
            ("spend (last sample)", int(last["spend"]) if last else "–"),
            ("questions outstanding (last sample)", int(last["outstanding"]) if last else "–"),
            (f"per-item limit E[N] (learned δ, α = {data.alpha:g})",
             f"{limit:.2f}" if limit is not None else "–"),
            ("spend per item (last sample)",
             f"{last['spend'] / n:.2f}" if last and n else "–"),
            ("mean answers counted per item (an answer counts for both its items)",
             f"{data.answers.mean():.2f}" if n else "–")]
    if last and limit is not None and (last["placed"] + last["unresolved"]) > 0:
        ratio = last["spend"] / (limit * max(n, 1))
        rows.append(("spend / (limit × items)", f"{ratio:.3f}"))
    table = "".join(f"<tr><td>{html.escape(str(k))}</td><td>{html.escape(str(v))}</td></tr>"
                    for k, v in rows)
    figs = [("progress", "Placed and pending over time", plot_progress(data)),
            ("spend", "Spend against the per-item limit", plot_spend(data, limit)),
            ("answers", "Answers per item", plot_answers(data, limit)),
            ("sources", "Learned reliability per source", plot_sources(data))]
    body = "".join(
        f'<figure id="{fid}"><img alt="{html.escape(alt)}" '
        f'src="data:image/png;base64,{b64}"></figure>' for fid, alt, b64 in figs)
    when = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
    return (f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>streamgroup report: {html.escape(data.ns)}</title><style>{_CSS}</style>"
            f"</head><body><h1>streamgroup run report: namespace "
            f"<code>{html.escape(data.ns)}</code></h1>"
            f"<p class=\"note\">Read from {html.escape(source)} at {when}. The per-item "
            f"limit is the expected answers per item of the sequential test that knows "
            f"every source's learned δ and has a perfect reference.</p>"
            f"<table><tr><th>summary</th><th></th></tr>{table}</table>{body}</body></html>")


def build_report(url: str, ns: str, out_dir: str, alpha: float | None = None,
                 default_alpha: float = 1e-3) -> str:
    """Read the run in ``ns`` from Redis at ``url`` and write ``out_dir/report.html``."""
    import redis

    client = redis.Redis.from_url(url, socket_timeout=30, socket_connect_timeout=10)
    try:
        data = read_run(client, ns, alpha, default_alpha)
    except redis.RedisError as exc:
        raise StreamgroupError(f"cannot read {redact_url(url)}: {exc}") from None
    finally:
        client.close()
    if not len(data.status) and not data.history:
        raise StateError(f"namespace {ns!r} at {redact_url(url)} holds no run to report on")
    os.makedirs(out_dir, exist_ok=True)
    path = os.path.join(out_dir, "report.html")
    tmp = path + ".tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write(render_html(data, redact_url(url)))
    os.replace(tmp, path)  # a reader never sees half a page
    return path
