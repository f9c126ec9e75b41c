"""In-process simulated source: the simulator's scenario streamed into the ingest at real-time pace × ``rate``.

Simulation time advances with the event loop's clock multiplied by ``rate``; every tick the blocks that became
due are generated in a worker thread (generation can be heavy) and handed to the ingest on the event loop, with
the machines' speed tags when the configuration asks for them.  The source counts as connected once the
scenario is loaded.
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from collections.abc import Mapping
from typing import Any

from edgevib.daemon.interfaces import Ingest
from edgevib.daemon.logs import get_logger

__all__ = ["SimulatedSource"]

log = get_logger("edgevib.sources.simulated")


class SimulatedSource:
    """Blocks from ``edgevib.simulator.engine.Simulation``; implements :class:`~edgevib.daemon.interfaces.Source`.

    ``speed_tags`` maps a speed tag name to ``(machine_id, unit)`` (``"rpm"`` or ``"hz"``): each tick the
    simulator's current speed of that machine is handed to ``ingest.speed`` under that tag.
    """

    def __init__(self, *, name: str, ingest: Ingest, scenario: str = "demo", seed: int = 0, rate: float = 1.0,
                 tick_s: float = 0.2, speed_tags: Mapping[str, tuple[str, str]] | None = None,
                 simulation: Any = None) -> None:
        self.name = name
        self.ingest = ingest
        self.scenario = scenario
        self.seed = seed
        self.rate = rate
        self.tick_s = tick_s
        self.speed_tags = dict(speed_tags or {})
        self.simulation = simulation
        self._connected = False
        self._stop = asyncio.Event()

    @property
    def connected(self) -> bool:
        return self._connected

    def _load(self) -> Any:
        from edgevib.simulator.engine import Simulation, load_scenario

        return Simulation(load_scenario(self.scenario), seed=self.seed)

    async def run(self) -> None:
        loop = asyncio.get_running_loop()
        self._stop.clear()
        try:
            sim = self.simulation if self.simulation is not None else await asyncio.to_thread(self._load)
        except Exception as exc:
            log.error("simulated source cannot load its scenario", source=self.name, scenario=self.scenario,
                      error=repr(exc))
            await self._stop.wait()
            return
        self.simulation = sim
        self._connected = True
        self.ingest.connection(self.name, True)
        start = loop.time()
        try:
            while not self._stop.is_set():
                t_sim = (loop.time() - start) * self.rate
                blocks = await asyncio.to_thread(sim.blocks_until, t_sim)
                now = time.time_ns()
                for tag, (machine_id, unit) in self.speed_tags.items():
                    with contextlib.suppress(Exception):
                        hz = float(sim.speed_hz(machine_id, t_sim))
                        self.ingest.speed(self.name, tag, hz * 60.0 if unit == "rpm" else hz, now)
                for block in blocks:
                    self.ingest.block(self.name, block, now)
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._stop.wait(), self.tick_s)
        finally:
            self._connected = False
            self.ingest.connection(self.name, False)

    async def stop(self) -> None:
        self._stop.set()
