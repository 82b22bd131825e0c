"""A stand-in costly solver for fast study tests: reads 'a' and 'b' from its deck, writes
result.json with y2 = a + 2 b + 0.25 (the cheap model's prediction plus a known offset)."""

import json
import sys
from pathlib import Path

deck = Path(sys.argv[1])
values = {
    k.strip(): v for k, v in (ln.split("=", 1) for ln in deck.read_text().splitlines() if "=" in ln)
}
a, b = float(values["a"]), float(values["b"])
(deck.parent / "result.json").write_text(json.dumps({"y2": a + 2.0 * b + 0.25}))
