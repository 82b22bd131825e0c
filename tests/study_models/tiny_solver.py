"""A stand-in costly solver for fast study tests (test-only code).

Reads 'a' and 'b' from its deck and writes result.json with y2 = a + 2 b + 0.25 (the cheap
model's prediction plus a known offset). Every call is appended to ``calls.log`` beside the
run folders. While a file ``FLAKY`` exists there, the points whose deck hash is divisible by
3 fail (exit 3), so tests can make a deterministic share of runs fail and then recover.
"""

import hashlib
import json
import sys
from pathlib import Path

deck = Path(sys.argv[1])
text = deck.read_text()
root = deck.parent.parent
with open(root / "calls.log", "a") as log:
    log.write(deck.parent.name + "\n")
if (root / "FLAKY").exists() and int(hashlib.sha256(text.encode()).hexdigest(), 16) % 3 == 0:
    print("solver: diverged (test fault)", file=sys.stderr)
    sys.exit(3)
values = {k.strip(): v for k, v in (ln.split("=", 1) for ln in text.splitlines() if "=" in ln)}
a, b = float(values["a"]), float(values["b"])
(deck.parent / "result.json").write_text(json.dumps({"y2": a + 2.0 * b + 0.25}))
