"""Files shipped for ``squall demo``: an example protocol, the invented site series it uses and
the example rig it runs on.

They are byte-identical copies of ``protocols/compound-heatwave-storm.toml``,
``protocols/data/saltmarrow-sst.csv`` and ``rigs/saltmarrow-rack8.toml`` (a test keeps them
so). The series is INVENTED demo data for the fictional Saltmarrow Lagoon.
"""

from __future__ import annotations

__all__ = ["DEMO_FILES", "DEMO_PROTOCOL", "DEMO_RIG", "DEMO_SERIES"]

DEMO_PROTOCOL = "compound-heatwave-storm.toml"
"""File name of the demo protocol in this package."""
DEMO_SERIES = "saltmarrow-sst.csv"
"""File name of the invented site series in this package."""
DEMO_RIG = "saltmarrow-rack8.toml"
"""File name of the example 8-chamber rig in this package."""
DEMO_FILES: dict[str, str] = {
    DEMO_PROTOCOL: DEMO_PROTOCOL,
    DEMO_SERIES: f"data/{DEMO_SERIES}",
    DEMO_RIG: DEMO_RIG,
}
"""Package file name -> where ``squall demo`` writes it, relative to the output folder (the
protocol names its series as ``data/saltmarrow-sst.csv``)."""
