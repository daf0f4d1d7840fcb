"""Coverage-guided fuzzing of the ingest path with atheris, bounded in time (CI).

Feeds libFuzzer's inputs to :func:`routerd.io.wire.decode_ingest` and to the ingest
pipeline the service and the shard front drive (:class:`routerd.service.pipeline.Pipeline`:
CURVE binding, duplicates, rate limits, rights, guards, engine), appending its journal
records to a journal as the service does — no sockets, no service.  A crash is any exception escaping, an answer that
is not a v1 reply, a reply whose code is outside the fixed set, or an acknowledgement
whose rows do not add up.  At the end the engine must equal an offline replay of the
journal.

    python .ci/fuzz_ingest.py -max_total_time=60 [-seed=N] [corpus dir ...]

The input is read either as a raw frame or, when its first byte is even, as a seed for a
structured batch over the demo lab (so the fuzzer reaches the rows, not only the header).
Prints the number of inputs tried.
"""
from __future__ import annotations

import os
import sys
import tempfile

import atheris

with atheris.instrument_imports():
    import msgpack
    import numpy as np

    from routerd.core.engine import Engine, EngineSettings
    from routerd.io import config, journal, security, wire
    from routerd.io import topofiles as T
    from routerd.service.metrics import Counters
    from routerd.service.pipeline import SERVICE_FRAME_ERRORS, SERVICE_REASONS, Pipeline

HERE = os.path.dirname(os.path.abspath(__file__))
TOPO = T.load(os.path.join(HERE, "..", "routerd", "data", "demo-lab.yaml"))
NAMES = list(TOPO.nodes)
LINKS = [(int(a), int(b), float(d)) for a, b, d in zip(TOPO.src, TOPO.dst, TOPO.delay_s)]
CODES = set(wire.FRAME_ERRORS) | set(SERVICE_FRAME_ERRORS)
# libFuzzer ends the process without Python's clean-up: .ci/run gives a directory it removes
STATE = os.environ.get("ROUTERD_FUZZ_STATE") or tempfile.mkdtemp(prefix="rd-fuzz-")
os.makedirs(STATE, exist_ok=True)
CFG = config.load(None).with_overrides({
    "service.state_dir": STATE, "service.journal.fsync": "never", "service.max_rows": 256,
    "service.max_message_bytes": 65536, "guards.jump.factor": 8.0,
    "guards.rate.batches_per_s": 1000.0, "guards.rate.burst_batches": 100.0})
SETTINGS = EngineSettings.from_config(CFG)
PIPE = Pipeline(TOPO, CFG, engine=Engine(TOPO, SETTINGS))
JOURNAL = journal.Journal(journal.journal_dir(STATE), fsync="never")
SNAPS = journal.SnapshotStore(journal.snapshot_dir(STATE))
COUNTERS = Counters(row_reasons=wire.REASONS + SERVICE_REASONS,
                    frame_reasons=wire.FRAME_ERRORS + SERVICE_FRAME_ERRORS)
CLOCK = [1_767_225_600.0, 0.0]    # wall, monotonic: moved 1 ms per input


def _peer(name: str, nodes: list[str]) -> security.Reporter:
    m = np.zeros(TOPO.n, dtype=bool)
    m[[TOPO.index[x] for x in nodes]] = True
    return security.Reporter(name, name.encode().ljust(40, b"."), tuple(nodes), m)


PEERS = [_peer("w1", ["w1", "w2"]), _peer("e3", ["e3"])]
ALLOW = security.Allow("<fuzz>", PEERS)
RUNS = [0]
BATCH = [1 << 40]


def _structured(fdp: atheris.FuzzedDataProvider) -> bytes:
    BATCH[0] += 1
    rows = []
    for _ in range(fdp.ConsumeIntInRange(0, 24)):
        kind = fdp.ConsumeIntInRange(0, 9)
        if kind < 7:
            a, b, d = LINKS[fdp.ConsumeIntInRange(0, len(LINKS) - 1)]
            dst = fdp.ConsumeIntInRange(0, TOPO.n - 1)
            rows.append([NAMES[a], NAMES[b], NAMES[dst], d * fdp.ConsumeProbability() * 40])
        elif kind == 7:
            rows.append([fdp.ConsumeUnicodeNoSurrogates(3), NAMES[0], NAMES[1], fdp.ConsumeFloat()])
        elif kind == 8:
            rows.append([NAMES[fdp.ConsumeIntInRange(0, TOPO.n - 1)],
                         NAMES[fdp.ConsumeIntInRange(0, TOPO.n - 1)],
                         NAMES[fdp.ConsumeIntInRange(0, TOPO.n - 1)], fdp.ConsumeFloat(),
                         fdp.ConsumeFloat()])
        else:
            rows.append(fdp.ConsumeIntInRange(-5, 5))
    obj = {"v": 1, "reporter": ["w1", "e3", "x"][fdp.ConsumeIntInRange(0, 2)],
           "batch": BATCH[0] if fdp.ConsumeBool() else fdp.ConsumeIntInRange(0, 4), "hops": rows}
    if fdp.ConsumeBool():
        a, b, _ = LINKS[fdp.ConsumeIntInRange(0, len(LINKS) - 1)]
        obj["links"] = [[NAMES[a], NAMES[b], "down" if fdp.ConsumeBool() else "up"]]
    return msgpack.packb(obj, use_bin_type=True)


def one_input(data: bytes) -> None:
    RUNS[0] += 1
    fdp = atheris.FuzzedDataProvider(data)
    structured = bool(data) and data[0] % 2 == 0
    curve = bool(data) and data[-1] % 3 == 0
    frame = _structured(fdp) if structured else data
    out = wire.decode_ingest(frame, TOPO, max_rows=256, max_bytes=65536)
    if isinstance(out, wire.WireError) and "internal decoder error" in out.reason:
        raise AssertionError(out.reason)
    peer = PEERS[len(data) % 2] if curve else None
    PIPE.allow = ALLOW if curve else None
    CLOCK[0] += 0.001
    CLOCK[1] += 0.001
    try:
        fed = PIPE.feed(frame, peer, CLOCK[0], CLOCK[1])
    finally:
        PIPE.allow = None
    for kind, body in fed.records:
        JOURNAL.append(kind, body, sync=False)
    COUNTERS.add(fed.counts)      # a reason outside the fixed sets raises here
    rep = wire.decode_reply(fed.answer)
    if "error" in rep:
        code = str(rep["error"]).split(":", 1)[0]
        if code not in CODES:
            raise AssertionError(f"error code outside the fixed set: {rep}")
    elif (isinstance(out, wire.Ingest) and fed.counts.result != "duplicate"
          and rep["accepted"] + len(rep["rejected"]) != out.rows_total):
        raise AssertionError(f"rows do not add up: {rep} for {out.rows_total} rows")


CHECK_EVERY = 4000


def _check() -> None:
    """The engine equals an offline replay of what was journaled (then a snapshot keeps
    the next replay short — restore then goes through the snapshot path too)."""
    JOURNAL.flush_sync()
    r = journal.restore(STATE, TOPO, SETTINGS)
    assert PIPE.engine is not None
    if not r.engine.same_state(PIPE.engine):
        raise AssertionError(f"after {RUNS[0]} inputs the engine differs from a replay of the journal")
    c = COUNTERS
    print(f"fuzz_ingest: {RUNS[0]} inputs, batches {dict(c.batches)}, rows applied "
          f"{c.observations_accepted}: engine equals a replay of the journal", flush=True)
    rec = JOURNAL.last_record
    SNAPS.trust(SNAPS.write(journal.engine_state(PIPE.engine, dedup=PIPE.dedup.export()), rec))
    JOURNAL.retire_before(SNAPS.retire_point())


def one_input_checked(data: bytes) -> None:
    one_input(data)
    if RUNS[0] % CHECK_EVERY == 0:
        _check()


def main() -> int:
    # libFuzzer ends the process itself (max_total_time): the checks run along the way
    atheris.Setup(sys.argv, one_input_checked)
    atheris.Fuzz()
    return 0


if __name__ == "__main__":
    sys.exit(main())
