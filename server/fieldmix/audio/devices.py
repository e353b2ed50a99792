"""Audio devices: list them and pick one by index or by part of its name.

The control process never imports ``sounddevice`` (importing it initialises PortAudio,
which on JACK opens a client at once). :func:`list_devices` therefore asks a short-lived
child process (``python -m fieldmix.audio.devices --json``) and reads its JSON. The
matching rules (:func:`match_device`) are plain functions on that list, so the audio child
applies exactly the same rules to its own ``sounddevice.query_devices()``.

Matching a spec:
- an int (or a string of digits) is a device index;
- otherwise a case-insensitive name: a device whose whole name equals it wins, else the
  devices whose name contains it; more than one -> ambiguous; none -> not found. Both errors
  list the candidates. ``need_input`` / ``need_output`` drop devices with too few channels
  before matching by name.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from typing import Optional, Sequence, Union

from ..errors import FieldmixError

PORTAUDIO_MISSING = "PortAudio is not installed (install the libportaudio2 package, or PortAudio for your system)"
SOUNDDEVICE_MISSING = "the Python package sounddevice is not installed (pip install sounddevice)"

DeviceSpec = Union[int, str, None]


# ---------------------------------------------------------------- in the child
def set_jack_client_name(name: Optional[str]):
    """Ask PortAudio's JACK host API to use ``name`` for this process's JACK client.

    Must run before ``sounddevice`` is imported (PortAudio opens the JACK client when it is
    initialised). Loads the same libportaudio that sounddevice will load (the dynamic
    loader hands both the same instance) and returns the string buffer, which the caller
    must keep alive: PortAudio keeps the pointer. Returns None when there is nothing to do
    (no name, no library, or a PortAudio built without JACK).
    """
    if not name:
        return None
    import ctypes
    import ctypes.util

    libname = ctypes.util.find_library("portaudio")
    if not libname:
        return None
    try:
        lib = ctypes.CDLL(libname)
        fn = lib.PaJack_SetClientName
    except (OSError, AttributeError):
        return None
    fn.argtypes = [ctypes.c_char_p]
    fn.restype = ctypes.c_int
    buf = ctypes.create_string_buffer(name.encode("utf-8"))
    fn(buf)
    return buf


def import_sounddevice():
    """Import sounddevice, turning a missing PortAudio into a FieldmixError with a plain message."""
    try:
        import sounddevice  # noqa: F401  (imported lazily, only in audio children)
    except OSError as exc:
        raise FieldmixError(f"{PORTAUDIO_MISSING}: {exc}") from None
    except ImportError:
        raise FieldmixError(SOUNDDEVICE_MISSING) from None
    return sounddevice


def query_in_this_process(sd) -> dict:
    """Host APIs and devices as plain dicts (call only where sounddevice is imported)."""
    apis = []
    for i, a in enumerate(sd.query_hostapis()):
        apis.append(
            {
                "index": i,
                "name": a["name"],
                "devices": list(a["devices"]),
                "default_input_device": a["default_input_device"],
                "default_output_device": a["default_output_device"],
            }
        )
    try:
        default_in, default_out = sd.default.device
    except Exception:  # pragma: no cover - odd PortAudio builds
        default_in = default_out = -1
    devs = []
    for d in sd.query_devices():
        devs.append(
            {
                "index": int(d["index"]),
                "name": str(d["name"]),
                "hostapi": apis[d["hostapi"]]["name"] if 0 <= d["hostapi"] < len(apis) else str(d["hostapi"]),
                "max_input_channels": int(d["max_input_channels"]),
                "max_output_channels": int(d["max_output_channels"]),
                "default_samplerate": float(d["default_samplerate"]),
                "default_input": int(d["index"]) == default_in,
                "default_output": int(d["index"]) == default_out,
            }
        )
    return {"hostapis": apis, "devices": devs}


# ---------------------------------------------------------------- control side
def _child_env(client_name: Optional[str]) -> dict:
    env = dict(os.environ)
    env.setdefault("JACK_NO_START_SERVER", "1")  # never start a JACK server as a side effect
    pkg_root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    env["PYTHONPATH"] = pkg_root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    if client_name:
        env["FIELDMIX_JACK_CLIENT"] = client_name
    return env


def query(timeout: float = 15.0, client_name: Optional[str] = "fieldmix-devices") -> dict:
    """``{"hostapis": [...], "devices": [...]}`` from a short-lived child process."""
    try:
        proc = subprocess.run(
            [sys.executable, "-m", "fieldmix.audio.devices", "--json"],
            env=_child_env(client_name),
            capture_output=True,
            text=True,
            timeout=timeout,
        )
    except subprocess.TimeoutExpired:
        raise FieldmixError(f"listing audio devices took longer than {timeout:g} s") from None
    if proc.returncode != 0:
        lines = [ln for ln in (proc.stdout + proc.stderr).strip().splitlines() if ln.strip()]
        msg = lines[-1] if lines else f"exit status {proc.returncode}"
        raise FieldmixError(f"cannot list audio devices: {msg}")
    out = proc.stdout.strip().splitlines()
    try:
        return json.loads(out[-1])
    except (IndexError, ValueError):
        raise FieldmixError("cannot list audio devices: unreadable answer from the helper process") from None


def list_devices(timeout: float = 15.0) -> list[dict]:
    """Every device: index, name, hostapi, max_input/output_channels, default_samplerate, default_input/output."""
    return query(timeout)["devices"]


def list_hostapis(timeout: float = 15.0) -> list[dict]:
    return query(timeout)["hostapis"]


def _describe(d: dict) -> str:
    return f'{d["index"]}: "{d["name"]}" ({d["hostapi"]}, {d["max_input_channels"]} in, {d["max_output_channels"]} out)'


def match_device(devices: Sequence[dict], spec: DeviceSpec, need_input: int = 0, need_output: int = 0) -> dict:
    """The device ``spec`` names (see the module docstring); FieldmixError when none or several."""
    where = "--device"
    if spec is None or (isinstance(spec, str) and not spec.strip()):
        raise FieldmixError(f"{where}: no device given")
    if isinstance(spec, bool):
        raise FieldmixError(f"{where}: expected a device index or name, got {spec!r}")
    if isinstance(spec, int) or (isinstance(spec, str) and spec.strip().isdigit()):
        idx = int(spec)
        for d in devices:
            if d["index"] == idx:
                problems = []
                if d["max_input_channels"] < need_input:
                    problems.append(f"{need_input} input channels needed, it has {d['max_input_channels']}")
                if d["max_output_channels"] < need_output:
                    problems.append(f"{need_output} output channels needed, it has {d['max_output_channels']}")
                if problems:
                    raise FieldmixError(f"{where} {idx}: device {_describe(d)}: " + "; ".join(problems))
                return d
        listing = "; ".join(_describe(d) for d in devices) or "no devices"
        raise FieldmixError(f"{where} {idx}: no device with that index (devices: {listing})")
    if not isinstance(spec, str):
        raise FieldmixError(f"{where}: expected a device index or name, got {spec!r}")
    want = spec.strip().casefold()
    named = [d for d in devices if want in d["name"].casefold()]
    fit = [d for d in named if d["max_input_channels"] >= need_input and d["max_output_channels"] >= need_output]
    exact = [d for d in fit if d["name"].casefold() == want]
    if len(exact) == 1:
        return exact[0]
    if len(fit) == 1:
        return fit[0]
    if len(fit) > 1:
        listing = "; ".join(_describe(d) for d in fit)
        raise FieldmixError(f'{where} "{spec}" is ambiguous: {len(fit)} devices match ({listing}); give the index')
    if named:
        listing = "; ".join(_describe(d) for d in named)
        raise FieldmixError(
            f'{where} "{spec}": no matching device has {need_input} inputs and {need_output} outputs ({listing})'
        )
    listing = "; ".join(_describe(d) for d in devices) or "no devices at all"
    raise FieldmixError(f'{where} "{spec}": no device name contains it (devices: {listing})')


def find_device(spec: DeviceSpec, need_input: int = 0, need_output: int = 0, devices: Optional[Sequence[dict]] = None) -> dict:
    """Match ``spec`` against the current device list (queried in a child unless given)."""
    if devices is None:
        devices = list_devices()
    return match_device(devices, spec, need_input, need_output)


def format_table(info: dict) -> str:
    """A table for ``fieldmix devices``: host APIs, then devices with channels and rates."""
    apis = info.get("hostapis", [])
    devs = info.get("devices", [])
    lines = ["Host APIs:"]
    if not apis:
        lines.append("  (none)")
    for a in apis:
        lines.append(f"  {a['index']:>2}  {a['name']}  ({len(a['devices'])} devices)")
    lines.append("")
    if not devs:
        lines.append("No audio devices.")
        return "\n".join(lines)
    name_w = max(4, min(48, max(len(d["name"]) for d in devs)))
    api_w = max(8, min(28, max(len(d["hostapi"]) for d in devs)))
    head = f"  {'idx':>3}  {'name':<{name_w}}  {'host API':<{api_w}}  {'in':>4}  {'out':>4}  {'rate':>7}"
    lines += ["Devices (choose with --device INDEX or part of the name; > default input, < default output):", head]
    for d in devs:
        mark = (">" if d.get("default_input") else " ") + ("<" if d.get("default_output") else " ")
        name = d["name"] if len(d["name"]) <= name_w else d["name"][: name_w - 1] + "~"
        lines.append(
            f"{mark}{d['index']:>3}  {name:<{name_w}}  {d['hostapi'][:api_w]:<{api_w}}  "
            f"{d['max_input_channels']:>4}  {d['max_output_channels']:>4}  {d['default_samplerate']:>7.0f}"
        )
    return "\n".join(lines)


_CLIENT_NAME_BUF = None  # PortAudio keeps the pointer: the buffer must outlive the import


def _main(argv: Sequence[str]) -> int:
    global _CLIENT_NAME_BUF
    _CLIENT_NAME_BUF = set_jack_client_name(os.environ.get("FIELDMIX_JACK_CLIENT"))
    try:
        sd = import_sounddevice()
    except FieldmixError as exc:
        print(str(exc), file=sys.stderr)
        return 3
    info = query_in_this_process(sd)
    if "--json" in argv:
        print(json.dumps(info))
    else:
        print(format_table(info))
    sys.stdout.flush()
    os._exit(0)  # skip Pa_Terminate: it can hang when a JACK server vanished meanwhile


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
