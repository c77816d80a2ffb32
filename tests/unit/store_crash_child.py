"""Child process of ``test_store_crash.py``: saves checkpoint generations until killed.

Usage::

    python store_crash_child.py STATE_FILE SYNCHRONOUS KEYS ROWS

Opens the store, resumes from the generation G of the saved checkpoint (0 if
none), prints ``ready`` on stdout and then loops for ever, for g = G+1, G+2...:

1. appends ROWS journal rows tagged g (payload ``b"g"``, arrival ``g``) in one
   call, which returns the last seq ``upto``;
2. adds the outbox message ``alert-g``;
3. saves a checkpoint whose KEYS entries ``asset-<k>`` all hold
   ``b"g:upto:"`` (padded to 300 bytes), adds the key ``extra-g`` and removes
   ``extra-(g-1)``, with ``journal_upto=upto`` and ``now_s=g``;
4. removes the outbox messages ``alert-<n>`` with n <= g-2.

The test kills it with SIGKILL at random moments and checks what it finds.
"""

import sys

from arxwatch.daemon.store import OutboxMessage, StateStore

TOPIC = "larkspur-yard/block-d/ahu-d1/crash-test"
VALUE_BYTES = 300


def value(generation: int, upto: int) -> bytes:
    """Return the value every entry of one generation holds."""
    return f"{generation}:{upto}:".encode().ljust(VALUE_BYTES, b"#")


def main(argv: list[str]) -> None:
    """Open the store named in ``argv`` and save generations until killed."""
    path, keys, rows = argv[0], int(argv[2]), int(argv[3])
    with StateStore(path, synchronous="full" if argv[1] == "full" else "normal") as store:
        entries = store.load_checkpoint().entries
        generation = int(entries["asset-0"].split(b":")[0]) if entries else 0
        print("ready", flush=True)
        while True:
            generation += 1
            tag = str(generation).encode()
            upto = store.append_journal([(TOPIC, tag, float(generation))] * rows)
            store.add_outbox([OutboxMessage(f"alert-{generation}", TOPIC, tag, 1, False)])
            saved = {f"asset-{k}": value(generation, upto) for k in range(keys)}
            saved[f"extra-{generation}"] = value(generation, upto)
            store.save_checkpoint(
                saved,
                now_s=float(generation),
                removed=[f"extra-{generation - 1}"],
                journal_upto=upto,
            )
            store.remove_outbox(
                message.id
                for message in store.pending_outbox()
                if int(message.id.removeprefix("alert-")) <= generation - 2
            )


if __name__ == "__main__":
    main(sys.argv[1:])
