"""The demo scenario (service/data/demo_network.json: two hardware stores sharing drill kits)
and a closing stock for it: the examples of the HTTP contract and what `stockrelay run` shows."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

__all__ = ["DEMO_NETWORK", "DEMO_STOCK"]

_DEMO = Path(__file__).parent / "data" / "demo_network.json"
DEMO_NETWORK: dict[str, Any] = json.loads(_DEMO.read_text(encoding="utf-8"))
DEMO_STOCK: dict[str, Any] = {"riverside": 13, "hilltop": 1}
