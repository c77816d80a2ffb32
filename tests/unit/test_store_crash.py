"""Crash safety of the state store: SIGKILL at 20 random moments, each restart consistent.

A child process (``store_crash_child.py``) saves checkpoint generations as fast
as it can: every entry of generation g holds g and the journal position of the
save, a key ``extra-g`` replaces ``extra-(g-1)``, journal rows are tagged with
the generation they belong to and an outbox message is added per generation.
The test kills it with SIGKILL at seeded random moments (some during start-up,
most while it works), reopens the file each time and checks that the
checkpoint is one complete generation whose ``journal_upto`` agrees with the
journal rows left, then lets the next child carry on from there.

The requirement is the project's reliability checklist ("SIGKILL at 20 random
points; each restart resumes from a completed checkpoint"); the expectation
that every committed transaction survives a killed process in WAL mode with
synchronous NORMAL or FULL comes from sqlite.org pragma.html#pragma_synchronous
and wal.html.
"""

import os
import random
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

from arxwatch.daemon.store import StateStore

CHILD = Path(__file__).with_name("store_crash_child.py")
KILLS = 20
KEYS = 64
ROWS = 5
SEED = 20260301


def generation_of(value: bytes) -> tuple[int, int]:
    """Split a child's entry value into (generation, journal upto)."""
    generation, upto, _ = value.split(b":", 2)
    return int(generation), int(upto)


def check_consistent(path: Path) -> int:
    """Open the store, check it holds one complete generation; return that generation."""
    with StateStore(path) as store:
        assert store.recovered_from is None
        checkpoint = store.load_checkpoint()
        journal = list(store.journal_after(0, batch=7))
        pending = [message.id for message in store.pending_outbox()]
    if not checkpoint.entries:
        generation, upto = 0, 0
        assert checkpoint.journal_upto == 0 and checkpoint.saved_at_s is None
    else:
        generation, upto = generation_of(checkpoint.entries["asset-0"])
        expected_keys = {f"asset-{k}" for k in range(KEYS)} | {f"extra-{generation}"}
        assert set(checkpoint.entries) == expected_keys
        assert {generation_of(v) for v in checkpoint.entries.values()} == {(generation, upto)}
        assert checkpoint.journal_upto == upto
        assert checkpoint.saved_at_s == float(generation)
    # Rows of saved generations were trimmed with the save; only the next one's may remain,
    # whole (each append is one transaction), possibly from more than one interrupted attempt.
    assert all(entry.seq > upto for entry in journal)
    assert {entry.payload for entry in journal} <= {str(generation + 1).encode()}
    assert len(journal) % ROWS == 0
    assert [entry.seq for entry in journal] == sorted({entry.seq for entry in journal})
    # The outbox holds consecutive generations around the saved one, oldest first.
    numbers = [int(name.removeprefix("alert-")) for name in pending]
    assert numbers == sorted(set(numbers))
    assert set(range(max(1, generation - 1), generation + 1)) <= set(numbers)
    assert set(numbers) <= set(range(max(1, generation - 2), generation + 2))
    return generation


def run_and_kill(path: Path, synchronous: str, wait_ready: bool, delay_s: float) -> None:
    """Start a child, SIGKILL it by PID after ``delay_s`` (counted from "ready" if asked)."""
    process = subprocess.Popen(
        [sys.executable, str(CHILD), str(path), synchronous, str(KEYS), str(ROWS)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    try:
        if wait_ready:
            assert process.stdout is not None
            readable, _, _ = select.select([process.stdout], [], [], 20.0)
            line = process.stdout.readline() if readable else b""
            assert line == b"ready\n", (line, process.poll())
        time.sleep(delay_s)
        os.kill(process.pid, signal.SIGKILL)
        process.wait(timeout=20.0)
    finally:
        if process.poll() is None:
            os.kill(process.pid, signal.SIGKILL)
            process.wait(timeout=20.0)
        stderr = process.stderr.read() if process.stderr is not None else b""
        for stream in (process.stdout, process.stderr):
            if stream is not None:
                stream.close()
    # Killed, not dead of an error of its own.
    assert process.returncode == -signal.SIGKILL, stderr.decode(errors="replace")


def test_sigkill_at_random_moments_leaves_a_complete_checkpoint(tmp_path: Path) -> None:
    rng = random.Random(SEED)
    path = tmp_path / "state.db"
    generations = [check_consistent(path)]
    for kill in range(KILLS):
        wait_ready = rng.random() < 0.8  # otherwise during interpreter start-up or open
        delay_s = rng.uniform(0.0, 0.25 if wait_ready else 0.15)
        synchronous = "full" if kill % 2 else "normal"
        run_and_kill(path, synchronous, wait_ready, delay_s)
        generations.append(check_consistent(path))
    # Each restart resumed from the last checkpoint: generations never went back ...
    assert generations == sorted(generations)
    # ... and work was done between kills (seeded: some delays are long enough).
    assert generations[-1] > KILLS
    # The store keeps working after the last kill.
    with StateStore(path) as store:
        upto = store.append_journal([("larkspur-yard/block-d/ahu-d1/after", b"ok", 1.0)])
        store.save_checkpoint({"after": b"ok"}, now_s=1.0, journal_upto=upto)
        assert store.load_checkpoint().entries["after"] == b"ok"
        assert store.journal_count() == 0
