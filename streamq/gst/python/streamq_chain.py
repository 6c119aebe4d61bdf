"""GStreamer element ``streamq-chain``: a streamq graph inside a media pipeline.

Loaded by GStreamer's Python plugin loader when ``GST_PLUGIN_PATH`` names the
folder above this one (``eval "$(streamq gst-env)"`` sets it). The loader
embeds the system's Python, so this file first puts the project's virtual
environment (``STREAMQ_VENV``) in front of ``sys.path``; streamq itself is
imported only when a pipeline starts, so a plugin scan never fails on it.

The element takes interleaved 32-bit float audio at the graph's sample rate
with the live-input's channel count, gives the live-output's channels, keeps
the buffers' timestamps, adds the graph's declared latency to latency
queries, and writes the report at the end of the stream. It runs the chain
with ``realtime=False`` (a pipeline can wait for the design worker), so its
output equals ``streamq run`` of the same graph with a file-source.
"""

from __future__ import annotations

import os
import site
import sys
from pathlib import Path


def _python_dir() -> str:
    return f"python{sys.version_info.major}.{sys.version_info.minor}"


def _venv_site_packages() -> tuple[str | None, str | None]:
    """(the site-packages folder to import streamq from, a problem with it)."""
    root = os.environ.get("STREAMQ_VENV")
    if root:
        venv = Path(root)
        sp = venv / "lib" / _python_dir() / "site-packages"
        if sp.is_dir():
            return str(sp), None
        made_with = ""
        try:
            for line in (venv / "pyvenv.cfg").read_text().splitlines():
                key, _, value = line.partition("=")
                if key.strip() in ("version", "version_info"):
                    made_with = f" (it was made with Python {value.strip()})"
        except OSError:
            pass
        return None, (f"STREAMQ_VENV={root}: no lib/{_python_dir()}/site-packages there; "
                      f"GStreamer runs Python {sys.version_info.major}."
                      f"{sys.version_info.minor} and the environment must be made with the same "
                      f"minor version{made_with}")
    here = Path(__file__).resolve()
    # installed (not editable): <venv>/lib/pythonX.Y/site-packages/streamq/gst/python/
    if len(here.parents) > 3 and here.parents[3].name == "site-packages":
        return str(here.parents[3]), None
    return None, None


def _use_venv() -> str | None:
    """Put the environment's site-packages (and its .pth files) first on sys.path."""
    sp, problem = _venv_site_packages()
    if sp is None:
        return problem
    if sp not in sys.path:
        before = list(sys.path)
        site.addsitedir(sp)
        added = [p for p in sys.path if p not in before]
        sys.path[:] = added + before
    return None


def _worker_interpreter() -> None:
    """Let the design worker process start as this same (system) Python.

    A worker process is started by running an interpreter and handing it this
    process's ``sys.path``; inside GStreamer ``sys.executable`` is not a Python
    one can run, so name the interpreter GStreamer embeds, and make sure the
    folder streamq is imported from (an editable install's source tree, which
    a ``.pth`` hook adds here) is on ``sys.path`` as a plain entry.
    """
    import multiprocessing
    import streamq
    here = str(Path(streamq.__file__).resolve().parents[1])
    if here not in sys.path:
        sys.path.append(here)
    base = Path(sys.base_prefix) / "bin"
    for name in (_python_dir(), f"python{sys.version_info.major}"):
        if (base / name).exists():
            multiprocessing.set_executable(str(base / name))
            return


_VENV_PROBLEM = _use_venv()

import gi  # noqa: E402

gi.require_version("Gst", "1.0")
gi.require_version("GstBase", "1.0")
from gi.repository import GObject, Gst, GstBase  # noqa: E402

Gst.init_check(None)

_MAX_RATE = 1_536_000
_MAX_CHANNELS = 64
_TEMPLATE = Gst.Caps.from_string(
    f"audio/x-raw, format=(string)F32LE, layout=(string)interleaved, "
    f"rate=(int)[ 1, {_MAX_RATE} ], channels=(int)[ 1, {_MAX_CHANNELS} ]")


def _audio_caps(rate: int | None, channels: int | None) -> Gst.Caps:
    """F32LE interleaved caps; None leaves a field open."""
    rate_text = f"(int){rate}" if rate else f"(int)[ 1, {_MAX_RATE} ]"
    chan_text = f"(int){channels}" if channels else f"(int)[ 1, {_MAX_CHANNELS} ]"
    return Gst.Caps.from_string(f"audio/x-raw, format=(string)F32LE, "
                                f"layout=(string)interleaved, rate={rate_text}, "
                                f"channels={chan_text}")


class StreamqChainElement(GstBase.BaseTransform):
    """Runs a streamq graph (one live-input, one live-output) on the audio
    passing through: F32LE interleaved in, the live-output's channels out."""

    __gstmetadata__ = (
        "streamq chain",
        "Filter/Effect/Audio",
        "Runs a streamq graph (quantizers, coders, meters, sinks) on the audio passing "
        "through; the graph's live-output is what leaves the element",
        "streamq developers",
    )
    __gsttemplates__ = (
        Gst.PadTemplate.new("src", Gst.PadDirection.SRC, Gst.PadPresence.ALWAYS, _TEMPLATE),
        Gst.PadTemplate.new("sink", Gst.PadDirection.SINK, Gst.PadPresence.ALWAYS, _TEMPLATE),
    )
    __gproperties__ = {
        "graph": (str, "graph", "streamq graph file (TOML) with one live-input and one "
                  "live-output", None, GObject.ParamFlags.READWRITE),
        "set": (str, "set", "field overrides as `streamq run --set` takes them, separated by "
                "';' or ',' (e.g. \"enc.bits=6; mon.gain_db=0\")", None,
                GObject.ParamFlags.READWRITE),
        "out-dir": (str, "output folder", "the run's output folder (relative sink paths, meter "
                    "files, report.json); unset: no folder", None, GObject.ParamFlags.READWRITE),
        "report": (str, "report file", "where to write the report (JSON) at the end of the "
                   "stream, besides out-dir's report.json", None, GObject.ParamFlags.READWRITE),
    }

    host = None          # a streamq.gst.host.PipelineChain between start and stop
    failed = False       # an error was posted: no report at the end of the stream

    def __init__(self):
        super().__init__()
        self.props_ = {"graph": None, "set": None, "out-dir": None, "report": None}

    # -- properties -------------------------------------------------------------------
    def do_get_property(self, prop):
        return self.props_[prop.name]

    def do_set_property(self, prop, value):
        if self.host is not None:
            Gst.warning(f"streamq-chain: property '{prop.name}' changed while running; it "
                        f"takes effect at the next start")
        self.props_[prop.name] = value

    # -- errors -----------------------------------------------------------------------
    def _fail(self, text: str, where: str) -> None:
        """Post an element error (one line, no traceback) on the bus, once."""
        if self.failed:
            return
        self.failed = True
        self.message_full(Gst.MessageType.ERROR, Gst.ResourceError.quark(),
                          Gst.ResourceError.SETTINGS, text,
                          f"streamq-chain: {where}", "streamq_chain.py", where, 0)

    def _problem(self, exc: BaseException, where: str) -> None:
        try:
            from streamq.gst.host import one_line
            text = one_line(exc)
        except Exception:
            text = " ".join(str(exc).split()) or type(exc).__name__
        from_streamq = type(exc).__name__ in ("StreamqError", "GraphError")
        if not from_streamq:
            text = f"streamq-chain: {type(exc).__name__}: {text}"
        self._fail(text, where)

    # -- life cycle -------------------------------------------------------------------
    def do_start(self):
        self.failed = False
        if _VENV_PROBLEM:
            self._fail(f"streamq-chain: {_VENV_PROBLEM}", "start")
            return False
        try:
            from streamq.gst.host import PipelineChain
            _worker_interpreter()
        except ImportError as exc:
            self._fail("streamq-chain: cannot import streamq in GStreamer's Python "
                       f"({exc}); set STREAMQ_VENV (eval \"$(streamq gst-env)\")", "start")
            return False
        try:
            self.host = PipelineChain(self.props_["graph"], self.props_["set"],
                                      self.props_["out-dir"], self.props_["report"])
        except BaseException as exc:
            self._problem(exc, "start")
            return False
        return True

    def do_stop(self):
        host, self.host = self.host, None
        if host is not None:
            try:
                host.abort()
            except BaseException as exc:
                self._problem(exc, "stop")
        return True

    # -- caps -------------------------------------------------------------------------
    def do_transform_caps(self, direction, caps, filter_):
        host = self.host
        result = _TEMPLATE.copy()
        if host is not None:
            # what the graph takes first (a converter before us picks it when told
            # the rate and channels), then any rate and channel count, so that a
            # stream the graph cannot take reaches set_caps and is refused there
            # with a message naming the graph's field
            channels = host.out_channels if direction == Gst.PadDirection.SINK \
                else host.in_channels
            result = _audio_caps(host.sample_rate, channels)
            result.append(_audio_caps(None, None))
        if filter_ is not None:
            result = filter_.intersect_full(result, Gst.CapsIntersectMode.FIRST)
        return result

    def do_get_unit_size(self, caps):
        try:
            ok, channels = caps.get_structure(0).get_int("channels")
        except Exception:       # no structure: nothing to size
            ok, channels = False, 0
        return (True, 4 * channels) if ok else (False, 0)

    def do_set_caps(self, incaps, outcaps):
        host = self.host
        if host is None:
            return False
        s_in, s_out = incaps.get_structure(0), outcaps.get_structure(0)
        _, rate = s_in.get_int("rate")
        _, channels = s_in.get_int("channels")
        _, out_rate = s_out.get_int("rate")
        _, out_channels = s_out.get_int("channels")
        try:
            host.check_format(rate, channels)
            if out_rate != host.sample_rate or out_channels != host.out_channels:
                from streamq.errors import StreamqError
                raise StreamqError(
                    f"{host.source}: node '{host.output_id}': the live-output gives "
                    f"{host.out_channels} channel(s) at {host.sample_rate} Hz; downstream "
                    f"asks for {out_channels} at {out_rate} Hz (put audioconvert after "
                    f"streamq-chain)")
            host.start()
        except BaseException as exc:
            self._problem(exc, "set_caps")
            return False
        return True

    # -- data -------------------------------------------------------------------------
    def do_transform(self, inbuf, outbuf):
        host = self.host
        if host is None or not host.is_open:
            return Gst.FlowReturn.NOT_NEGOTIATED
        import numpy as np
        try:
            with inbuf.map(Gst.MapFlags.READ) as src:
                y = host.process(np.frombuffer(src.data, dtype="<f4"))
            with outbuf.map(Gst.MapFlags.WRITE) as dst:
                out = np.frombuffer(dst.data, dtype="<f4")
                out[:] = y.reshape(-1)
        except BaseException as exc:
            self._problem(exc, "transform")
            return Gst.FlowReturn.ERROR
        return Gst.FlowReturn.OK

    def do_sink_event(self, event):
        if event.type == Gst.EventType.EOS and self.host is not None and not self.failed:
            try:
                self.host.finish()
            except BaseException as exc:
                self._problem(exc, "end of stream")
                return False
        return GstBase.BaseTransform.do_sink_event(self, event)

    # -- latency ----------------------------------------------------------------------
    def do_gst_base_transform_query(self, direction, query):   # not GstElement.query
        if query.type != Gst.QueryType.LATENCY or direction != Gst.PadDirection.SRC:
            return GstBase.BaseTransform.do_query(self, direction, query)
        if not GstBase.BaseTransform.do_query(self, direction, query):
            return False
        host = self.host
        if host is not None and host.latency:
            live, low, high = query.parse_latency()
            ours = Gst.util_uint64_scale_int(host.latency, Gst.SECOND, host.sample_rate)
            low += ours
            if high != Gst.CLOCK_TIME_NONE:
                high += ours
            query.set_latency(live, low, high)
        return True


GObject.type_register(StreamqChainElement)
__gstelementfactory__ = ("streamq-chain", Gst.Rank.NONE, StreamqChainElement)
