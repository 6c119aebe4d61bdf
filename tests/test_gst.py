"""The ``streamq-chain`` GStreamer element, run by the real ``gst-launch-1.0``.

The main check: a pipeline from a WAV file through ``streamq-chain`` to a WAV
file gives the samples and report figures of ``streamq run`` on the same graph
with a file-source in place of the live-input. Then latency and timestamps (a
pipeline built in GStreamer's own Python), and bad setups: each ends the
pipeline with one error line naming file, node and field, no traceback, and
nothing in the output folder.

Needs GStreamer with its Python plugin loader (Debian: gstreamer1.0-tools,
gstreamer1.0-plugins-base, gstreamer1.0-plugins-good, python3-gst-1.0,
gstreamer1.0-python3-plugin-loader); skipped with that list when missing.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from chain_util import run_toml
from streamq.gst.command import APT_LINE, find_loader
from streamq.gst.host import split_overrides

RATE = 48_000
SYSTEM_PYTHON = "/usr/bin/python3"

#: report fields that depend on timing or on knowing the stream's length in advance
VARYING = {"seconds", "codebooks"}

CHAIN = """
[nodes.stats]
use = "pdf-estimator"
input = "mic"
window = "500 ms"
hop = "100 ms"

[nodes.enc]
use = "encoder"
input = "mic"
pdf = "stats"
method = "lloyd-max"
bits = 3
adapt = "trailing"
apply_after = "40 ms"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.gain]
use = "encoder"
input = "mic"
method = "lloyd-max"
bits = 4
adapt = "gain"

[nodes.gain_dec]
use = "decoder"
input = "gain"

[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"

[nodes.gain_noise]
use = "error-meter"
reference = "mic"
input = "gain_dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "FLOAT"

[nodes.keep_gain]
use = "file-sink"
input = "gain_dec"
path = "gain-decoded.wav"
subtype = "FLOAT"
"""

#: what the element runs: the chain between a live-input and a live-output that
#: passes the gain-adaptive decoder's signal at unit gain (no fade after the first block)
LIVE = f"""
[graph]
name = "in-a-pipeline"
sample_rate = {RATE}

[nodes.mic]
use = "live-input"
channels = 2
""" + CHAIN + """
[nodes.mon]
use = "live-output"
input = "gain_dec"
gain_db = -20
fade_in = 0
"""


def _missing() -> str | None:
    """Why the element cannot run here (None: it can)."""
    if shutil.which("gst-launch-1.0") is None or shutil.which("gst-inspect-1.0") is None:
        return f"gst-launch-1.0 is not installed ({APT_LINE})"
    if find_loader() is None:
        return f"GStreamer's Python plugin loader is not installed ({APT_LINE})"
    if not Path(SYSTEM_PYTHON).exists():
        return f"{SYSTEM_PYTHON} (the Python GStreamer embeds) is missing"
    for element in ("wavparse", "wavenc", "audioconvert"):
        if subprocess.run(["gst-inspect-1.0", element], capture_output=True).returncode != 0:
            return f"GStreamer element {element} is missing ({APT_LINE})"
    return None


MISSING = _missing()
needs_gst = pytest.mark.skipif(MISSING is not None, reason=MISSING or "")


@pytest.fixture(scope="module")
def gst_env(tmp_path_factory):
    """The environment ``streamq gst-env`` prints, with a registry of this test run's own."""
    res = subprocess.run([sys.executable, "-m", "streamq.cli", "gst-env"],
                         capture_output=True, text=True, timeout=60)
    env = dict(os.environ)
    for line in res.stdout.splitlines():
        name, _, value = line.removeprefix("export ").partition("=")
        env[name] = subprocess.run(["sh", "-c", f"printf %s {value}"], capture_output=True,
                                   text=True).stdout
    env["GST_REGISTRY"] = str(tmp_path_factory.mktemp("gst") / "registry.bin")
    return env


def material(seconds: float = 3.0, seed: int = 3) -> np.ndarray:
    """Invented stereo signal: Laplacian noise whose level jumps every 250 ms,
    kept below the live-output's -1 dBFS ceiling (float32 samples)."""
    rng = np.random.default_rng(seed)
    n = int(seconds * RATE)
    level = np.repeat(rng.choice([0.004, 0.08], size=n // 12000 + 1), 12000)[:n]
    x = np.clip(rng.laplace(size=(n, 2)) * level[:, None], -0.7, 0.7)
    return x.astype(np.float32)


def launch(env, *elements: str, timeout: float = 300) -> subprocess.CompletedProcess:
    """``gst-launch-1.0`` on a pipeline given element by element."""
    args = ["gst-launch-1.0", "-q"]
    for i, element in enumerate(elements):
        if i:
            args.append("!")
        args.extend(element.split("\x00"))
    return subprocess.run(args, env=env, capture_output=True, text=True, timeout=timeout)


def chain_element(**props: str) -> str:
    """``streamq-chain`` with properties (values may hold spaces)."""
    return "\x00".join(["streamq-chain", *(f"{k.replace('_', '-')}={v}"
                                           for k, v in props.items())])


def file_pipeline(env, wav: Path, out_wav: Path, caps: str = "", **props: str):
    caps = caps or "audio/x-raw,format=F32LE"
    return launch(env, f"filesrc\x00location={wav}", "wavparse", "audioconvert", caps,
                  chain_element(**props), "audioconvert", "audio/x-raw,format=F32LE", "wavenc",
                  f"filesink\x00location={out_wav}")


def figures(meter: dict) -> dict:
    return {k: v for k, v in meter.items() if k not in VARYING}


# -- without GStreamer --------------------------------------------------------------

def test_set_property_splits_like_repeated_set_options():
    assert split_overrides("enc.bits=6, mon.gain_db=0") == ["enc.bits=6", "mon.gain_db=0"]
    assert split_overrides("enc.bits=6;mon.gain_db=0\n") == ["enc.bits=6", "mon.gain_db=0"]
    # a comma inside a value stays (the next piece does not start with NODE.FIELD=)
    assert split_overrides("enc.levels=[1, 2], enc.bits=2") == ["enc.levels=[1, 2]",
                                                                "enc.bits=2"]
    assert split_overrides("") == [] and split_overrides(None) == []


def test_gst_env_prints_export_lines_for_this_environment(tmp_path):
    res = subprocess.run([sys.executable, "-m", "streamq.cli", "gst-env"],
                         capture_output=True, text=True, timeout=60)
    lines = res.stdout.splitlines()
    assert [ln.split("=")[0] for ln in lines] == ["export GST_PLUGIN_PATH",
                                                   "export GST_REGISTRY", "export STREAMQ_VENV"]
    # eval "$(streamq gst-env)" in a shell
    shown = subprocess.run(["bash", "-c", f'eval "$({sys.executable} -m streamq.cli gst-env '
                           f'2>/dev/null)"; printf "%s\\n" "$GST_PLUGIN_PATH" "$STREAMQ_VENV"'],
                           capture_output=True, text=True, timeout=60).stdout.splitlines()
    plugin_dir = Path(shown[0].split(os.pathsep)[0])
    assert (plugin_dir / "python" / "streamq_chain.py").is_file()
    assert shown[1] == sys.prefix
    if find_loader() is None:
        assert res.returncode == 1 and "apt-get install" in res.stderr
    assert "Traceback" not in res.stderr


# -- in gst-launch-1.0 --------------------------------------------------------------

@needs_gst
def test_pipeline_equals_streamq_run(tmp_path, gst_env):
    x = material()
    wav = tmp_path / "in.wav"
    sf.write(wav, x, RATE, subtype="FLOAT")
    graph = tmp_path / "live.toml"
    graph.write_text(LIVE)
    res = file_pipeline(gst_env, wav, tmp_path / "out.wav", graph=str(graph),
                        set="mon.gain_db=0; enc.bits=4", out_dir=str(tmp_path / "gst"),
                        report=str(tmp_path / "elsewhere" / "run.json"))
    assert res.returncode == 0, res.stderr[-3000:]
    assert "Traceback" not in res.stderr

    offline = run_toml(f"""
[graph]
name = "in-a-pipeline"

[nodes.mic]
use = "file-source"
path = "{wav}"
""" + CHAIN, tmp_path / "offline", overrides=["enc.bits=4"])
    rep = json.loads((tmp_path / "gst" / "report.json").read_text())
    assert json.loads((tmp_path / "elsewhere" / "run.json").read_text()) == rep
    assert rep["complete"] is True and rep["samples"] == len(x) == offline["samples"]
    for mid in ("noise", "gain_noise"):
        assert figures(rep["meters"][mid]) == figures(offline["meters"][mid]), mid
    assert rep["nodes"]["enc"]["codebook_updates"] == offline["nodes"]["enc"]["codebook_updates"]
    assert rep["nodes"]["enc"]["late_codebooks"] == 0
    # the decoded signals written by the graph's sinks: equal bit for bit
    for name in ("decoded.wav", "gain-decoded.wav"):
        a, _ = sf.read(tmp_path / "gst" / name, dtype="float32")
        b, _ = sf.read(tmp_path / "offline" / name, dtype="float32")
        np.testing.assert_array_equal(a, b, err_msg=name)

    # what left the element: the live-output at unit gain = the gain decoder's signal,
    # except the first buffer, which the monitor ramps up from -40 dB
    y, rate = sf.read(tmp_path / "out.wav", dtype="float32")
    ref, _ = sf.read(tmp_path / "offline" / "gain-decoded.wav", dtype="float32")
    assert rate == RATE and y.shape == ref.shape == x.shape
    differ = np.nonzero(np.any(y != ref, axis=1))[0]
    first = int(differ[-1]) + 1 if len(differ) else 0
    assert first <= 16_384, "more than the first buffer differs"
    np.testing.assert_array_equal(y[first:], ref[first:])
    assert np.all(np.abs(y[:first]) <= np.abs(ref[:first]))
    assert first == 0 or np.max(np.abs(y[:first // 4])) < 0.1 * np.max(np.abs(ref[:first]))


LATENCY_SCRIPT = textwrap.dedent("""
    import json, sys
    import gi
    gi.require_version("Gst", "1.0")
    from gi.repository import Gst
    Gst.init(None)
    graph = sys.argv[1]
    pipe = Gst.parse_launch(
        "audiotestsrc num-buffers=40 samplesperbuffer=1000 ! "
        "audio/x-raw,format=F32LE,rate=48000,channels=2 ! "
        f"streamq-chain name=q graph={graph} ! fakesink name=out sync=false")
    q = pipe.get_by_name("q")
    stamps = {"in": [], "out": []}
    def keep(where):
        def probe(pad, info):
            buf = info.get_buffer()
            stamps[where].append([buf.pts, buf.duration, buf.get_size()])
            return Gst.PadProbeReturn.OK
        return probe
    q.get_static_pad("sink").add_probe(Gst.PadProbeType.BUFFER, keep("in"))
    q.get_static_pad("src").add_probe(Gst.PadProbeType.BUFFER, keep("out"))
    pipe.set_state(Gst.State.PAUSED)
    pipe.get_state(Gst.CLOCK_TIME_NONE)
    query = Gst.Query.new_latency()
    ok = q.get_static_pad("src").query(query)
    live, low, high = query.parse_latency()
    before = Gst.Query.new_latency()
    q.get_static_pad("sink").get_peer().query(before)
    upstream = before.parse_latency()[1]
    pipe.set_state(Gst.State.PLAYING)
    msg = pipe.get_bus().timed_pop_filtered(120 * Gst.SECOND,
                                            Gst.MessageType.EOS | Gst.MessageType.ERROR)
    pipe.set_state(Gst.State.NULL)
    print(json.dumps({"ok": ok, "added": low - upstream, "end": msg.type == Gst.MessageType.EOS,
                      "stamps": stamps}))
""")


@needs_gst
def test_latency_query_adds_the_graph_latency_and_timestamps_pass(tmp_path, gst_env):
    """In GStreamer's own Python: the latency query answered through the element
    carries the gain encoder's 16 ms block; buffers keep their timestamps."""
    graph = tmp_path / "gain.toml"
    graph.write_text(f"""
[graph]
name = "lookahead"
sample_rate = {RATE}
[nodes.mic]
use = "live-input"
channels = 2
[nodes.gain]
use = "encoder"
input = "mic"
method = "lloyd-max"
bits = 4
adapt = "gain"
[nodes.dec]
use = "decoder"
input = "gain"
[nodes.mon]
use = "live-output"
input = "dec"
""")
    script = tmp_path / "latency.py"
    script.write_text(LATENCY_SCRIPT)
    res = subprocess.run([SYSTEM_PYTHON, str(script), str(graph)], env=gst_env,
                         capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr[-3000:]
    got = json.loads(res.stdout.splitlines()[-1])
    assert got["ok"] and got["end"]
    assert got["added"] == 768 * 10**9 // RATE == 16_000_000      # 16 ms in nanoseconds
    assert got["stamps"]["in"] == got["stamps"]["out"] and len(got["stamps"]["in"]) == 40


BAD_GRAPH = LIVE.replace("bits = 3\nadapt", "bits = 40\nadapt")
NO_OUTPUT = LIVE.split("[nodes.mon]")[0]


@needs_gst
@pytest.mark.parametrize("case, needles", [
    ("bad-field", ["live.toml", "node 'enc', field 'bits'"]),
    ("missing-file", ["nowhere.toml", "no such graph file"]),
    ("wrong-rate", ["live.toml", "[graph], field 'sample_rate'", "48000 Hz", "44100 Hz"]),
    ("wrong-channels", ["live.toml", "node 'mic', field 'channels'", "takes 2", "has 1"]),
    ("no-live-output", ["live.toml", "one live-output", "0 live-output"]),
    ("bad-override", ["live.toml", "there is no node 'nosuch'"]),
])
def test_bad_setups_end_the_pipeline_with_one_line(tmp_path, gst_env, case, needles):
    wav = tmp_path / "in.wav"
    sf.write(wav, material(0.5), RATE, subtype="FLOAT")
    graph = tmp_path / "live.toml"
    graph.write_text({"bad-field": BAD_GRAPH, "no-live-output": NO_OUTPUT}.get(case, LIVE))
    props = {"graph": str(graph), "out_dir": str(tmp_path / "out"),
             "report": str(tmp_path / "report.json")}
    caps = ""
    if case == "missing-file":
        props["graph"] = str(tmp_path / "nowhere.toml")
    elif case == "wrong-rate":
        caps = "audioresample\x00audio/x-raw,format=F32LE,rate=44100".replace("\x00", "\x00!\x00")
    elif case == "wrong-channels":
        caps = "audio/x-raw,format=F32LE,channels=1"
    elif case == "bad-override":
        props["set"] = "enc.bits=4, nosuch.bits=3"
    res = file_pipeline(gst_env, wav, tmp_path / "out.wav", caps=caps, **props)
    assert res.returncode != 0
    errors = [ln for ln in (res.stdout + res.stderr).splitlines()
              if ln.startswith("ERROR: from element") and "streamq" in ln]
    assert errors, res.stdout + res.stderr
    for needle in needles:
        assert needle in errors[0], (needle, errors[0])
    assert "Traceback" not in res.stderr and "Traceback" not in res.stdout
    # nothing of ours written: no output folder, no report
    assert not (tmp_path / "out").exists() and not (tmp_path / "report.json").exists()


SMALL = f"""
[graph]
name = "small"
sample_rate = {RATE}
[nodes.mic]
use = "live-input"
channels = 2
[nodes.gain]
use = "encoder"
input = "mic"
method = "lloyd-max"
bits = 4
adapt = "gain"
[nodes.dec]
use = "decoder"
input = "gain"
[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"
[nodes.mon]
use = "live-output"
input = "dec"
"""


@needs_gst
def test_report_property_alone_writes_one_file(tmp_path, gst_env):
    wav = tmp_path / "in.wav"
    sf.write(wav, material(1.0), RATE, subtype="FLOAT")
    graph = tmp_path / "small.toml"
    graph.write_text(SMALL)
    res = file_pipeline(gst_env, wav, tmp_path / "out.wav", graph=str(graph),
                        report=str(tmp_path / "r.json"))
    assert res.returncode == 0, res.stderr[-3000:]
    rep = json.loads((tmp_path / "r.json").read_text())
    assert rep["complete"] and rep["samples"] == RATE and rep["meters"]["noise"]["snr_db"] > 10
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.wav", "out.wav", "r.json",
                                                          "small.toml"]


@needs_gst
def test_nonfinite_sample_stops_the_pipeline_naming_node_and_sample(tmp_path, gst_env):
    x = material(1.0)
    x[30_000, 1] = np.nan
    wav = tmp_path / "in.wav"
    sf.write(wav, x, RATE, subtype="FLOAT")
    graph = tmp_path / "small.toml"
    graph.write_text(SMALL)
    res = file_pipeline(gst_env, wav, tmp_path / "out.wav", graph=str(graph),
                        report=str(tmp_path / "r.json"), out_dir=str(tmp_path / "out"))
    assert res.returncode != 0
    errors = [ln for ln in (res.stdout + res.stderr).splitlines()
              if ln.startswith("ERROR: from element")]
    assert errors, res.stdout + res.stderr
    assert "small.toml: node 'mic': non-finite sample at sample 30000, channel 1" in errors[0]
    assert "Traceback" not in res.stderr
    # the run is reported as unfinished; no end-of-stream report file
    assert json.loads((tmp_path / "out" / "report.json").read_text())["complete"] is False
    assert not (tmp_path / "r.json").exists()
