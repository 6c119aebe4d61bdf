"""``streamq devices``: the audio devices PortAudio can open, and the lazy
import of :mod:`sounddevice` that every live part of streamq goes through.

PortAudio is a system library (Debian/Ubuntu: ``libportaudio2``). sounddevice
raises ``OSError('PortAudio library not found')`` at import when it is
missing; :func:`import_sounddevice` turns that into a one-line
:class:`~streamq.errors.StreamqError` saying what to install, so offline
runs never need PortAudio and live runs fail with a clear message.

PortAudio lists a host API's devices only if that API answers when PortAudio
starts: a JACK server must already run when ``streamq devices`` (or a live
run) starts, or its devices are not listed.
"""

from __future__ import annotations

import json
from typing import Any

from streamq.errors import StreamqError

INSTALL_HINT = ("PortAudio is not installed; live runs and 'streamq devices' need it "
                "(Debian/Ubuntu: apt-get install libportaudio2; Fedora: dnf install portaudio; "
                "macOS: brew install portaudio)")


def import_sounddevice():
    """Import :mod:`sounddevice` on first use.

    Returns
    -------
    module
        The ``sounddevice`` module.

    Raises
    ------
    StreamqError
        One line saying what to install when the Python package or the
        PortAudio library is missing.
    """
    try:
        import sounddevice
    except ModuleNotFoundError as exc:
        if exc.name == "sounddevice":
            raise StreamqError("the Python package 'sounddevice' is not installed "
                               "(pip install sounddevice); live runs need it") from None
        raise
    except OSError as exc:
        # sounddevice says 'PortAudio library not found'; a broken library
        # (dlopen failure) also lands here
        detail = " ".join(str(exc).split())
        if "portaudio" in detail.lower() and "not found" in detail.lower():
            raise StreamqError(INSTALL_HINT) from None
        raise StreamqError(f"PortAudio could not be loaded ({detail}); reinstall it "
                           f"(Debian/Ubuntu: apt-get install --reinstall libportaudio2)") from None
    return sounddevice


def list_devices(sd=None) -> list[dict[str, Any]]:
    """Every device PortAudio sees, as plain dicts.

    Keys: ``index``, ``name``, ``host_api``, ``inputs``, ``outputs``
    (channel counts), ``default_rate`` (Hz), ``default_input`` and
    ``default_output`` (whether PortAudio's default device for that
    direction).
    """
    sd = sd or import_sounddevice()
    try:
        devices = sd.query_devices()
        apis = sd.query_hostapis()
        default_in, default_out = sd.default.device
    except sd.PortAudioError as exc:
        raise StreamqError(f"PortAudio cannot list devices: {' '.join(str(exc).split())}") from None
    out = []
    for d in devices:
        idx = int(d["index"])
        out.append({
            "index": idx,
            "name": str(d["name"]),
            "host_api": str(apis[d["hostapi"]]["name"]),
            "inputs": int(d["max_input_channels"]),
            "outputs": int(d["max_output_channels"]),
            "default_rate": float(d["default_samplerate"]),
            "default_input": idx == default_in,
            "default_output": idx == default_out,
        })
    return out


def resolve_device(device: int | str | None, direction: str, channels: int = 1, sd=None,
                   where: str = "device") -> int | None:
    """Turn a device given by index or by (part of its) name into an index.

    Parameters
    ----------
    device : int, str or None
        Index, a name, or a part of a name (case-insensitive); a name is
        matched exactly first, then as a part. A string of digits counts as
        an index. None keeps PortAudio's default device (returns None).
    direction : "input" or "output"
    channels : int
        The device must offer at least this many channels in ``direction``.
    where : str
        Prefix of error messages (e.g. ``"node 'mic', field 'device'"``).

    Raises
    ------
    StreamqError
        One line naming the device when none or several match, or when the
        device has too few channels.
    """
    if device is None:
        return None
    if direction not in ("input", "output"):
        raise ValueError(direction)
    key = "inputs" if direction == "input" else "outputs"
    devices = list_devices(sd)
    if isinstance(device, str) and device.strip().isdigit():
        device = int(device.strip())
    if isinstance(device, int):
        match = [d for d in devices if d["index"] == device]
        if not match:
            raise StreamqError(f"{where}: there is no audio device {device} "
                               f"({len(devices)} devices; see 'streamq devices')")
    else:
        want = device.strip().lower()
        match = [d for d in devices if d["name"].lower() == want and d[key] > 0]
        if not match:
            match = [d for d in devices if want in d["name"].lower() and d[key] > 0]
        if not match:
            raise StreamqError(f"{where}: no {direction} device matches '{device}' "
                               f"(see 'streamq devices')")
        if len(match) > 1:
            names = ", ".join(f"{d['index']} '{d['name']}' ({d['host_api']})" for d in match)
            raise StreamqError(f"{where}: '{device}' matches several {direction} devices: "
                               f"{names}; give the index")
    d = match[0]
    if d[key] < channels:
        raise StreamqError(f"{where}: device {d['index']} '{d['name']}' has {d[key]} {direction} "
                           f"channel(s), {channels} wanted")
    return d["index"]


def device_table(devices: list[dict[str, Any]]) -> list[str]:
    """The lines ``streamq devices`` prints: a ``default`` column says ``in``,
    ``out`` or ``in+out`` for the system's default devices."""
    rows = [("#", "name", "host API", "in", "out", "default rate", "default")]
    for d in devices:
        default = "+".join(w for w, on in (("in", d["default_input"]),
                                           ("out", d["default_output"])) if on)
        rows.append((str(d["index"]), d["name"], d["host_api"], str(d["inputs"]),
                     str(d["outputs"]), f"{d['default_rate']:g} Hz", default))
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    right = (False, False, False, True, True, True, False)
    lines = []
    for r in rows:
        cells = [c.rjust(w) if rj else c.ljust(w) for c, w, rj in zip(r, widths, right)]
        lines.append("  ".join(cells).rstrip())
    lines.append("give a device to a live node by index or by (part of) its name")
    return lines


def run(args) -> int:
    """``streamq devices``: print the table (or JSON); exit 0, 2 without PortAudio."""
    sd = import_sounddevice()
    devices = list_devices(sd)
    if getattr(args, "json", False):
        print(json.dumps(devices, indent=2))
        return 0
    if not devices:
        apis = ", ".join(a["name"] for a in sd.query_hostapis()) or "none"
        print(f"no audio devices: PortAudio sees none (host APIs: {apis}); is the sound card "
              f"connected, or the sound server (e.g. a JACK server) running?")
        return 0
    for line in device_table(devices):
        print(line)
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "devices", help="list the audio devices live graphs can use",
        description="List the audio devices PortAudio can open: index, name, host API, input "
                    "and output channels and default sample rate. A live node's 'device' field "
                    "takes the index or (part of) the name.")
    p.add_argument("--json", action="store_true", help="print the list as JSON")
    p.set_defaults(func=run)

