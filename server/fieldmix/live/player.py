"""Play a control script into the live server, on the event loop (never sleeping in it).

Events are applied at their script times relative to the start of playback, through
:meth:`LiveCore.apply_commands` (origin ``"script"``), so every controller sees them.
With ``loop=True`` the script starts again after ``period`` seconds (the demo loops its
script with its 24-second audio).
"""

from __future__ import annotations

import asyncio
import logging
from typing import Optional, Sequence

log = logging.getLogger("fieldmix.live")


class ScriptPlayer:
    def __init__(self, core, events: Sequence, loop: bool = False, period: Optional[float] = None):
        self.core = core
        self.events = list(events)
        self.loop = loop
        last = max((e.time for e in self.events), default=0.0)
        self.period = float(period) if period else last + 1.0
        self.played = 0
        self._task: Optional[asyncio.Task] = None

    async def start(self) -> None:
        self._task = asyncio.get_running_loop().create_task(self._run())

    async def _run(self) -> None:
        loop = asyncio.get_running_loop()
        t0 = loop.time()
        while True:
            for ev in self.events:
                delay = t0 + ev.time - loop.time()
                if delay > 0:
                    await asyncio.sleep(delay)
                try:
                    self.core.apply_commands(ev.commands, origin="script")
                    self.played += 1
                except Exception:  # a script line must never stop the show
                    log.exception("script line %s failed", ev.line)
            if not self.loop:
                return
            t0 += self.period
            delay = t0 - loop.time()
            if delay > 0:
                await asyncio.sleep(delay)

    async def stop(self) -> None:
        if self._task is not None:
            self._task.cancel()
            try:
                await self._task
            except (asyncio.CancelledError, Exception):
                pass
            self._task = None
