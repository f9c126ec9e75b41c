"""What one received block costs the event loop on the ingest path, without a broker: CPU time per block.

``python -m edgevib.bench.ingest [--channels 600] [--rounds 4] [--repeats 7] [--read random] [--json]``

The byte stream a broker forwards to the daemon is built once: for each of ``--rounds`` rounds, one QoS 0 MQTT
PUBLISH per channel (topic ``bench/<sensor>/block``) carrying a 16384-sample float32 binary block of
:func:`edgevib.bench.daemon.channel_signal`, encoded by :func:`edgevib.common.wire.encode_binary`, its sequence number
and start time those of consecutive blocks (every block valid and accepted).  The stream is then served to the daemon's
own objects, as on the event loop (no thread, no socket, no broker):

* ``link``: the whole path: :class:`~edgevib.daemon.mqtt_client.MqttLink` reads the stream in chunks (its
  ``_on_readable``, one call per readiness), paho cuts the packets, :class:`~edgevib.daemon.sources.mqtt.MqttSource`
  hands each payload to :class:`~edgevib.daemon.frames.BlockIngest`, which decodes, checks and queues the frame (the
  frames are taken at once, as the daemon's scheduler does);
* ``client``: the same reads with the message callback only counting: paho and the link alone;
* ``ingest``: ``BlockIngest.payload`` on the payloads (decoding, checks, frame assembly);
* ``decode``: :func:`edgevib.common.wire.decode` alone.

Each stage runs on a fresh copy of the next rounds (so the sequence numbers go on and nothing is rejected), timed by
the thread's CPU time (``time.thread_time``: time preempted by other work on a shared machine counts for no stage);
the stages alternate, and each reports the fastest of ``--repeats`` passes in µs per block (other work only ever
adds time).  A socket's read (a copy out of the kernel) is modelled by one copy into the link's buffer.
``--read random`` serves each readiness a random number of bytes (1 kB up to a chunk) instead of all that is waiting.
For ``link`` and ``client`` the share of blocks the link cut out of its chunks itself (its QoS 0 fast path, the rest
read by paho) is reported beside the time.

To compare two versions, run the benchmark with each checkout first on ``PYTHONPATH`` in turn, several times.
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from typing import Any

STAGES = ("link", "client", "ingest", "decode")


class _Stream:
    """A non-blocking socket serving a prepared byte stream: each read copies what is waiting (or, with
    ``random_reads``, a random part of it) into the caller's buffer."""

    def __init__(self, data: bytes, random_reads: bool) -> None:
        self.data = memoryview(data)
        self.pos = 0
        self.rng = random.Random(1) if random_reads else None

    def recv_into(self, buf: Any) -> int:
        left = len(self.data) - self.pos
        if left <= 0:
            raise BlockingIOError
        n = len(buf) if self.rng is None else self.rng.randint(1024, len(buf))
        n = min(n, left)
        memoryview(buf)[:n] = self.data[self.pos:self.pos + n]
        self.pos += n
        return n

    def fileno(self) -> int:
        return 1000

    def close(self) -> None: ...


class _Bench:
    def __init__(self, channels: int, rounds: int, random_reads: bool) -> None:
        from edgevib.bench.daemon import (
            FS_HZ,
            PERIOD_NS,
            SEQ_T0,
            TOPIC,
            RawPublisher,
            bench_config,
            channel_signal,
            sensor_id,
        )
        from edgevib.common.wire import Block, encode_binary
        from edgevib.daemon.frames import BlockIngest, PointStream, Stats
        from edgevib.daemon.mqtt_client import make_client
        from edgevib.daemon.sources.mqtt import MqttSource

        self.rounds, self.random_reads, self.period_ns = rounds, random_reads, PERIOD_NS
        self.seq_t0 = SEQ_T0  # the binary header's sequence number and start time (offset 8)
        config = bench_config(1883, channels, 0.0, tempfile.mkdtemp(prefix="edgevib-bench-ingest-"))
        self.source = config.sources[0].name
        self.templates: list[bytes] = []
        self.prefixes: list[bytes] = []
        for c in range(channels):
            block = Block(sensor_id=sensor_id(c), seq=0, t0_ns=0, fs_hz=FS_HZ, unit="g", samples=channel_signal(c, 0))
            self.templates.append(encode_binary(block))
            self.prefixes.append(RawPublisher.prefix(TOPIC.format(sensor=sensor_id(c)), len(self.templates[-1])))
        self.next_round = 1

        def take_frames(stream: PointStream) -> None:
            stream.queue.clear()

        self.stats = Stats()
        self.ingest = BlockIngest(config, self.stats, on_frames=take_frames)
        self.mqtt_source = MqttSource.from_config(config.sources[0], self.ingest)
        self.mqtt_source._loop_thread = threading.get_ident()  # its callback runs on "the loop": this thread
        self.link = self.mqtt_source.link
        self.deliver = self.link.on_payload
        self.client = make_client(self.link.conn, "edgevib-bench-ingest")  # the daemon's own client set-up
        self.client.on_message = self.link._cb_message
        self.link._paho = self.client
        self.link._fd = 1000
        self.fast_share: dict[str, float] = {}  # stage -> share of its last pass's blocks cut by the link itself

    def payloads(self, delivered: bool) -> list[bytes]:
        """The next rounds' payloads (every channel's next blocks); the rounds move on only for blocks that reach
        the ingest."""
        out = []
        for k in range(self.next_round, self.next_round + self.rounds):
            for template in self.templates:
                buf = bytearray(template)
                self.seq_t0.pack_into(buf, 8, k, k * self.period_ns)
                out.append(bytes(buf))
        if delivered:
            self.next_round += self.rounds
        return out

    def received(self) -> int:
        return self.stats.blocks_received.get(self.source, 0)

    def run(self, stage: str) -> float:
        """One pass of ``stage`` over fresh blocks; thread CPU µs per block."""
        from edgevib.common.wire import decode
        from edgevib.daemon.mqtt_client import _ChunkedReader

        payloads = self.payloads(delivered=stage in ("link", "ingest"))
        n = len(payloads)
        work: Callable[[], None]
        if stage in ("link", "client"):
            prefixes = self.prefixes
            stream = b"".join(part for i, p in enumerate(payloads) for part in (prefixes[i % len(prefixes)], p))
            sock = _Stream(stream, self.random_reads)
            reader = _ChunkedReader(sock)
            self.client._sock = reader  # as MqttLink wraps paho's socket when it opens
            counted = [0]

            def count(_topic: str, _payload: bytes) -> None:
                counted[0] += 1

            self.link.on_payload = self.deliver if stage == "link" else count

            def work() -> None:
                while sock.pos < len(stream) or reader.ready():
                    self.link._on_readable()
        elif stage == "ingest":
            payload = self.ingest.payload
            source = self.source

            def work() -> None:
                for p in payloads:
                    payload(source, None, p, 0)
        else:
            limit = 4 * 1024 * 1024

            def work() -> None:
                for p in payloads:
                    decode(p, max_bytes=limit, max_samples=limit)

        before, fast_before = self.received(), self.link.fast_publishes
        t0 = time.thread_time()
        work()
        cpu_s = time.thread_time() - t0
        if stage in ("link", "client"):
            self.fast_share[stage] = (self.link.fast_publishes - fast_before) / n
        if stage == "client":
            delivered = counted[0]
        elif stage == "decode":
            delivered = n
        else:
            delivered = self.received() - before
        rejected, gaps = sum(self.stats.blocks_rejected.values()), sum(self.stats.gaps.values())
        if delivered != n or rejected or gaps:
            raise SystemExit(f"{stage}: {delivered} of {n} blocks delivered, {rejected} rejected, {gaps} gaps")
        return cpu_s / n * 1e6


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m edgevib.bench.ingest", description=__doc__.split("\n\n")[0])
    p.add_argument("--channels", type=int, default=600, help="channels (points), default 600")
    p.add_argument("--rounds", type=int, default=4, help="blocks per channel in one pass, default 4")
    p.add_argument("--repeats", type=int, default=7, help="timed passes of each stage, default 7")
    p.add_argument("--read", choices=("all", "random"), default="all",
                   help="bytes served per readiness: all that is waiting (default) or a random part")
    p.add_argument("--stages", default=",".join(STAGES), help=f"comma-separated, of {', '.join(STAGES)}")
    p.add_argument("--json", action="store_true", help="one JSON object instead of a table")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    stages = [s for s in args.stages.split(",") if s]
    unknown = sorted(set(stages) - set(STAGES))
    if unknown:
        raise SystemExit(f"unknown stage(s) {', '.join(unknown)}; expected some of {', '.join(STAGES)}")
    bench = _Bench(args.channels, args.rounds, args.read == "random")
    for stage in stages:  # warm-up: imports, caches, the points' first blocks
        bench.run(stage)
    passes: dict[str, list[float]] = {s: [] for s in stages}
    for _ in range(args.repeats):
        for stage in stages:
            passes[stage].append(bench.run(stage))
    best = {s: min(v) for s, v in passes.items()}
    if args.json:
        json.dump({"channels": args.channels, "blocks_per_pass": args.channels * args.rounds, "read": args.read,
                   "us_per_block": best, "passes_us": passes, "fast_share": bench.fast_share}, sys.stdout)
        print()
        return 0
    print(f"{args.channels} channels, {args.channels * args.rounds} blocks per pass, reads: {args.read}")
    for s in stages:
        share = f"; {bench.fast_share[s]:.0%} cut by the link" if s in bench.fast_share else ""
        print(f"  {s:7s} {best[s]:8.1f} µs per block (fastest of {args.repeats}; "
              f"median {sorted(passes[s])[len(passes[s]) // 2]:.1f}{share})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
