"""The live daemon: wires show state, the audio child, OSC, HTTP, reload and autosave.

    fieldmix serve SHOW.json [--device NAME|INDEX] [--samplerate 48000] [--blocksize 128]
                             [--osc-port 9000] [--http-port 8080] [--listen ADDRESS] ...
    fieldmix demo            the example show on the virtual audio device

Everything runs on one asyncio event loop in the control process; the audio
engine runs in its own child process (fieldmix.audio). Ctrl-C or SIGTERM fades
the outputs out (within 200 ms), saves the state and exits 0.
"""

from __future__ import annotations

import asyncio
import ipaddress
import logging
import os
import secrets
import signal
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

from ..errors import FieldmixError
from .core import LiveCore

log = logging.getLogger("fieldmix.live")

POLL_INTERVAL = 0.2
CONTROL_NICE = 10  # how much the control process yields to the audio under contention (FIELDMIX_CONTROL_NICE)


@dataclass
class ServeOptions:
    show: Path
    device: Optional[str] = None  # None: the virtual device (demo) / default device (serve)
    virtual: bool = False
    samplerate: int = 48000
    blocksize: int = 128
    osc_port: Optional[int] = None
    http_port: Optional[int] = None
    listen: Optional[str] = None
    token: Optional[str] = None
    allow: list = field(default_factory=list)
    advertise: bool = True
    fresh: bool = False
    state_file: Optional[Path] = None
    record: Optional[Path] = None
    watch: bool = True
    play: Optional[Path] = None  # a control script played into the live server
    play_loop: bool = False


def is_loopback(host: str) -> bool:
    if host in ("localhost", ""):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


class Daemon:
    def __init__(self, opts: ServeOptions, out=None):
        from ..show import load_show

        self.opts = opts
        self.out = out or sys.stdout
        self.show = load_show(Path(opts.show))
        net = self.show.raw.get("network") or {}
        if not isinstance(net, dict):
            raise FieldmixError("show: network: expected an object")
        self.host = opts.listen or net.get("listen") or "127.0.0.1"
        self.osc_port = opts.osc_port if opts.osc_port is not None else int(net.get("osc_port", 9000))
        self.http_port = opts.http_port if opts.http_port is not None else int(net.get("http_port", 8080))
        self.token = opts.token or net.get("token")
        if not is_loopback(self.host) and not self.token:
            self.token = secrets.token_urlsafe(12)
            self.generated_token = True
        else:
            self.generated_token = False
        self.allow = list(opts.allow or net.get("allow") or [])
        self.core = LiveCore(self.show)
        self.link = None
        self.osc = None
        self.web = None
        self.watcher = None
        self.store = None
        self.advertiser = None
        self.player = None
        self._stop = asyncio.Event()
        self.exit_code = 0

    # -------------------------------------------------------------- start
    def _restore(self) -> None:
        from . import persist

        path = self.opts.state_file or persist.default_path(self.show)
        self.state_path = path
        for note in persist.resume(self.core, path, fresh=self.opts.fresh) or ():
            log.info("state: %s", note)
        self.store = persist.StateStore(path, self.core)

    def _start_audio(self) -> None:
        from ..audio.link import AudioLink
        from ..demo_audio import ensure_demo_audio

        backend = "virtual" if (self.opts.virtual or self.opts.device is None and self._is_demo) else "device"
        if backend == "virtual":
            folders = {Path(s.file).parent for s in self.show.sources if s.file}
            if self._is_demo:
                for f in folders:
                    ensure_demo_audio(f)
        self.link = AudioLink(
            self.core.state,
            backend=backend,
            device=self.opts.device,
            samplerate=self.opts.samplerate,
            blocksize=self.opts.blocksize,
            record=str(self.opts.record) if self.opts.record else None,
            inputs="files" if (backend == "virtual" or self._is_demo) else "device",
            meter_ms=40.0,  # 25 meter frames a second for the page
        )
        self.core.link = self.link
        self.link.start(wait=True)
        self.link.push_targets(self.core.state.target_matrix())

    def _yield_to_audio(self) -> None:
        """Lower this (the event loop's) thread's priority, and so every thread it starts
        later, by CONTROL_NICE: under CPU contention the audio child and the audio server
        come first. Measured on the 2-vCPU test VM (docs/performance.md): with a 10,000
        messages/s OSC flood at 512 frames, misses fell from 92-174 per minute to the idle
        level. The audio child is started from a thread the link made before this, so a
        restarted child keeps the normal priority."""
        nice = CONTROL_NICE
        env = os.environ.get("FIELDMIX_CONTROL_NICE")
        if env is not None:
            try:
                nice = max(0, min(19, int(env)))
            except ValueError:
                log.warning("FIELDMIX_CONTROL_NICE=%r is not a number: using %d", env, nice)
        if nice <= 0:
            return
        try:
            tid = threading.get_native_id()
            os.setpriority(os.PRIO_PROCESS, tid, max(nice, os.getpriority(os.PRIO_PROCESS, tid)))
        except (AttributeError, OSError) as exc:  # not Linux-like, or not allowed: run as is
            log.info("control priority unchanged: %s", exc)

    @property
    def _is_demo(self) -> bool:
        return getattr(self, "demo", False)

    async def start(self) -> None:
        from .osc import OscServer
        from .web import WebServer

        self._restore()
        self._start_audio()
        self._yield_to_audio()
        from .persist import user_state_dir
        from .recording import ControlRecorder

        self.core.recorder = ControlRecorder(self.core, fallback=user_state_dir() / "recordings")
        await self.core.automation.start()
        self.osc = OscServer(self.core, host=self.host, udp_port=self.osc_port, allow=self.allow or None)
        await self.osc.start()
        self.web = WebServer(
            self.core,
            host=self.host,
            port=self.http_port,
            token=self.token,
            stats=getattr(self.osc, "stats", None),
        )
        await self.web.start()
        if self.opts.watch and self.core.state.layout.path:
            from .reload import LayoutWatcher

            self.watcher = LayoutWatcher(self.core, Path(self.core.state.layout.path))
            await self.watcher.start()
        if self.opts.advertise and not is_loopback(self.host):
            try:
                from .discovery import Advertiser

                self.advertiser = Advertiser(self.show.raw.get("name") or "fieldmix", self.osc.udp_port, self.web.port, self.host)
                await self.advertiser.start(wait=False)
            except Exception as exc:  # DNS-SD is a convenience: never stop the show for it
                log.warning("DNS-SD advertising is off: %s", exc)
                self.advertiser = None
        if self.opts.play:
            from ..control import parse_script
            from .player import ScriptPlayer

            events = parse_script(Path(self.opts.play), self.core.state.source_ids)
            self.player = ScriptPlayer(self.core, events, loop=self.opts.play_loop,
                                       period=24.0 if self._is_demo else None)
            await self.player.start()
        self._announce()

    def _announce(self) -> None:
        host = self.host if self.host not in ("0.0.0.0", "::") else "<this machine's address>"
        url = f"http://{host}:{self.web.port}/"
        if self.token:
            url += f"?token={self.token}"
        st = self.link.status()
        lines = [
            f"fieldmix: show {self.core.snapshot()['show']!r}, layout {self.core.state.layout.name}, "
            f"{len(self.show.sources)} sources",
            f"  audio : {self.link.backend} device, {st.get('samplerate')} Hz, {st.get('blocksize')} frames"
            + (f", recording to {self.opts.record}" if self.opts.record else ""),
            *([f"  script: {self.opts.play}" + (" (looping)" if self.opts.play_loop else "")] if self.opts.play else []),
            f"  page  : {url}",
            f"  OSC   : {self.host} udp {self.osc.udp_port}, tcp (SLIP) {self.osc.tcp_port}",
        ]
        if self.generated_token:
            lines.append("  token : generated for this run (control from beyond this machine needs it)")
        lines.append("  stop  : Ctrl-C (fades out, saves the state)")
        print("\n".join(lines), file=self.out, flush=True)

    # --------------------------------------------------------------- run
    async def _poll(self) -> None:
        last_state = None
        while not self._stop.is_set():
            try:
                for ev in self.link.poll():
                    log.info("audio: %s", ev)
                if self.core.recorder is not None:
                    self.core.recorder.poll()
                st = self.link.state
                if st != last_state:
                    self.core.emit({"type": "audio", "state": st})
                    last_state = st
            except Exception:
                log.exception("audio supervision failed (the show goes on)")
            try:
                await asyncio.wait_for(self._stop.wait(), POLL_INTERVAL)
            except asyncio.TimeoutError:
                pass

    def request_stop(self) -> None:
        self._stop.set()

    async def run(self) -> int:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                loop.add_signal_handler(sig, self.request_stop)
            except (NotImplementedError, RuntimeError):
                pass
        try:
            await self.start()
            await self._poll()
        finally:
            await self.shutdown()
        return self.exit_code

    async def shutdown(self) -> None:
        log.info("stopping: fading out, saving the state")
        if self.link is not None:
            try:
                self.link.fade_out_and_stop(timeout=0.5, fade_ms=150.0)
            except Exception:
                log.exception("audio stop failed")
        if self.store is not None:
            try:
                self.store.save_now()
            except Exception:
                log.exception("could not save the state")
        try:
            await self.core.automation.stop()
            if self.core.recorder is not None:
                self.core.recorder.close()
        except Exception:
            log.exception("stopping the automation or the recording failed")
        for part in (self.player, self.advertiser, self.watcher, self.web, self.osc):
            if part is not None:
                try:
                    await part.stop()
                except Exception:
                    log.exception("stopping %s failed", type(part).__name__)


def serve(opts: ServeOptions, demo: bool = False) -> int:
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s", datefmt="%H:%M:%S")
    logging.getLogger("watchfiles").setLevel(logging.WARNING)
    d = Daemon(opts)
    d.demo = demo
    return asyncio.run(d.run())
