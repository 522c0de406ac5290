"""Write the football results of tests/test_open_dataset.py as a JSON-lines event file.

    python bench/football_events.py football.jsonl
    streamrate replay football.jsonl --burn-in 11215 -m mixture -m elo

Scoring after 11215 of the 14018 matches scores the last 20% (2,803 matches).
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from streamrate.events import event_to_json
from tests.test_open_dataset import league_events


def main(out: str) -> None:
    events = league_events()
    with open(out, "w", encoding="utf-8") as fh:
        for ev in events:
            fh.write(event_to_json(ev) + "\n")
    burn_in = len(events) - int(0.2 * len(events))
    print(f"wrote {len(events)} events to {out}; last 20%: --burn-in {burn_in}")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "football.jsonl")
