"""Insert a streamq chain into your own sounddevice callback: the sound card's
input is quantized and the decoded signal goes back out.

    python examples/sounddevice_callback.py [SECONDS [DEVICE]]

Needs an audio device (see `streamq devices`). CAUTION: this plays the decoded
input back at unity gain once faded in; turn your monitors down first, and do
not loop the output back into the microphone. The chain's live-output starts
40 dB down, fades in over 2 s and never exceeds -1 dBFS.

``realtime=True`` keeps the callback's work small: estimators, meters and
sinks follow on a thread, designs come from a worker process, and nothing in
``process`` waits.
"""

import sys
import time

import sounddevice as sd

import streamq

GRAPH = """
[graph]
name = "my-callback"
sample_rate = 48000

[nodes.mic]
use = "live-input"
channels = 1

[nodes.enc]
use = "encoder"
input = "mic"
method = "lloyd-max"
bits = 4
adapt = "step"          # backward step adaptation: no side information, no latency

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"

[nodes.phones]
use = "live-output"
input = "dec"
gain_db = -6
"""


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 10.0
    device = sys.argv[2] if len(sys.argv) > 2 else None    # default: the system's
    chain = streamq.Chain.from_toml(GRAPH, realtime=True)
    with chain:
        def callback(indata, outdata, frames, when, status):
            outdata[:] = chain.process(indata)

        with sd.Stream(samplerate=chain.sample_rate, blocksize=256, channels=1,
                       dtype="float32", callback=callback, device=device):
            time.sleep(seconds)
    noise = chain.report["meters"]["noise"]
    print(f"SNR {noise['snr_db']:.2f} dB over {chain.report['audio_seconds']:.1f} s")


if __name__ == "__main__":
    main()
