"""Child process running the amqtt broker, the fallback when Mosquitto is not installed.

Usage: ``python amqtt_child.py CONFIG.json``. The JSON file is amqtt's broker configuration.
The process prints ``ready`` on stdout once the broker listens, and runs until it is
terminated (SIGTERM), which drops every connection at once, as a crashed broker would.
"""

from __future__ import annotations

import asyncio
import json
import logging
import sys
from pathlib import Path


async def main(config_path: Path) -> None:
    from amqtt.broker import Broker

    broker = Broker(json.loads(config_path.read_text()))
    await broker.start()
    print("ready", flush=True)
    await asyncio.Event().wait()  # until terminated


if __name__ == "__main__":
    logging.basicConfig(level=logging.ERROR)
    asyncio.run(main(Path(sys.argv[1])))
