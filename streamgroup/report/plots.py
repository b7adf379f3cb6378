"""The report's four plots, each returned as a base64 PNG (matplotlib, Agg backend)."""

from __future__ import annotations

import base64
import io
import math
from typing import Any

import numpy as np

from ..keys import STATUSES
from .data import TOP_SOURCES, RunData


def _png(fig: Any) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _no_data(ax: Any, what: str) -> None:
    ax.text(0.5, 0.5, f"no {what} recorded yet", ha="center", va="center",
            transform=ax.transAxes, color="0.4")
    ax.set_xticks([])
    ax.set_yticks([])


def _elapsed(h: dict[str, np.ndarray]) -> tuple[np.ndarray, str]:
    t = h["ts"] - h["ts"][0]
    span = float(t[-1]) if len(t) else 0.0
    if span >= 2 * 3600:
        return t / 3600, "hours since the first sample"
    if span >= 120:
        return t / 60, "minutes since the first sample"
    return t, "seconds since the first sample"


def plot_progress(data: RunData) -> str:
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(9, 4))
    h = data.history
    if h:
        t, label = _elapsed(h)
        ax.plot(t, h["placed"], label="placed", color="tab:green", lw=2)
        ax.plot(t, h["asking"] + h["waiting"], label="pending (asking + waiting)",
                color="tab:orange", lw=2)
        ax.plot(t, h["unresolved"], label="unresolved", color="tab:red", lw=1.5)
        # Questions in flight can outnumber the items many times over during a burst:
        # their own axis keeps the item lines readable.
        ax2 = ax.twinx()
        ax2.plot(t, h["outstanding"], label="questions outstanding (right axis)",
                 color="tab:blue", lw=1, ls="--")
        ax2.set_ylabel("questions outstanding", color="tab:blue")
        ax2.set_ylim(bottom=0)
        ax.set_xlabel(label)
        ax.set_ylabel("items")
        ax.set_ylim(bottom=0)
        lines = ax.get_lines() + ax2.get_lines()
        ax.legend(lines, [ln.get_label() for ln in lines], loc="best", fontsize=9)
        ax.grid(alpha=0.3)
    else:
        _no_data(ax, "progress samples")
    ax.set_title("Items placed and pending over time")
    out = _png(fig)
    plt.close(fig)
    return out


def plot_spend(data: RunData, limit: float | None) -> str:
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(9, 4))
    h = data.history
    if h:
        t, label = _elapsed(h)
        ax.plot(t, h["spend"], label="spend (answers counted)", color="tab:purple", lw=2)
        if limit is not None:
            done = h["placed"] + h["unresolved"]
            ax.plot(t, limit * done, color="tab:gray", lw=1.5, ls=":",
                    label=f"limit for the items decided so far ({limit:.1f} per item)")
            n = len(data.status) or float(np.nanmax(done + h["asking"] + h["waiting"]))
            ax.axhline(limit * n, color="black", lw=1, ls="--",
                       label=f"limit for all {int(n)} items")
        ax.set_xlabel(label)
        ax.set_ylabel("answers")
        ax.set_ylim(bottom=0)
        ax.legend(loc="best", fontsize=9)
        ax.grid(alpha=0.3)
    else:
        _no_data(ax, "spend samples")
    ax.set_title("Spend against the per-item limit")
    out = _png(fig)
    plt.close(fig)
    return out


def plot_answers(data: RunData, limit: float | None) -> str:
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(9, 4))
    if len(data.answers):
        top = int(data.answers.max())
        bins = np.arange(0, top + 2) - 0.5 if top <= 80 else 60
        groups = [(s, data.answers[data.status == s]) for s in STATUSES]
        groups = [(s, a) for s, a in groups if len(a)]
        ax.hist([a for _, a in groups], bins=bins, stacked=True, label=[s for s, _ in groups],
                color=[{"waiting": "0.7", "asking": "tab:orange", "placed": "tab:green",
                        "unresolved": "tab:red"}[s] for s, _ in groups])
        ax.axvline(float(data.answers.mean()), color="black", lw=1.5,
                   label=f"mean {data.answers.mean():.1f}")
        if limit is not None:
            ax.axvline(limit, color="tab:gray", lw=1.5, ls=":", label=f"limit {limit:.1f}")
        ax.set_xlabel("answers counted for the item (reference items collect the answers "
                      "of the items compared with them)")
        ax.set_ylabel("items")
        ax.legend(loc="best", fontsize=9)
        ax.grid(alpha=0.3, axis="y")
    else:
        _no_data(ax, "items")
    ax.set_title("Answers per item")
    out = _png(fig)
    plt.close(fig)
    return out


def plot_sources(data: RunData) -> str:
    import matplotlib.pyplot as plt

    # The most active sources, drawn best first so the careful and the contrary ones stand
    # apart; a bar is coloured only when its 95% interval excludes zero.
    rows = sorted(data.sources[:TOP_SOURCES], key=lambda s: s["delta"])
    fig, ax = plt.subplots(figsize=(9, max(2.5, 0.32 * len(rows) + 1.2)))
    if rows:
        names = [s["source"] or "(anonymous)" for s in rows]
        delta = np.array([s["delta"] for s in rows])
        se = np.array([s["se"] if math.isfinite(s["se"]) else 0.0 for s in rows])
        lo, hi = delta - 1.96 * se, delta + 1.96 * se
        colors = ["tab:green" if a > 0 else "tab:red" if b < 0 else "0.6"
                  for a, b in zip(lo, hi, strict=True)]
        y = np.arange(len(rows))
        ax.barh(y, delta, xerr=1.96 * se, color=colors, capsize=3, error_kw={"lw": 1})
        ax.set_yticks(y, names, fontsize=8)
        for yi, s in zip(y, rows, strict=True):
            ax.text(1.02, yi, f"{s['answers']}", va="center", fontsize=7, color="0.3",
                    transform=ax.get_yaxis_transform())
        ax.text(1.02, len(rows) - 0.4, "answers", fontsize=7, color="0.3", va="bottom",
                transform=ax.get_yaxis_transform())
        ax.axvline(0, color="black", lw=0.8)
        ax.set_xlim(-1, 1)
        ax.set_xlabel("learned bias δ (1 = always right, 0 = random, < 0 = reliably wrong)"
                      "\nwhiskers: 95% interval; grey: not distinguishable from random")
        ax.grid(alpha=0.3, axis="x")
        more = len(data.sources) - len(rows)
        ax.set_title("Learned reliability per source" + (f" (top {len(rows)} by answers,"
                                                          f" {more} more)" if more else ""))
    else:
        _no_data(ax, "learned noise")
        ax.set_title("Learned reliability per source")
    out = _png(fig)
    plt.close(fig)
    return out


