"""Harness for the live tests: a private JACK server with the dummy driver, and
a second JACK client that plays a test signal into streamq and records what
streamq plays back.

Nothing here talks to sound hardware. ``jackd -d dummy`` runs a JACK graph
paced by the system clock (in real time: a 20 s run takes 20 s), and streamq
reaches it through PortAudio's JACK host API exactly as it would a studio's
JACK server.

PortAudio only lists the JACK host API if a server answers when PortAudio
starts (``import sounddevice``), so streamq always runs in a child process
started after the server, with ``JACK_DEFAULT_SERVER`` naming it.

The helpers are plain classes (usable from the benchmark script too); the
pytest fixture ``jack_server`` wraps :class:`JackServer`.
"""

from __future__ import annotations

import os
import re
import select
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
RATE = 48_000
PERIOD = 128

# Server names come from a small fixed pool.  jackd keeps one slot per server name
# in a shared registry (eight slots); a killed server leaves its slot behind, and
# only a later server of the *same* name reclaims it.  Unique names per run would
# fill the registry on a machine that runs the suite often ("Too many servers
# already active"), so names are reused.
NAME_POOL = tuple(f"streamq-test-{k}" for k in range(6))
SHM = Path("/dev/shm")
# PortAudio's JACK client is called "PortAudio" ("PortAudio-01" ... when several run);
# its ports are in_0, in_1 ... and out_0, out_1 ...
PA_INPUT = re.compile(r"^PortAudio[^:]*:in_(\d+)$")
PA_OUTPUT = re.compile(r"^PortAudio[^:]*:out_(\d+)$")


def portaudio_problem() -> str | None:
    """Why PortAudio cannot be used here (None when it loads), checked in a child
    process so that this process never initialises PortAudio itself."""
    probe = subprocess.run([sys.executable, "-c", "import sounddevice"], capture_output=True,
                           text=True, timeout=60, stdin=subprocess.DEVNULL)
    if probe.returncode == 0:
        return None
    last = (probe.stderr.strip().splitlines() or ["import failed"])[-1]
    return f"sounddevice cannot load PortAudio ({last}); apt-get install libportaudio2"


def live_problem() -> str | None:
    """Why the live tests cannot run here, or None."""
    if shutil.which("jackd") is None:
        return "jackd is not installed (apt-get install jackd2)"
    for tool in ("jack_lsp",):
        if shutil.which(tool) is None:
            return f"{tool} is not installed (apt-get install jackd2)"
    why = portaudio_problem()
    if why:
        return why
    try:
        import jack  # noqa: F401  (JACK-Client, the test player)
    except ModuleNotFoundError:
        return "the JACK-Client package is not installed (pip install -e '.[test]')"
    except OSError as exc:
        return f"JACK-Client cannot load libjack ({exc}); apt-get install jackd2"
    return None


class JackServer:
    """A private ``jackd`` with the dummy driver, started and stopped by us.

    Parameters
    ----------
    rate, period : sample rate and frames per JACK period.
    channels : capture and playback ports of the dummy "system" device.
    """

    def __init__(self, rate: int = RATE, period: int = PERIOD, channels: int = 2):
        self.name = _free_name()
        self.rate, self.period, self.channels = rate, period, channels
        self.proc: subprocess.Popen | None = None
        self.log_path = Path(tempfile.gettempdir()) / f"{self.name}.log"
        self._log = None

    # -- life cycle ------------------------------------------------------------
    def start(self, timeout: float = 15.0) -> "JackServer":
        _clear_stale_registry()
        env = dict(os.environ, JACK_NO_AUDIO_RESERVATION="1")
        env.pop("JACK_DEFAULT_SERVER", None)
        self._log = open(self.log_path, "wb")
        self.proc = subprocess.Popen(
            ["jackd", "-n", self.name, "-d", "dummy", "-r", str(self.rate), "-p", str(self.period),
             "-C", str(self.channels), "-P", str(self.channels)],
            stdout=self._log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                status, tail = self.proc.returncode, self.log_tail()
                self.stop()
                raise RuntimeError(f"jackd exited with status {status}:\n{tail}")
            if "system:capture_1" in self.ports():
                return self
            time.sleep(0.1)
        tail = self.log_tail()
        self.stop()
        raise RuntimeError(f"jackd '{self.name}' did not answer within {timeout} s:\n{tail}")

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=5)
        self.proc = None
        _remove_server_files(self.name)
        if self._log is not None:
            self._log.close()
            self._log = None
            self.log_path.unlink(missing_ok=True)

    def __enter__(self) -> "JackServer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # -- helpers ---------------------------------------------------------------
    def ports(self) -> list[str]:
        """Port names as ``jack_lsp`` lists them (empty if the server does not answer)."""
        try:
            out = subprocess.run(["jack_lsp", "-s", self.name], capture_output=True, text=True,
                                 timeout=5, stdin=subprocess.DEVNULL,
                                 env=dict(os.environ, JACK_NO_START_SERVER="1"))
        except subprocess.TimeoutExpired:
            return []
        return out.stdout.split() if out.returncode == 0 else []

    def log_tail(self, lines: int = 20) -> str:
        try:
            text = self.log_path.read_text(errors="replace")
        except OSError:
            return ""
        return "\n".join(text.splitlines()[-lines:])

    def env(self, **extra: str) -> dict[str, str]:
        """Environment for a streamq child process: this checkout on the path and
        this server as the JACK default."""
        env = dict(os.environ)
        env["PYTHONPATH"] = str(REPO)
        env["JACK_DEFAULT_SERVER"] = self.name
        env["JACK_NO_START_SERVER"] = "1"
        env["JACK_NO_AUDIO_RESERVATION"] = "1"
        env.update(extra)
        return env


def _running_jack_servers() -> list[str]:
    """Names of the ``jackd`` servers running on this machine (any user), read
    from /proc; a server started without ``-n`` is called "default"."""
    names = []
    for cmdline in Path("/proc").glob("[0-9]*/cmdline"):
        try:
            argv = cmdline.read_bytes().split(b"\0")
        except OSError:
            continue
        if not argv or Path(argv[0].decode(errors="replace")).name not in ("jackd", "jackdmp"):
            continue
        args = [a.decode(errors="replace") for a in argv]
        name = "default"
        for i, arg in enumerate(args[:-1]):
            if arg in ("-n", "--name"):
                name = args[i + 1]
        names.append(name)
    return names


def _free_name() -> str:
    running = set(_running_jack_servers())
    for name in NAME_POOL:
        if name not in running:
            return name
    raise RuntimeError(f"all test server names are in use ({', '.join(NAME_POOL)})")


def _remove_server_files(name: str) -> None:
    """Remove what a stopped (or killed) server of this name left in /dev/shm."""
    if name in _running_jack_servers():
        return
    for path in list(SHM.glob(f"jack_{name}_*")) + list(SHM.glob(f"jack_sem.*_{name}_*")):
        path.unlink(missing_ok=True)


def _clear_stale_registry() -> None:
    """With no JACK server running anywhere on the machine, every entry of jackd's
    shared registry is left over from a killed server; remove the registry and the
    segments so that a new server finds free slots."""
    if _running_jack_servers() or not SHM.is_dir():
        return
    for path in SHM.glob("jack*"):
        try:
            if path.is_dir():
                shutil.rmtree(path, ignore_errors=True)
            else:
                path.unlink(missing_ok=True)
        except OSError:
            pass


# -- the player ----------------------------------------------------------------------

class Player:
    """A JACK client that plays ``signal`` into streamq's input ports and records
    streamq's output ports.

    Parameters
    ----------
    server : JackServer
    signal : float array (frames, channels), played once (then silence) or looped.
    record : number of streamq output ports to record (0: none).
    record_seconds : capacity of the recording.

    Playing starts in the first JACK period after the connections are made
    (:meth:`attach`); ``played`` counts the frames sent so far, ``recorded``
    the frames recorded.
    """

    def __init__(self, server: JackServer, signal: np.ndarray | None, *, record: int = 0,
                 record_seconds: float = 30.0, loop: bool = False, name: str = "streamq-player"):
        import jack
        self.server = server
        self.signal = (np.zeros((0, 0), np.float32) if signal is None
                       else np.ascontiguousarray(np.asarray(signal, dtype=np.float32)))
        if self.signal.ndim == 1:
            self.signal = self.signal[:, None]
        self.loop = loop
        self.client = jack.Client(name, servername=server.name or None, no_start_server=True)
        self.name = self.client.name
        self.outs = [self.client.outports.register(f"out_{i + 1}")
                     for i in range(self.signal.shape[1])]
        self.ins = [self.client.inports.register(f"in_{i + 1}") for i in range(record)]
        self.rec = np.zeros((int(record_seconds * server.rate), record), np.float32)
        self.playing = False
        self.played = 0
        self.recorded = 0
        self.periods = 0
        self.xruns = 0
        self.client.set_process_callback(self._process)
        self.client.set_xrun_callback(self._xrun)
        self.client.activate()

    def _xrun(self, delay):
        self.xruns += 1

    def _process(self, frames):
        self.periods += 1
        if not self.playing:
            for p in self.outs:
                p.get_array().fill(0.0)
            return
        sig = self.signal
        n = sig.shape[0]
        for ch, p in enumerate(self.outs):
            buf = p.get_array()
            a = self.played
            if self.loop and n:
                idx = (a + np.arange(frames)) % n
                buf[:] = sig[idx, ch]
            else:
                k = max(0, min(frames, n - a))
                buf[:k] = sig[a:a + k, ch]
                buf[k:] = 0.0
        self.played += frames
        r = self.recorded
        k = min(frames, self.rec.shape[0] - r)
        if k > 0:
            for ch, p in enumerate(self.ins):
                self.rec[r:r + k, ch] = p.get_array()[:k]
            self.recorded = r + k

    def connected(self) -> bool:
        """Every port of ours has a connection (made by streamq's ``connect``)."""
        return all(self.client.get_all_connections(p) for p in self.outs + self.ins)

    def streamq_ports(self) -> tuple[list[str], list[str]]:
        """streamq's (PortAudio's) input and output ports, in channel order."""
        ins = sorted((p.name for p in self.client.get_ports(is_audio=True, is_input=True)
                      if PA_INPUT.match(p.name)), key=lambda s: int(PA_INPUT.match(s).group(1)))
        outs = sorted((p.name for p in self.client.get_ports(is_audio=True, is_output=True)
                       if PA_OUTPUT.match(p.name)), key=lambda s: int(PA_OUTPUT.match(s).group(1)))
        return ins, outs

    def attach(self, timeout: float = 60.0, want_inputs: int | None = None,
               want_outputs: int = 0, alive=None) -> tuple[list[str], list[str]]:
        """Wait for streamq's ports, connect them, and start playing.

        streamq's inputs are disconnected from the dummy capture ports and fed
        from ``out_N``; its outputs (up to ``record``) go to ``in_N``.
        ``alive`` is polled (e.g. ``proc.poll() is None``) to give up early.
        """
        want_inputs = self.signal.shape[1] if want_inputs is None else want_inputs
        deadline = time.monotonic() + timeout
        while True:
            ins, outs = self.streamq_ports()
            if len(ins) >= want_inputs and len(outs) >= want_outputs and (ins or outs):
                break
            if alive is not None and not alive():
                raise RuntimeError("streamq ended before its JACK ports appeared")
            if time.monotonic() > deadline:
                raise RuntimeError(f"streamq's JACK ports did not appear within {timeout} s "
                                   f"(ports: {self.server.ports()})")
            time.sleep(0.01)
        for dst in ins:
            for src in self.client.get_all_connections(dst):
                self.client.disconnect(src, dst)
        for i, dst in enumerate(ins[:len(self.outs)]):
            self.client.connect(self.outs[i], dst)
        for i, src in enumerate(outs[:len(self.ins)]):
            self.client.connect(src, self.ins[i])
        self.playing = True
        return ins, outs

    def recording(self) -> np.ndarray:
        """What was recorded so far, (frames, channels) float32."""
        return self.rec[:self.recorded].copy()

    def close(self) -> None:
        try:
            self.client.deactivate()
        except Exception:
            pass
        try:
            self.client.close()
        except Exception:
            pass


# -- streamq in a child process ------------------------------------------------------

def streamq_cmd(*args) -> list[str]:
    return [sys.executable, "-m", "streamq.cli", *map(str, args)]


def run_streamq(server: JackServer, *args, timeout: float = 120, **kw) -> subprocess.CompletedProcess:
    """Run ``streamq ARGS`` against ``server``; capture text output."""
    return subprocess.run(streamq_cmd(*args), env=server.env(), capture_output=True, text=True,
                          timeout=timeout, stdin=subprocess.DEVNULL, **kw)


def start_streamq(server: JackServer, *args, cwd: Path | None = None) -> subprocess.Popen:
    """Start ``streamq ARGS`` against ``server`` without waiting (stdout/stderr piped)."""
    return subprocess.Popen(streamq_cmd(*args), env=server.env(), cwd=cwd, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            stdin=subprocess.DEVNULL)


def play_through(server: JackServer, audio: np.ndarray, args: list, *, record: int = 0,
                 timeout: float = 120, loop: bool = False, stop_after: float | None = None,
                 stop_signal: int = signal.SIGINT):
    """Start streamq, feed it ``audio`` from the player once its ports appear,
    and wait for it to end (or send ``stop_signal`` ``stop_after`` seconds after
    attaching). Returns (CompletedProcess-like result, recording, player stats)."""
    proc = start_streamq(server, *args)
    player = Player(server, audio, record=record, loop=loop,
                    record_seconds=max(5.0, len(audio) / server.rate + 10.0))
    try:
        try:
            player.attach(timeout=60, want_outputs=record, alive=lambda: proc.poll() is None)
        except RuntimeError:
            pass  # streamq failed early: its own output says why
        if stop_after is not None and proc.poll() is None:
            time.sleep(stop_after)
            if proc.poll() is None:
                proc.send_signal(stop_signal)
        try:
            out, err = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            out, err = proc.communicate()
            raise AssertionError(f"streamq did not stop within {timeout} s:\n{err[-3000:]}")
        rec = player.recording()
        stats = {"played": player.played, "recorded": player.recorded, "xruns": player.xruns,
                 "periods": player.periods}
    finally:
        player.close()
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return subprocess.CompletedProcess(proc.args, proc.returncode, out, err), rec, stats


CONTROL = """
import sys, time, sounddevice as sd
seen = [0, 0]
def callback(indata, outdata, frames, when, status):
    seen[0] += 1
    if status.input_overflow or status.output_underflow or status.input_underflow \\
            or status.output_overflow:
        seen[1] += 1
    outdata[:] = indata
with sd.Stream(samplerate=int(sys.argv[2]), blocksize=int(sys.argv[3]), channels=2,
               dtype="float32", callback=callback):
    time.sleep(float(sys.argv[1]))
print(seen[0], seen[1])
"""


def control_dropouts(server: JackServer, seconds: float, block: int = PERIOD) -> tuple[int, int]:
    """A do-nothing PortAudio client (copies input to output) on ``server`` for
    ``seconds``: (callbacks, callbacks flagged with an under/overrun). Tells
    whether the machine itself can hold real time just now."""
    res = subprocess.run([sys.executable, "-c", CONTROL, str(seconds), str(server.rate), str(block)],
                         env=server.env(), capture_output=True, text=True, timeout=seconds + 60,
                         stdin=subprocess.DEVNULL)
    if res.returncode != 0:
        raise RuntimeError(f"control client failed: {res.stderr[-1000:]}")
    calls, flagged = map(int, res.stdout.split())
    return calls, flagged


@pytest.fixture(scope="session")
def jack_server():
    """A private JACK server (dummy driver, 48 kHz, 128-frame periods) for the session;
    skips when jackd, PortAudio or JACK-Client is missing."""
    why = live_problem()
    if why:
        pytest.skip(why)
    server = JackServer()
    try:
        server.start()
    except RuntimeError as exc:
        pytest.fail(f"could not start a JACK server: {exc}")
    try:
        yield server
    finally:
        server.stop()


# -- PipeWire's JACK layer ----------------------------------------------------------------

def pipewire_problem() -> str | None:
    """Why a private PipeWire with its JACK layer cannot run here, or None."""
    for tool, package in (("pipewire", "pipewire"), ("pw-jack", "pipewire-jack"),
                          ("pw-cli", "pipewire-bin")):
        if shutil.which(tool) is None:
            return f"{tool} is not installed (apt-get install pipewire pipewire-jack)"
    return None


class PipeWireServer:
    """A private, headless PipeWire daemon (its own XDG_RUNTIME_DIR, no session
    bus, no session manager) whose JACK layer serves JACK clients started with
    ``pw-jack``. Its graph is paced by PipeWire's dummy driver in real time.

    The period (quantum) starts at PipeWire's default; a JACK client asks for
    another with ``jack_set_buffer_size`` (JACK-Client: ``client.blocksize = n``),
    which holds while that client is active.

    Attributes
    ----------
    prefix : list of str
        What a JACK client's command line starts with (``pw-jack``).
    """

    prefix = ["pw-jack"]

    def __init__(self, rate: int = RATE):
        self.rate = rate
        self.name = "pipewire-0"
        self.dir: Path | None = None
        self.proc: subprocess.Popen | None = None
        self._log = None

    def start(self, timeout: float = 15.0) -> "PipeWireServer":
        self.dir = Path(tempfile.mkdtemp(prefix="streamq-pw-"))
        self.dir.chmod(0o700)
        self._log = open(self.dir / "pipewire.log", "wb")
        env = self.env()
        env.pop("DBUS_SESSION_BUS_ADDRESS", None)
        self.proc = subprocess.Popen(["pipewire"], env=env, stdout=self._log,
                                     stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                tail = self.log_tail()
                self.stop()
                raise RuntimeError(f"pipewire exited with status {self.proc and self.proc.returncode}:\n{tail}")
            if (self.dir / self.name).exists():
                return self
            time.sleep(0.05)
        tail = self.log_tail()
        self.stop()
        raise RuntimeError(f"pipewire did not answer within {timeout} s:\n{tail}")

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=5)
        self.proc = None
        if self._log is not None:
            self._log.close()
            self._log = None
        if self.dir is not None:
            shutil.rmtree(self.dir, ignore_errors=True)
            self.dir = None

    def __enter__(self) -> "PipeWireServer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    def log_tail(self, lines: int = 20) -> str:
        try:
            text = (self.dir / "pipewire.log").read_text(errors="replace")
        except (OSError, TypeError):
            return ""
        return "\n".join(text.splitlines()[-lines:])

    def env(self, **extra: str) -> dict[str, str]:
        env = dict(os.environ)
        env["PYTHONPATH"] = str(REPO)
        env["XDG_RUNTIME_DIR"] = str(self.dir)
        env.pop("PIPEWIRE_REMOTE", None)
        env.pop("JACK_DEFAULT_SERVER", None)
        env["JACK_NO_START_SERVER"] = "1"
        env.update(extra)
        return env


# -- a player in a process of its own ---------------------------------------------------

PLAYER_CHILD = """
import json, sys, time, types
import numpy as np
sys.path.insert(0, sys.argv[1])
from live_util import Player
signal = np.load(sys.argv[2])
server = types.SimpleNamespace(name=sys.argv[3] or None, rate=int(sys.argv[4]))
player = Player(server, signal, record=int(sys.argv[5]), name=sys.argv[6],
                record_seconds=float(sys.argv[7]))
print("ready", player.name, player.client.blocksize, flush=True)
for line in sys.stdin:
    cmd, *arg = line.split()
    if cmd == "wait":
        deadline = time.monotonic() + float(arg[0])
        while not player.connected() and time.monotonic() < deadline:
            time.sleep(0.005)
        player.playing = player.connected()
        print("playing" if player.playing else "alone", flush=True)
    elif cmd == "blocksize":
        player.client.blocksize = int(arg[0])
        time.sleep(0.2)
        print("blocksize", player.client.blocksize, flush=True)
    elif cmd == "ports":
        print(json.dumps([p.name for p in player.client.get_ports(arg[0] if arg else "")]),
              flush=True)
    elif cmd == "stop":
        np.save(arg[0], player.recording())
        print(json.dumps({"played": player.played, "recorded": player.recorded,
                          "xruns": player.xruns, "periods": player.periods}), flush=True)
        break
player.close()
"""


class PlayerProcess:
    """:class:`Player` in a child process (needed for PipeWire, whose libjack a
    process must load at its start: ``pw-jack``), driven line by line.

    Parameters
    ----------
    server : JackServer or PipeWireServer
    signal : float array (frames, channels), played once from :meth:`wait_playing` on.
    record : streamq output channels to record.
    name : the JACK client name (``<name>:out_1`` ... feed streamq, ``in_1`` ... record).
    """

    def __init__(self, server, signal: np.ndarray, *, record: int = 0,
                 name: str = "streamq-player", record_seconds: float = 30.0):
        self.dir = Path(tempfile.mkdtemp(prefix="streamq-player-"))
        np.save(self.dir / "signal.npy", np.asarray(signal, dtype=np.float32))
        srv = "" if isinstance(server, PipeWireServer) else server.name
        cmd = [*getattr(server, "prefix", []), sys.executable, "-c", PLAYER_CHILD,
               str(REPO / "tests"), str(self.dir / "signal.npy"), srv, str(server.rate),
               str(record), name, str(record_seconds)]
        self.proc = subprocess.Popen(cmd, env=server.env(), text=True, stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        first = self._line(60)
        if not first.startswith("ready "):
            self.close()
            raise RuntimeError(f"the player did not start: {first!r}")
        _, self.name, period = first.split()
        self.period = int(period)

    def _line(self, timeout: float) -> str:
        ready, _, _ = select.select([self.proc.stdout], [], [], timeout)
        if not ready:
            raise RuntimeError(f"the player did not answer within {timeout} s")
        line = self.proc.stdout.readline()
        if not line:
            err = self.proc.stderr.read() if self.proc.poll() is not None else ""
            raise RuntimeError(f"the player ended: {err[-2000:]}")
        return line.strip()

    def _ask(self, text: str, timeout: float = 30.0) -> str:
        self.proc.stdin.write(text + "\n")
        self.proc.stdin.flush()
        return self._line(timeout)

    def wait_playing(self, timeout: float = 60.0) -> bool:
        """Wait until every player port is connected, then start playing."""
        return self._ask(f"wait {timeout}", timeout + 10) == "playing"

    def set_blocksize(self, frames: int) -> int:
        """Ask the server for another period; the period now in force."""
        return int(self._ask(f"blocksize {frames}").split()[1])

    def ports(self, pattern: str = "") -> list[str]:
        import json
        return json.loads(self._ask(f"ports {pattern}"))

    def stop(self) -> tuple[np.ndarray, dict]:
        """Stop; (what was recorded, (frames, channels) float32, and the player's counts)."""
        import json
        stats = json.loads(self._ask(f"stop {self.dir / 'rec.npy'}"))
        self.proc.wait(timeout=30)
        rec = np.load(self.dir / "rec.npy")
        return rec, stats

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
        for f in (self.proc.stdin, self.proc.stdout, self.proc.stderr):
            try:
                f.close()
            except Exception:
                pass
        shutil.rmtree(self.dir, ignore_errors=True)


def launch_streamq(server, *args, cwd: Path | None = None,
                   env: dict[str, str] | None = None) -> subprocess.Popen:
    """Start ``streamq ARGS`` as a JACK client of ``server`` (under ``pw-jack`` for
    PipeWire; ``env``: more environment variables), stdout/stderr piped."""
    return subprocess.Popen([*getattr(server, "prefix", []), *streamq_cmd(*args)],
                            env=server.env(**(env or {})), cwd=cwd, text=True,
                            stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
