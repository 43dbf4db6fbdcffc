"""CPU per fill of the daemon's own path, in-process, against a reference from the same run.

Invented data only: 1,000 made-up parent orders on 50 made-up symbols X_HX00..X_HX49 of the
made-up venue Harbour Lane Exchange (X_HLX), as in ``bench_ingest.py``; then a burst of
``--fills`` fills (default 20,000), ten shares each, round-robin over the orders.

What is timed is what ``tracker run`` does with each fill between the broker and the broker,
less the MQTT connection: the group of 64 journaled in one commit (durability ``full``, as
``bench_ingest.py`` runs the daemon), each record fed to the intake (decode, redelivery memory,
time rules, engine), each output made into its publication (topic, retain flag, bytes). The
engine is the one ``tracker run`` builds from its settings, the intake the one it uses.

Reference, in the same process and minutes: ``json.loads`` of each fill's payload and
``json.dumps`` of its status as a plain dict (the least any daemon must do per fill: read one
JSON object, write one). Figures are CPU time (``time.process_time``: this process, all its
threads, kernel time included) per fill, and the path's ratio to the reference.

    .venv/bin/python benchmarks/bench_fill_path.py
    .venv/bin/python benchmarks/bench_fill_path.py --repo /path/to/other/tree --rounds 3

With ``--repo``, each round runs this tree and the other one alternately, each in its own
process (``PYTHONPATH`` set to the tree), and prints both.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import subprocess
import sys
import tempfile
import time
from datetime import timedelta
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
GROUP = 64  # the daemon's batch_size: records journaled in one commit


def measure(fills: int) -> dict[str, Any]:
    """Time the path on ``fills`` fills with the tree on ``sys.path``; CPU us per fill."""
    # The tree's modules first: bench_daemon puts this benchmark's own tree first on the path.
    from tracker.edge.intake import Intake
    from tracker.edge.records import Record
    from tracker.edge.wire import StatusMessage, TargetMessage, Tick, encode, topic_of
    from tracker.shell.config import Settings
    from tracker.shell.daemon import build_engine, format_ts
    from tracker.shell.journal import Journal

    sys.path.insert(0, str(HERE))
    from bench_daemon import DAY, ROOT, bin_message, fill_messages, order_ids, order_message

    folder = Path(tempfile.mkdtemp(prefix="bench-fill-path-"))
    engine = build_engine(Settings(journal=folder / "journal.sqlite", root=ROOT))
    intake = Intake(engine, root=ROOT, derive_ticks=False)
    journal = Journal(folder / "journal.sqlite", durability="full")
    start = DAY + timedelta(seconds=30)

    def commit(rows: list[tuple[str, bytes, str]]) -> list[Record]:
        seqs = journal.append_many(rows)
        return [
            Record(line=s, topic=t, payload=p, ts=ts)
            for s, (t, p, ts) in zip(seqs, rows, strict=True)
        ]

    ts = format_ts(start)
    orders = order_ids(1000)
    setup = [(f"{ROOT}/tick", encode(Tick(ts=start)), ts)]
    setup += [(*order_message(o), ts) for o in orders]
    symbols = sorted({json.loads(order_message(o)[1])["symbol"] for o in orders})
    setup += [(*bin_message(s, 0), ts) for s in symbols]
    for record in commit(setup):
        intake.feed(record)
    burst = fill_messages(orders, fills, 0, DAY + timedelta(minutes=1))
    gc.collect()
    gc.freeze()  # as tracker run does every 2,048 records

    spent = {"journal": 0.0, "intake": 0.0, "encode": 0.0}
    statuses: list[Any] = []
    for first in range(0, fills, GROUP):
        ts = format_ts(start + timedelta(seconds=40, milliseconds=first))
        began = time.process_time()
        records = commit([(topic, payload, ts) for topic, payload in burst[first : first + GROUP]])
        journaled = time.process_time()
        results = [intake.feed(record) for record in records]
        fed = time.process_time()
        for outputs in results:
            for out in outputs:
                retain = isinstance(out, StatusMessage | TargetMessage)
                (topic_of(out, ROOT), encode(out), retain)
                if isinstance(out, StatusMessage) and len(statuses) < fills:
                    statuses.append(out)
        encoded = time.process_time()
        spent["journal"] += journaled - began
        spent["intake"] += fed - journaled
        spent["encode"] += encoded - fed
    journal.close()

    # The reference: read each fill's JSON, write each status as a plain dict.
    documents = [
        {name: getattr(s, name) for name in s.__dataclass_fields__ if name != "ts"}
        for s in statuses
    ]
    began = time.process_time()
    for (_, payload), document in zip(burst, documents, strict=True):
        json.loads(payload)
        json.dumps(document, separators=(",", ":"))
    reference = time.process_time() - began

    per_fill: dict[str, Any] = {name: 1e6 * value / fills for name, value in spent.items()}
    per_fill["path"] = sum(per_fill.values())
    per_fill["reference"] = 1e6 * reference / len(documents)
    per_fill["tree"] = str(Path(sys.modules["tracker"].__file__ or "").parent.parent)
    return per_fill


def show(label: str, figures: dict[str, Any]) -> None:
    print(
        f"{label} (tracker from {figures['tree']}): {figures['path']:.1f} us of CPU per fill "
        f"(journal {figures['journal']:.1f}, "
        f"intake and engine {figures['intake']:.1f}, outputs {figures['encode']:.1f}); reference "
        f"{figures['reference']:.2f} us; path = {figures['path'] / figures['reference']:.1f} x "
        "reference",
        flush=True,
    )


def in_process(repo: Path, fills: int) -> dict[str, Any]:
    """:func:`measure` with the tree ``repo`` first on the path, in a process of its own."""
    code = (
        "import json, sys; sys.path.insert(0, sys.argv[1]); "
        "import bench_fill_path as b; print(json.dumps(b.measure(int(sys.argv[2]))))"
    )
    done = subprocess.run(
        [sys.executable, "-c", code, str(HERE), str(fills)],
        env={**os.environ, "PYTHONPATH": str(repo)},
        cwd=repo,
        capture_output=True,
        text=True,
        check=True,
    )
    figures: dict[str, Any] = json.loads(done.stdout.strip().splitlines()[-1])
    return figures


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--fills", type=int, default=20_000)
    parser.add_argument("--repo", type=Path, help="another source tree, run alternately")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    if args.repo is None:
        show("this tree", measure(args.fills))
        return
    here = HERE.parent
    for round_ in range(1, args.rounds + 1):
        show(f"round {round_}, this tree", in_process(here, args.fills))
        show(f"round {round_}, --repo", in_process(args.repo, args.fills))


if __name__ == "__main__":
    main()
