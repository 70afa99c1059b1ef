"""The figure of one triaged failure: what the planner believed against the truth, the point of no return, the
contact.

Top panel: per decision, the planner's predicted P(collision) of its chosen plan (violet) and the oracle's
P(collision) of the same plan (teal), over time since the episode started; a vertical band from the point of no
return to the contact (the time when no action sequence any longer avoided the failure), a black cross at the
contact. Bottom panel: the displacement between the chosen plan's predicted futures and what the other vehicles
did (mean over futures, and the closest future), where the planner gave futures. The title names the cause; the
footer carries the caution.

Matplotlib's object interface with the Agg canvas only (no pyplot, no global state). The colours follow the
project's visual language (learned futures violet, oracle futures teal, a collision a black cross); they are
repeated here because this stage does not import the drawing stage.
"""

from __future__ import annotations

import io

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from wmplan.caution import caution_footer

BELIEVED_COLOUR = "#7546c9"
ORACLE_COLOUR = "#0f9186"
CONTACT_COLOUR = "#000000"
NO_RETURN_COLOUR = "#c8460c"
TEXT_COLOUR = "#222222"


def _series(decisions: list[dict], key: str) -> np.ndarray:
    return np.array([np.nan if d.get(key) is None else float(d[key]) for d in decisions], dtype=np.float64)


def triage_figure(result: dict) -> Figure:
    """The figure of one :func:`wmplan.triage.failure.triage_failure` result (module docstring)."""
    decisions = result.get("decisions") or []
    t = _series(decisions, "time_s")
    fig = Figure(figsize=(8.0, 5.2))
    FigureCanvasAgg(fig)
    top, bottom = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    believed = _series(decisions, "believed_p")
    if np.isfinite(believed).any():
        top.step(
            t,
            believed,
            where="post",
            color=BELIEVED_COLOUR,
            lw=1.6,
            label="believed: planner's P(collision) of its plan",
        )
    top.step(
        t,
        _series(decisions, "oracle_p"),
        where="post",
        color=ORACLE_COLOUR,
        lw=1.6,
        label="true: oracle's P(collision) of the same plan",
    )
    contact = float(result.get("contact_s", np.nan))
    pnr = result.get("point_of_no_return") or {}
    for ax in (top, bottom):
        if pnr.get("status") == "found":
            ax.axvspan(pnr["time_s"], contact, color=NO_RETURN_COLOUR, alpha=0.12, lw=0)
            ax.axvline(pnr["time_s"], color=NO_RETURN_COLOUR, lw=1.2, ls="--")
        elif pnr.get("status") == "before start" and len(t):
            ax.axvspan(0.0, contact, color=NO_RETURN_COLOUR, alpha=0.12, lw=0)
        ax.axvline(contact, color=CONTACT_COLOUR, lw=0.8, ls=":")
        ax.grid(alpha=0.3, lw=0.6)
        for spine in ("top", "right"):
            ax.spines[spine].set_visible(False)
    top.plot(
        [contact],
        [1.0],
        marker="x",
        ms=11,
        mew=2.5,
        color=CONTACT_COLOUR,
        ls="none",
        label=f"{result.get('outcome', 'failure')} at {contact:.1f} s",
        clip_on=False,
    )
    if pnr.get("status") == "found":
        top.plot(
            [], [], color=NO_RETURN_COLOUR, ls="--", label=f"point of no return, {pnr['before_contact_s']:.1f} s before"
        )
    elif pnr.get("status") == "before start":
        top.plot([], [], color=NO_RETURN_COLOUR, lw=6, alpha=0.3, label="no way out from the start")
    top.set_ylim(-0.03, 1.05)
    top.set_ylabel("P(collision) within the horizon [1]", fontsize=8)
    top.legend(fontsize=7, loc="center left", frameon=False)
    err = _series(decisions, "prediction_error_m")
    best = _series(decisions, "best_prediction_error_m")
    if np.isfinite(err).any():
        bottom.step(t, err, where="post", color=BELIEVED_COLOUR, lw=1.4, label="mean over predicted futures")
        bottom.step(t, best, where="post", color=BELIEVED_COLOUR, lw=1.0, ls="--", label="closest future")
        bottom.legend(fontsize=7, loc="upper left", frameon=False)
    else:
        bottom.text(
            0.5,
            0.5,
            "this planner gives no predicted futures",
            ha="center",
            va="center",
            transform=bottom.transAxes,
            fontsize=8,
            color=TEXT_COLOUR,
        )
    bottom.set_ylabel("prediction error [m]", fontsize=8)
    bottom.set_xlabel("time since the episode started [s]", fontsize=8)
    for ax in (top, bottom):
        ax.tick_params(labelsize=7)
    fig.suptitle(
        f"{result.get('name', '')}: {result.get('planner', '')}, scene seed {result.get('seed')} — "
        f"cause: {result.get('cause')}",
        fontsize=9,
        color=TEXT_COLOUR,
    )
    fig.subplots_adjust(bottom=0.14, top=0.92, hspace=0.12)
    caution_footer(fig)
    return fig


def triage_figure_png(result: dict) -> bytes:
    """:func:`triage_figure` as PNG bytes (no time stamp in the file)."""
    fig = triage_figure(result)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, facecolor="white", metadata={"Software": None})
    return buf.getvalue()
