"""The ``fieldmix`` command line.

Every error a person can cause (a broken file, a bad option) is printed as one
line, ``fieldmix: error: <place>: <what>``, and the exit status is 2. No
traceback, no partial output file.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Optional, Sequence

from . import __version__
from .errors import FieldmixError

# the example show and layouts: the package's "configs" (in a clone a link to the top-level
# configs/ folder; in a wheel a copy of its layouts and shows)
EXAMPLES = (Path(__file__).resolve().parent / "configs").resolve()
EXAMPLE_SHOW = EXAMPLES / "shows" / "harbour.json"
EXAMPLE_SCRIPT = EXAMPLES / "shows" / "harbour.txt"


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own errors: one line, exit 2
        self.print_usage(sys.stderr)
        raise SystemExit(_fail(message))


def _fail(message: str) -> int:
    print(f"fieldmix: error: {message}", file=sys.stderr)
    return 2


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of seconds, got {text!r}") from None
    if not (v > 0 and v < 1e7):
        raise argparse.ArgumentTypeError(f"expected a positive number of seconds, got {text!r}")
    return v


def cmd_layout_check(args) -> int:
    from .layout import load_layout
    from .panning import PanningContext
    from .quality import assess, format_report, plot

    layout = load_layout(Path(args.file))
    ctx = PanningContext(layout)
    rep = assess(layout, ctx)
    print(format_report(layout, rep))
    if args.plot:
        out = Path(args.plot)
        if out.suffix.lower() not in (".svg", ".png"):
            raise FieldmixError(f"--plot: the file must end in .svg or .png, got {out.name!r}")
        plot(layout, rep, out)
        print(f"\nplot written to {out}")
    return 0


def _load_events(show, script: Optional[str]):
    if not script:
        return []
    from .control import parse_script

    return parse_script(Path(script), show.source_ids)


def _print_render(result, show, events) -> None:
    secs = result.frames / result.samplerate
    print(
        f"wrote {result.path}: {result.channels} channels, {secs:.2f} s at {result.samplerate} Hz, "
        f"{len(show.sources)} sources through layout {show.layout.name}"
        + (f", {len(events)} script events" if events else "")
    )
    by_out = {spk.output: spk for spk in show.layout.speakers}
    for ch in range(1, result.channels + 1):
        spk = by_out.get(ch)
        label = f"{spk.id}{' (sub)' if spk.sub else ''}" if spk else "(unused)"
        print(f"  channel {ch:>2}  {label:<14} peak {result.peak_dbfs[ch - 1]:7.1f} dB FS")
    if result.nonfinite_inputs:
        print(f"  {result.nonfinite_inputs} non-finite input samples were replaced by silence")
    if result.limited_blocks:
        print(f"  the output ceiling acted in {result.limited_blocks} blocks")


def cmd_render(args) -> int:
    from .render import render, text_progress
    from .show import load_show

    show = load_show(Path(args.show))
    events = _load_events(show, args.script)
    out = Path(args.output)
    if out.suffix.lower() not in (".wav", ".w64", ".rf64"):
        raise FieldmixError(f"-o: the output must be a .wav file, got {out.name!r}")
    if not out.parent.exists():
        raise FieldmixError(f"-o: folder {str(out.parent)!r} does not exist")
    progress = None if args.quiet else text_progress()
    result = render(show, out, events, duration=args.duration, blocksize=args.blocksize, progress=progress)
    _print_render(result, show, events)
    return 0


def cmd_demo(args) -> int:
    from .demo_audio import ensure_demo_audio

    global EXAMPLE_SHOW, EXAMPLE_SCRIPT
    if not EXAMPLE_SHOW.is_file():
        raise FieldmixError(f"the example show is missing: {EXAMPLE_SHOW} (a broken installation?)")
    try:
        made = ensure_demo_audio(EXAMPLE_SHOW.parent / "audio")
    except OSError:  # an installation we may not write to: the demo runs from a copy in the user's cache
        EXAMPLE_SHOW, EXAMPLE_SCRIPT = _demo_copy()
        made = ensure_demo_audio(EXAMPLE_SHOW.parent / "audio")
    if made:
        print(f"synthesised {len(made)} demo audio files in {made[0].parent}")
    if args.render:
        return _demo_render(args)
    from .live.daemon import serve

    opts = _serve_options(args, EXAMPLE_SHOW)
    opts.virtual = args.device is None
    if not args.still:
        opts.play, opts.play_loop = EXAMPLE_SCRIPT, True
    return serve(opts, demo=True)


def _demo_copy() -> tuple[Path, Path]:
    """Copy the example shows and layouts to $XDG_CACHE_HOME/fieldmix/demo (~/.cache/...)."""
    import os
    import shutil

    base = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "fieldmix" / "demo"
    for part in ("shows", "layouts"):
        (base / part).mkdir(parents=True, exist_ok=True)
        for f in (EXAMPLES / part).iterdir():
            if f.is_file() and f.suffix in (".json", ".txt"):
                shutil.copyfile(f, base / part / f.name)
    return base / "shows" / EXAMPLE_SHOW.name, base / "shows" / EXAMPLE_SCRIPT.name


def _demo_render(args) -> int:
    from .render import render, text_progress
    from .show import load_show

    show = load_show(EXAMPLE_SHOW)
    events = _load_events(show, str(EXAMPLE_SCRIPT))
    out = Path(args.out)
    result = render(show, out, events, blocksize=256, progress=None if args.quiet else text_progress())
    _print_render(result, show, events)
    lay_path = Path(show.layout.path)
    try:
        lay_path = lay_path.resolve().relative_to(Path.cwd().resolve())
    except ValueError:
        pass
    print(f"\nlisten on {show.layout.n_channels} speakers laid out as {show.layout.name}, or look at it with:")
    print(f"  fieldmix layout check {lay_path} --plot layout.svg")
    return 0


def _serve_options(args, show: Path):
    from .live.daemon import ServeOptions

    return ServeOptions(
        show=show,
        device=args.device,
        virtual=getattr(args, "virtual", False),
        samplerate=args.samplerate,
        blocksize=args.blocksize,
        osc_port=args.osc_port,
        http_port=args.http_port,
        listen=args.listen,
        token=args.token,
        allow=args.allow or [],
        advertise=not args.no_advertise,
        fresh=args.fresh,
        state_file=Path(args.state) if args.state else None,
        record=Path(args.record) if args.record else None,
    )


def cmd_serve(args) -> int:
    from .live.daemon import serve
    from .show import load_show

    opts = _serve_options(args, Path(args.show))
    if args.play:
        show = load_show(Path(args.show))
        _load_events(show, args.play)  # a broken script: one line with its place, exit 2, before anything starts
        opts.play, opts.play_loop = Path(args.play), bool(args.loop)
    return serve(opts)


def cmd_devices(args) -> int:
    from .audio.devices import format_table, query

    print(format_table(query()))
    return 0


def _add_serve_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--device", help="audio interface by index or part of its name")
    p.add_argument("--samplerate", type=int, default=48000, help="sample rate in Hz (default 48000)")
    p.add_argument("--blocksize", type=int, default=128, help="block size in frames (default 128)")
    p.add_argument("--osc-port", type=int, help="OSC port, UDP and TCP (default 9000)")
    p.add_argument("--http-port", type=int, help="HTTP port of the control page (default 8080)")
    p.add_argument("--listen", help="address to listen on (default 127.0.0.1; 0.0.0.0 opens the network)")
    p.add_argument("--token", help="control token (required beyond loopback; generated if not given)")
    p.add_argument("--allow", action="append", metavar="CIDR", help="accept OSC only from this network (repeatable)")
    p.add_argument("--no-advertise", action="store_true", help="do not advertise over DNS-SD")
    p.add_argument("--fresh", action="store_true", help="start from the show file, ignoring the saved state")
    p.add_argument("--state", metavar="FILE", help="state autosave file (default: in the per-user state folder, see docs/operations.md)")
    p.add_argument("--record", metavar="FILE.wav", help="write the speaker feeds to a WAV file")


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="fieldmix", description="Real-time networked spatial mixing server.")
    p.add_argument("--version", action="version", version=f"fieldmix {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    lay = sub.add_parser("layout", help="speaker layout tools")
    lsub = lay.add_subparsers(dest="layout_command", metavar="ACTION", parser_class=_Parser)
    chk = lsub.add_parser("check", help="validate a layout and report its quality")
    chk.add_argument("file", help="layout JSON file")
    chk.add_argument("--plot", metavar="FILE", help="draw the layout and its direction error (.svg or .png)")
    chk.set_defaults(func=cmd_layout_check)

    ren = sub.add_parser("render", help="render a show offline into a multichannel WAV file")
    ren.add_argument("show", help="show JSON file")
    ren.add_argument("-o", "--output", required=True, help="output .wav file")
    ren.add_argument("--script", help="control script to play during the render")
    ren.add_argument("--duration", type=_positive_float, help="seconds to render (default: the longest source file)")
    ren.add_argument("--blocksize", type=int, default=256, help="engine block size in frames (16..4096, default 256)")
    ren.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    ren.set_defaults(func=cmd_render)

    srv = sub.add_parser("serve", help="run the live server on a show")
    srv.add_argument("show", help="show JSON file")
    srv.add_argument("--virtual", action="store_true", help="use the virtual audio device (plays the sources' files)")
    srv.add_argument("--play", metavar="SCRIPT", help="replay a control script (e.g. a recording) into the live server")
    srv.add_argument("--loop", action="store_true", help="with --play: start the script again when it ends")
    _add_serve_options(srv)
    srv.set_defaults(func=cmd_serve)

    dev = sub.add_parser("devices", help="list audio host APIs and devices")
    dev.set_defaults(func=cmd_devices)

    demo = sub.add_parser(
        "demo",
        help="the built-in demo: the example show live on a virtual audio device (--render: to a file)",
    )
    _add_serve_options(demo)
    demo.add_argument("--still", action="store_true", help="do not play the demo's control script (sources stay put)")
    demo.add_argument("--render", action="store_true", help="render the example show to a file instead, and exit")
    demo.add_argument("--out", default="fieldmix-demo.wav", help="with --render: output file (default fieldmix-demo.wav)")
    demo.add_argument("-q", "--quiet", action="store_true", help="with --render: no progress bar")
    demo.set_defaults(func=cmd_demo)
    return p


def main(argv: Optional[Sequence[str]] = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    func = getattr(args, "func", None)
    if func is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(func(args) or 0)
    except FieldmixError as exc:
        return _fail(str(exc))
    except KeyboardInterrupt:
        print("\ninterrupted", file=sys.stderr)
        return 130
