"""The offline runner: show state + control script + engine in a block loop.

The same :class:`~fieldmix.engine.Engine` and :class:`~fieldmix.state.ShowState`
as the live server; only the transport differs (files instead of a device and
sockets). Script events are applied sample-accurately: a block is split at the
sample where an event is due, so a scripted change starts at its time.

Nothing is written until the render has succeeded: the output goes to a
temporary file beside the target and is renamed into place at the end.
"""

from __future__ import annotations

import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional, Sequence

import numpy as np

from .engine import Engine
from .errors import ConfigError, FieldmixError
from .model import Show
from .state import ShowState

ProgressFn = Callable[[float], None]


@dataclass
class RenderResult:
    path: Path
    frames: int
    samplerate: int
    channels: int
    peak_dbfs: list[float]  # per file channel, sample peak
    nonfinite_inputs: int
    limited_blocks: int


def load_source_audio(show: Show) -> list[Optional[np.ndarray]]:
    """Read each source's file as mono float32 at the show's rate (None: no file)."""
    import soundfile as sf

    out: list[Optional[np.ndarray]] = []
    base = show.path.name if show.path else "show"
    for s in show.sources:
        if s.file is None:
            out.append(None)
            continue
        where = f"{base}: sources[{s.index}].file"
        if not Path(s.file).is_file():
            raise ConfigError(where, f'audio file not found: "{s.file}"')
        try:
            info = sf.info(str(s.file))
        except Exception as exc:  # soundfile raises RuntimeError/LibsndfileError on junk
            raise ConfigError(where, f'cannot read audio file "{Path(s.file).name}": {exc}') from None
        if info.samplerate != show.samplerate:
            raise ConfigError(
                where,
                f'"{Path(s.file).name}" is at {info.samplerate} Hz but the show renders at '
                f"{show.samplerate} Hz (resample the file or set the show's samplerate)",
            )
        data, _ = sf.read(str(s.file), dtype="float32", always_2d=True)
        mono = data.mean(axis=1) if data.shape[1] > 1 else data[:, 0]  # a live input is mono
        out.append(np.ascontiguousarray(mono, dtype=np.float32))
    return out


def build_engine(state: ShowState, samplerate: int, max_block: int, **kw) -> Engine:
    cfg = state.engine_layout(samplerate)
    eng = Engine(
        n_inputs=len(state.sources),
        n_outputs=cfg["n_outputs"],
        samplerate=samplerate,
        max_block=max_block,
        glide_ms=state.show.glide_ms,
        sub_outputs=cfg["sub_outputs"],
        sub_trims_db=cfg["sub_trims_db"],
        crossover_hz=cfg["crossover_hz"],
        **kw,
    )
    eng.set_delays(cfg["delays"])
    eng.set_target(state.target_matrix())
    return eng


def render(
    show: Show,
    out_path: Path,
    events: Sequence = (),
    duration: Optional[float] = None,
    blocksize: int = 256,
    subtype: str = "FLOAT",
    progress: Optional[ProgressFn] = None,
    engine_options: Optional[dict] = None,
) -> RenderResult:
    """Render ``show`` (with optional script ``events``) into a multichannel file.

    The file has one channel per interface output up to the layout's highest
    ``output``; channel n carries the speaker whose ``output`` is n (unused
    channels stay silent), so the file plays back on the same interface.
    """
    import soundfile as sf

    if not 16 <= blocksize <= 4096:
        raise FieldmixError(f"block size must be 16..4096 frames, got {blocksize}")
    sr = int(show.samplerate)
    audio = load_source_audio(show)
    state = ShowState(show)
    if duration is None:
        lengths = [len(a) for a in audio if a is not None]
        last_event = max((e.time for e in events), default=0.0)
        duration = max(max(lengths, default=0) / sr, last_event + 1.0 if events else 0.0)
        if duration <= 0:
            raise FieldmixError("nothing to render: no source has a file and no script was given; use --duration")
    if not (math.isfinite(duration) and duration > 0):
        raise FieldmixError(f"duration must be a positive number of seconds, got {duration}")
    total = int(round(duration * sr))
    eng = build_engine(state, sr, blocksize, **(engine_options or {}))
    lay = state.layout
    n_ch = lay.n_channels
    col_of_speaker = np.array([spk.output - 1 for spk in lay.speakers], dtype=np.intp)

    out_path = Path(out_path)
    fmt = "WAV" if total * n_ch * 4 < 2**32 - 2**20 else "RF64"
    tmp = out_path.with_name(f".{out_path.name}.{os.getpid()}.partial")
    peak = np.zeros(n_ch, dtype=np.float64)
    frame_buf = np.zeros((blocksize, n_ch), dtype=np.float32)
    # events -> sample positions (sample-accurate)
    ev_samples = [int(round(e.time * sr)) for e in events]
    ev_i = 0
    try:
        with sf.SoundFile(str(tmp), "w", samplerate=sr, channels=n_ch, subtype=subtype, format=fmt) as f:
            pos = 0
            last_report = -1.0
            version = state.version
            while pos < total:
                # apply every event due now
                while ev_i < len(events) and ev_samples[ev_i] <= pos:
                    state.apply_all(events[ev_i].commands)
                    ev_i += 1
                if state.version != version:
                    eng.set_target(state.target_matrix())
                    version = state.version
                n = min(blocksize, total - pos)
                if ev_i < len(events):
                    n = min(n, max(1, ev_samples[ev_i] - pos))
                x = eng.input_buffer(n)
                for i, a in enumerate(audio):
                    if a is None or pos >= len(a):
                        x[:, i] = 0.0
                    else:
                        seg = a[pos : pos + n]
                        x[: len(seg), i] = seg
                        if len(seg) < n:
                            x[len(seg) :, i] = 0.0
                y = eng.process(x)
                fb = frame_buf[:n]
                fb[:] = 0.0
                fb[:, col_of_speaker] = y
                np.maximum(peak, np.abs(fb).max(axis=0), out=peak)
                f.write(fb)
                pos += n
                if progress is not None:
                    frac = pos / total
                    if frac - last_report >= 0.01 or pos >= total:
                        progress(frac)
                        last_report = frac
        tmp.replace(out_path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    with np.errstate(divide="ignore"):
        peak_db = [float(v) for v in np.maximum(20 * np.log10(peak), -200.0)]
    return RenderResult(
        path=out_path,
        frames=total,
        samplerate=sr,
        channels=n_ch,
        peak_dbfs=peak_db,
        nonfinite_inputs=int(eng.nonfinite_count),
        limited_blocks=int(eng.limited_blocks),
    )


def text_progress(stream=None, width: int = 30) -> ProgressFn:
    """A plain progress bar on stderr (one line, redrawn)."""
    stream = stream or sys.stderr
    tty = hasattr(stream, "isatty") and stream.isatty()
    last = [-1]

    def report(frac: float) -> None:
        if not tty:  # a log file: a line at every quarter, no redraws
            q = int(frac * 4)
            if q > last[0]:
                last[0] = q
                stream.write(f"rendering {q * 25:3d}%\n")
                stream.flush()
            return
        done = int(round(frac * width))
        stream.write(f"\rrendering [{'#' * done}{'.' * (width - done)}] {frac * 100:5.1f}%")
        if frac >= 1.0:
            stream.write("\n")
        stream.flush()

    return report
