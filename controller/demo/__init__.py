"""Files shipped for ``squall demo``: an example protocol and the invented site series it uses.

They are byte-identical copies of ``protocols/compound-heatwave-storm.toml`` and
``protocols/data/saltmarrow-sst.csv`` (a test keeps them so). The series is INVENTED demo
data for the fictional Saltmarrow Lagoon.
"""

from __future__ import annotations

__all__ = ["DEMO_FILES", "DEMO_PROTOCOL", "DEMO_SERIES"]

DEMO_PROTOCOL = "compound-heatwave-storm.toml"
"""File name of the demo protocol in this package."""
DEMO_SERIES = "saltmarrow-sst.csv"
"""File name of the invented site series in this package."""
DEMO_FILES: dict[str, str] = {
    DEMO_PROTOCOL: DEMO_PROTOCOL,
    DEMO_SERIES: f"data/{DEMO_SERIES}",
}
"""Package file name -> where ``squall demo`` writes it, relative to the output folder (the
protocol names its series as ``data/saltmarrow-sst.csv``)."""
