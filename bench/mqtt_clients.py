"""What one received block costs the daemon's process in each way of reading MQTT: paho against the alternatives.

``python -m edgevib.bench.mqtt_clients [--messages 20000] [--bytes 65589] [--rate 0] [--repeats 1] [--json]``

A private mosquitto (as in :mod:`edgevib.bench.daemon`) and one publisher process that sends ``--messages`` QoS 0
messages of ``--bytes`` each (a 16384-sample float32 block with its header is 65 589 bytes) as fast as the broker
takes them, or ``--rate`` per second evenly paced (as blocks from many devices arrive: 400 channels of 25.6 kHz in
16384-sample blocks are 625 per second; a paced message wakes a sleeping receiver, a flood does not).  Each receiver
runs in a process of its own, subscribes, counts the messages until the last one and reports its process CPU time
per message and the wall time:

* ``paho-thread``: paho-mqtt's own network thread (``loop_start``), every message handed to an asyncio event loop
  as :mod:`edgevib.daemon.sources.mqtt` does (a queue under a lock, one ``call_soon_threadsafe`` per burst);
* ``paho-asyncio``: the same paho client driven from the event loop (``add_reader``/``loop_read``: no thread,
  no hand-over; the pattern of asyncio wrappers around paho);
* ``edgevib-source``: the daemon's own :class:`~edgevib.daemon.sources.mqtt.MqttSource` (its MQTT client module,
  reconnect loop and hand-over included) delivering to an ingest that only counts: what the daemon pays per block
  before decoding (run it with another checkout first on ``PYTHONPATH`` to compare two versions of the client);
* ``protocol``: a minimal MQTT 3.1.1 reader on an ``asyncio.Protocol`` (packets cut from the stream buffer, a
  copy per payload): a lower bound for any Python client, not a client (no TLS, QoS 1,
  reconnection or MQTT 5).

Nothing of the daemon's own work is included (no decoding, no analysis): this isolates the client's cost.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import multiprocessing as mp
import os
import socket
import struct
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from typing import Any

from edgevib.bench.daemon import Broker, RawPublisher, _utf8, _varint

TOPIC = "bench/QL-BENCH-0000/block"
KINDS = ("paho-thread", "paho-asyncio", "edgevib-source", "protocol")


def _publish(port: int, n: int, size: int, go: Any, rate: float = 0.0) -> None:
    pub = RawPublisher(port, f"edgevib-bench-flood-{os.getpid()}")
    prefix = RawPublisher.prefix(TOPIC, size)
    payload = bytes(size)
    go.get(timeout=60)
    t0 = time.monotonic()
    for i in range(n):
        if rate > 0:  # evenly paced, as blocks from many devices arrive
            wait_s = t0 + i / rate - time.monotonic()
            if wait_s > 0:
                time.sleep(wait_s)
        pub.publish(prefix, payload)
    time.sleep(0.5)
    pub.close()


def _paho_client(port: int, on_message: Callable[..., None], ready: threading.Event) -> Any:
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"edgevib-bench-sub-{os.getpid()}")

    def on_connect(c: Any, _u: Any, _f: Any, _rc: Any, _p: Any) -> None:
        c.subscribe(TOPIC, qos=0)

    def on_subscribe(*_args: Any) -> None:
        ready.set()

    client.on_connect = on_connect
    client.on_subscribe = on_subscribe
    client.on_message = on_message
    client.connect("127.0.0.1", port, keepalive=60)
    return client


async def _paho_thread(port: int, n: int, out: Any) -> dict[str, float]:
    loop = asyncio.get_running_loop()
    done = asyncio.Event()
    lock = threading.Lock()
    inbox: deque[bytes] = deque()
    state = {"count": 0, "wake": False}

    def drain() -> None:
        with lock:
            batch = list(inbox)
            inbox.clear()
            state["wake"] = False
        state["count"] += len(batch)
        if state["count"] >= n:
            done.set()

    def on_message(_c: Any, _u: Any, msg: Any) -> None:
        with lock:
            inbox.append(bytes(msg.payload))
            wake = not state["wake"]
            state["wake"] = True
        if wake:
            loop.call_soon_threadsafe(drain)

    ready = threading.Event()
    client = _paho_client(port, on_message, ready)
    client.loop_start()
    await asyncio.to_thread(ready.wait, 10)
    return await _measure(out, done, lambda: client.loop_stop())


async def _paho_asyncio(port: int, n: int, out: Any) -> dict[str, float]:
    loop = asyncio.get_running_loop()
    done = asyncio.Event()
    count = 0

    def on_message(_c: Any, _u: Any, msg: Any) -> None:
        nonlocal count
        count += 1
        if count >= n:
            done.set()

    ready = threading.Event()
    client = _paho_client(port, on_message, ready)
    sock = client.socket()
    loop.add_reader(sock, client.loop_read)

    async def misc() -> None:
        while True:
            await asyncio.sleep(1.0)
            client.loop_misc()
            if client.want_write():
                client.loop_write()

    ticker = asyncio.create_task(misc())
    client.loop_write()  # CONNECT
    while not ready.is_set():
        await asyncio.sleep(0.01)
        if client.want_write():
            client.loop_write()

    def stop() -> None:
        ticker.cancel()
        loop.remove_reader(sock)

    return await _measure(out, done, stop)


class _CountingIngest:
    """An ingest (:class:`~edgevib.daemon.interfaces.Ingest`) that counts payloads and nothing else."""

    def __init__(self, n: int, done: asyncio.Event) -> None:
        self.n = n
        self.count = 0
        self.rejected = 0
        self.done = done
        self.up = asyncio.Event()

    def payload(self, _source: str, _topic: str | None, _payload: bytes, _received_ns: int) -> None:
        self.count += 1
        if self.count >= self.n:
            self.done.set()

    def block(self, *_args: Any, **_kw: Any) -> None:
        pass

    def speed(self, *_args: Any) -> None:
        pass

    def reject(self, *_args: Any, **_kw: Any) -> None:
        self.rejected += 1

    def connection(self, _source: str, connected: bool) -> None:
        if connected:
            self.up.set()


async def _edgevib_source(port: int, n: int, out: Any) -> dict[str, float]:
    from edgevib.daemon.config import MqttConnection
    from edgevib.daemon.logs import configure_logging
    from edgevib.daemon.sources.mqtt import MqttSource

    configure_logging("error", "json", stream=sys.stderr)
    done = asyncio.Event()
    ingest = _CountingIngest(n, done)
    conn = MqttConnection.model_validate({"url": f"mqtt://127.0.0.1:{port}",
                                          "client_id": f"edgevib-bench-sub-{os.getpid()}"})
    src = MqttSource(name="bench", ingest=ingest, connection=conn, topics=[TOPIC], qos=0)
    task = asyncio.create_task(src.run())
    await asyncio.wait_for(ingest.up.wait(), 10)
    await asyncio.sleep(0.3)  # the SUBSCRIBE sent right after the CONNACK has been answered

    def stop() -> None:
        task.cancel()

    res = await _measure(out, done, stop)
    res["rejected"] = float(ingest.rejected)
    return res


class _Reader(asyncio.Protocol):
    """MQTT 3.1.1 packets cut from the stream; each PUBLISH payload copied out as ``bytes`` (as a client hands it
    on) and counted (QoS 0)."""

    def __init__(self, n: int, done: asyncio.Event, subscribed: asyncio.Event) -> None:
        self.buf = bytearray()
        self.n = n
        self.count = 0
        self.done = done
        self.subscribed = subscribed
        self.last = b""

    def data_received(self, data: bytes) -> None:
        buf = self.buf
        buf += data
        pos, end = 0, len(buf)
        with memoryview(buf) as view:
            while end - pos >= 2:
                length, shift, i = 0, 0, pos + 1
                while i < end:
                    byte = buf[i]
                    i += 1
                    length |= (byte & 0x7F) << shift
                    shift += 7
                    if not byte & 0x80:
                        break
                else:
                    break  # the remaining length itself is incomplete
                if end - i < length:
                    break
                kind = buf[pos] >> 4
                if kind == 3:
                    tlen = (buf[i] << 8) | buf[i + 1]
                    self.last = bytes(view[i + 2 + tlen : i + length])
                    self.count += 1
                    if self.count >= self.n:
                        self.done.set()
                elif kind == 9:
                    self.subscribed.set()
                pos = i + length
        if pos:
            del buf[:pos]


async def _protocol(port: int, n: int, out: Any) -> dict[str, float]:
    loop = asyncio.get_running_loop()
    done, subscribed = asyncio.Event(), asyncio.Event()
    transport, _proto = await loop.create_connection(lambda: _Reader(n, done, subscribed), "127.0.0.1", port)
    body = _utf8("MQTT") + bytes([4, 0x02]) + struct.pack(">H", 60) + _utf8(f"edgevib-bench-sub-{os.getpid()}")
    transport.write(b"\x10" + _varint(len(body)) + body)
    sub = struct.pack(">H", 1) + _utf8(TOPIC) + b"\x00"
    transport.write(b"\x82" + _varint(len(sub)) + sub)
    sock = transport.get_extra_info("socket")
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1 << 20)
    await asyncio.wait_for(subscribed.wait(), 10)
    return await _measure(out, done, transport.close)


async def _measure(out: Any, done: asyncio.Event, stop: Callable[[], object]) -> dict[str, float]:
    out.put({"ready": os.getpid()})
    await asyncio.sleep(0)
    cpu0, t0 = time.process_time(), time.perf_counter()
    await asyncio.wait_for(done.wait(), 300)
    cpu, wall = time.process_time() - cpu0, time.perf_counter() - t0
    stop()
    return {"cpu_s": cpu, "wall_s": wall}


def _receiver(kind: str, port: int, n: int, out: Any) -> None:
    run = {"paho-thread": _paho_thread, "paho-asyncio": _paho_asyncio, "edgevib-source": _edgevib_source,
           "protocol": _protocol}[kind]
    try:
        res = asyncio.run(run(port, n, out))
    except BaseException as exc:
        out.put({"error": f"{kind}: {type(exc).__name__}: {exc}"})
        raise
    out.put(res)


def measure(kind: str, broker: Broker, n: int, size: int, rate: float = 0.0) -> dict[str, Any]:
    ctx = mp.get_context("spawn")
    out, go = ctx.Queue(), ctx.Queue()
    rec = ctx.Process(target=_receiver, args=(kind, broker.port, n, out), daemon=True)
    rec.start()
    msg = out.get(timeout=60)
    if "error" in msg:
        raise SystemExit(msg["error"])
    pub = ctx.Process(target=_publish, args=(broker.port, n, size, go, rate), daemon=True)
    pub.start()
    time.sleep(0.3)
    go.put(1)
    res = out.get(timeout=600)
    pub.join(30)
    rec.join(30)
    if "error" in res:
        raise SystemExit(res["error"])
    return {"client": kind, "messages": n, "bytes": size, "rate": rate,
            "cpu_us_per_message": round(res["cpu_s"] / n * 1e6, 1),
            "messages_per_s": round(n / res["wall_s"]), "cpu_cores": round(res["cpu_s"] / res["wall_s"], 2)}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m edgevib.bench.mqtt_clients", description=__doc__.split("\n\n")[0])
    p.add_argument("--messages", type=int, default=20000)
    p.add_argument("--bytes", type=int, default=65589)
    p.add_argument("--clients", default=",".join(KINDS), help=f"comma-separated subset of {', '.join(KINDS)}")
    p.add_argument("--rate", type=float, default=0.0,
                   help="messages per second, evenly paced (default 0: as fast as the broker takes them)")
    p.add_argument("--repeats", type=int, default=1,
                   help="measure every client this many times, in alternation (the machine's noise shows)")
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    kinds = [k for k in args.clients.split(",") if k]
    if any(k not in KINDS for k in kinds) or args.messages < 1 or args.bytes < 1 or args.repeats < 1 or args.rate < 0:
        print(f"error: --clients from {', '.join(KINDS)}; --messages, --bytes and --repeats >= 1, --rate >= 0",
              file=sys.stderr)
        return 2
    broker = Broker()
    try:
        rows = [measure(k, broker, args.messages, args.bytes, args.rate) for _ in range(args.repeats) for k in kinds]
    finally:
        broker.close()
    if args.json:
        print(json.dumps(rows))
    else:
        for r in rows:
            print(f"{r['client']:>13}: {r['cpu_us_per_message']:7.1f} µs CPU per {r['bytes']}-byte message, "
                  f"{r['messages_per_s']} messages/s, {r['cpu_cores']} cores")
    return 0


if __name__ == "__main__":
    sys.exit(main())
