"""The caution that goes with every result wmplan shows: one text, used everywhere.

Terminal output of every verb that prints results, a footer line on figures that stand alone, a ``caution`` key
in every result JSON, the schema metadata of Parquet files, failure files and the run report all carry
:data:`CAUTION` (the report adds :data:`CAUTION_DETAIL` before it).
"""

from __future__ import annotations

CAUTION = (
    "Caution: results on wmplan's simplified traffic model certify nothing about a real vehicle; defer to "
    "functional-safety standards (ISO 26262, ISO 21448), local regulation and licensed engineering practice."
)

CAUTION_DETAIL = (
    "wmplan is a research sandbox, not a safety case. Its traffic is a simplified model (straight roads, idealised "
    "drivers following published car-following and lane-changing laws, no sensors, no weather, no pedestrians), and "
    "its forward model learns only that simplified traffic. None of the numbers it reports (collision rates, "
    "intervals, calibration, failure probabilities) is evidence that a system is safe."
)


def caution_footer(fig) -> None:
    """Write :data:`CAUTION` as a small footer line at the bottom of a matplotlib figure that stands alone."""
    fig.text(0.5, 0.005, CAUTION, ha="center", va="bottom", fontsize=6, color="0.35", wrap=True)
