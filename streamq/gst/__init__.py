"""streamq inside GStreamer pipelines.

The element ``streamq-chain`` lives in ``python/streamq_chain.py`` beside this
file. GStreamer's Python plugin loader (Debian: ``python3-gst-1.0`` and
``gstreamer1.0-python3-plugin-loader``) loads it when ``GST_PLUGIN_PATH``
names this folder; ``streamq gst-env`` prints the variables to set.
"""

from __future__ import annotations

from pathlib import Path

#: the folder GST_PLUGIN_PATH must name (it holds ``python/streamq_chain.py``)
PLUGIN_DIR = Path(__file__).resolve().parent

#: the environment variable that names the virtual environment the element imports streamq from
VENV_VARIABLE = "STREAMQ_VENV"

#: the element's factory name, as pipelines write it
ELEMENT = "streamq-chain"
