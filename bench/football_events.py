"""Write the football results of tests/test_open_dataset.py as a JSON-lines event file.

    python bench/football_events.py football.jsonl
    streamrate replay football.jsonl --burn-in 11215 -m mixture -m elo

Scoring after 11215 of the 14018 matches scores the last 20% (2,803 matches).
Each event carries the home side's goal difference as its ``margin``;
``--results-only`` leaves margins out (the file the models saw before margins).
Settings are chosen on the first 80% only; ``--first-80 FILE`` also writes those
11,215 matches, and scoring after the first 5,607 of them scores matches
5,607-11,214 (what model choices were measured on)::

    python bench/football_events.py football.jsonl --first-80 football80.jsonl
    streamrate replay football80.jsonl --burn-in 5607 -m mixture -m kalman_strength
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from streamrate.events import event_to_json
from tests.test_open_dataset import league_events


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", nargs="?", default="football.jsonl")
    ap.add_argument("--first-80", default=None, help="also write the first 80% here")
    ap.add_argument("--results-only", action="store_true", help="leave the goal margins out")
    args = ap.parse_args()
    events = league_events(margins=not args.results_only)
    lines = [event_to_json(ev) + "\n" for ev in events]
    Path(args.out).write_text("".join(lines), encoding="utf-8")
    burn_in = len(events) - int(0.2 * len(events))
    print(f"wrote {len(events)} events to {args.out}; last 20%: --burn-in {burn_in}")
    if args.first_80:
        Path(args.first_80).write_text("".join(lines[:burn_in]), encoding="utf-8")
        half = burn_in // 2
        print(f"wrote {burn_in} events to {args.first_80}; its second half: --burn-in {half}")


if __name__ == "__main__":
    main()
