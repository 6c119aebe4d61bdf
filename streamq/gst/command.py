"""``streamq gst-env``: the environment that lets GStreamer load ``streamq-chain``."""

from __future__ import annotations

import glob
import hashlib
import os
import re
import shlex
import sys
from pathlib import Path

from streamq.gst import ELEMENT, PLUGIN_DIR, VENV_VARIABLE

#: the Debian packages the element needs (the Python plugin loader and its bindings,
#: the command-line tools, and the plugins the README's example pipeline uses)
APT_PACKAGES = ("gstreamer1.0-tools", "gstreamer1.0-plugins-base", "gstreamer1.0-plugins-good",
                "python3-gst-1.0", "gstreamer1.0-python3-plugin-loader")
APT_LINE = "sudo apt-get install " + " ".join(APT_PACKAGES)

#: where GStreamer's plugins are installed on Debian-like and other common systems
_LOADER_GLOBS = ("/usr/lib/*/gstreamer-1.0/libgstpython*.so",
                 "/usr/lib/gstreamer-1.0/libgstpython*.so",
                 "/usr/lib64/gstreamer-1.0/libgstpython*.so",
                 "/usr/local/lib/*/gstreamer-1.0/libgstpython*.so",
                 "/usr/local/lib/gstreamer-1.0/libgstpython*.so")


def environment_root() -> Path:
    """The environment streamq is installed in: the running virtual
    environment, else the Python installation itself."""
    return Path(sys.prefix)


def in_virtualenv() -> bool:
    return sys.prefix != sys.base_prefix


def registry_file() -> Path:
    """A GStreamer registry of our own for this environment (GStreamer caches a
    failed plugin scan; a registry per environment keeps one setup's failure
    from hiding the element in another)."""
    root = environment_root()
    if in_virtualenv() and os.access(root, os.W_OK):
        return root / "gst-registry.bin"
    cache = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "streamq"
    tag = hashlib.sha1(str(root).encode()).hexdigest()[:10]
    return cache / f"gst-registry-{tag}.bin"


def plugin_path() -> str:
    """GST_PLUGIN_PATH with our folder first (kept once if it is there already)."""
    ours = str(PLUGIN_DIR)
    rest = [p for p in os.environ.get("GST_PLUGIN_PATH", "").split(os.pathsep) if p and p != ours]
    return os.pathsep.join([ours, *rest])


def environment() -> dict[str, str]:
    """The variables ``streamq gst-env`` prints, in order."""
    return {"GST_PLUGIN_PATH": plugin_path(),
            "GST_REGISTRY": str(registry_file()),
            VENV_VARIABLE: str(environment_root())}


def find_loader() -> Path | None:
    """GStreamer's Python plugin loader library, if installed."""
    for pattern in _LOADER_GLOBS:
        for hit in sorted(glob.glob(pattern)):
            return Path(hit)
    return None


def loader_python(loader: Path) -> tuple[int, int] | None:
    """The Python version the loader embeds (from the libpython it links), if it says."""
    try:
        data = loader.read_bytes()
    except OSError:
        return None
    m = re.search(rb"libpython3\.(\d+)", data)
    return (3, int(m.group(1))) if m else None


def problems() -> list[str]:
    """What keeps GStreamer from loading the element here, one line each."""
    found = []
    loader = find_loader()
    if loader is None:
        found.append(f"GStreamer's Python plugin loader is not installed; install it with: "
                     f"{APT_LINE}")
        return found
    embedded = loader_python(loader)
    if embedded is not None and embedded != sys.version_info[:2]:
        found.append(f"{loader} embeds Python {embedded[0]}.{embedded[1]}, this environment is "
                     f"Python {sys.version_info.major}.{sys.version_info.minor}; make the "
                     f"environment with Python {embedded[0]}.{embedded[1]} so its packages load "
                     f"in GStreamer")
    if not in_virtualenv():
        found.append(f"streamq is not running from a virtual environment; {VENV_VARIABLE} "
                     f"names {environment_root()}, make sure its packages are importable there")
    return found


def cmd_gst_env(args) -> int:
    """Print ``export`` lines (for ``eval "$(streamq gst-env)"``); problems go
    to stderr, one line each, and make the exit status 1."""
    for name, value in environment().items():
        print(f"export {name}={shlex.quote(value)}")
    found = problems()
    for line in found:
        print(f"streamq: gst-env: {line}", file=sys.stderr)
    return 1 if found else 0


def add_parser(sub) -> None:
    """Register ``streamq gst-env`` on the command's subparsers."""
    p = sub.add_parser("gst-env", help=f"print the environment that lets GStreamer pipelines use "
                                       f"the {ELEMENT} element",
                       description=f"Print shell export lines that let gst-launch-1.0 and other "
                                   f"GStreamer programs load the {ELEMENT} element from this "
                                   f"environment: eval \"$(streamq gst-env)\". Checks that "
                                   f"GStreamer's Python plugin loader is installed.")
    p.set_defaults(func=cmd_gst_env)
