"""Run a streamq chain over a recording in chunks of your own size, as a host
program would: read a block, push it through, use what comes back.

    python examples/process_file_in_chunks.py [OUTPUT_FOLDER]

The graph (inline below) quantizes the input with forward gain adaptation at
4 bits, decodes it, meters the noise and keeps the decoded audio. The input is
an invented test signal written first, so the example needs no files.
"""

import sys
from pathlib import Path

import numpy as np
import soundfile as sf

import streamq

GRAPH = """
[graph]
name = "chunks"
sample_rate = 48000

[nodes.mic]
use = "live-input"      # the chain's input port: fed by process()
channels = 2

[nodes.enc]
use = "encoder"
input = "mic"
method = "lloyd-max"
bits = 4
adapt = "gain"

[nodes.dec]
use = "decoder"
input = "enc"

[nodes.noise]
use = "error-meter"
reference = "mic"
input = "dec"

[nodes.keep]
use = "file-sink"
input = "dec"
path = "decoded.wav"
subtype = "PCM_24"

[nodes.out]
use = "live-output"     # the chain's output port: returned by process()
input = "dec"
gain_db = 0             # unity once faded in (this host does not play it aloud)
"""


def main() -> None:
    out = Path(sys.argv[1] if len(sys.argv) > 1 else "streamq-out/chunks")
    out.mkdir(parents=True, exist_ok=True)
    # an invented two-channel programme: noise bursts at two levels
    rng = np.random.default_rng(3)
    x = 0.1 * rng.laplace(size=(3 * 48000, 2)) * np.repeat([1.0, 0.05, 1.0], 48000)[:, None]
    sf.write(out / "input.wav", np.clip(x, -1, 1), 48000, subtype="FLOAT")

    with streamq.Chain.from_toml(GRAPH, out) as chain:
        for block in sf.blocks(str(out / "input.wav"), blocksize=1000, dtype="float32",
                               always_2d=True):
            y = chain.process(block)          # float32, same shape as the block
    noise = chain.report["meters"]["noise"]
    print(f"{chain.report['samples']} frames: SNR {noise['snr_db']:.2f} dB, "
          f"{noise['bits_per_sample']:.3f} bits/sample; decoded audio in {out / 'decoded.wav'}")


if __name__ == "__main__":   # (a chain that designs codebooks starts a worker process)
    main()
