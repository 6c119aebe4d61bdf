"""Graph files: every validation error is one line naming the file, the node and the field.

Problems found while reading the TOML are raised by ``load_graph``; problems
found while opening the nodes (a missing audio file, a sample-rate mismatch)
by ``build``. Both raise GraphError (a StreamqError) listing every problem.
"""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

from conftest import assert_names, make_audio, run_file, write_graph
from streamq.engine.graph import GraphError, load_graph, parse_graph
from streamq.engine.node import Duration
from streamq.engine.scheduler import build
from streamq.errors import StreamqError

SINK = """
    [nodes.keep]
    use = "file-sink"
    input = "feed"
    path = "out.wav"
"""
FEED = """
    [nodes.feed]
    use = "test-signal"
    seconds = 0.1
"""


def problems(tmp_path, text, overrides=()) -> tuple[str, list[str]]:
    """Load a graph expected to be bad; return (graph file name, problem lines)."""
    g = write_graph(tmp_path, text)
    with pytest.raises(GraphError) as info:
        load_graph(g, list(overrides))
    err = info.value
    assert isinstance(err, StreamqError)
    lines = str(err).splitlines()
    assert lines == err.problems
    return str(g), lines


def one_problem(tmp_path, text, overrides=()) -> tuple[str, str]:
    g, lines = problems(tmp_path, text, overrides)
    assert len(lines) == 1, lines
    return g, lines[0]


def build_problems(tmp_path, text) -> tuple[str, list[str]]:
    """A graph that validates but cannot be opened; return (graph file, problem lines)."""
    g = write_graph(tmp_path, text)
    graph = load_graph(g)
    with pytest.raises(GraphError) as info:
        build(graph, tmp_path / "out")
    return str(g), str(info.value).splitlines()


# -- a good graph first ---------------------------------------------------------------

def test_good_graph_validates_in_file_order(tmp_path):
    g = write_graph(tmp_path, SINK + FEED)  # the sink comes first in the file
    graph = load_graph(g)
    assert graph.order == ["feed", "keep"]
    assert graph.source == g
    assert graph.nodes["keep"].upstream() == {"input": "feed"}
    assert graph.header.name == "graph" and graph.header.sample_rate is None


# -- node kind and fields -------------------------------------------------------------

def test_unknown_kind(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK.replace('"file-sink"', '"file-drain"'))
    assert_names(line, g, "node 'keep'", "field 'use'", "'file-drain'")
    assert "file-sink" in line  # lists the known kinds


def test_missing_kind(tmp_path):
    g, line = one_problem(tmp_path, FEED + """
        [nodes.keep]
        input = "feed"
        path = "out.wav"
    """)
    assert_names(line, g, "node 'keep'", "field 'use'", "missing")


def test_unknown_field(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK + 'colour = "red"\n')
    assert_names(line, g, "node 'keep'", "field 'colour'", "unknown field")


def test_missing_required_field(tmp_path):
    g, line = one_problem(tmp_path, FEED + """
        [nodes.keep]
        use = "file-sink"
        input = "feed"
    """)
    assert_names(line, g, "node 'keep'", "field 'path'", "missing")


def test_missing_input(tmp_path):
    g, line = one_problem(tmp_path, FEED + """
        [nodes.keep]
        use = "file-sink"
        path = "out.wav"
    """)
    assert_names(line, g, "node 'keep'", "field 'input'", "missing")


def test_unknown_input(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK.replace('input = "feed"', 'input = "fed"'))
    assert_names(line, g, "node 'keep'", "field 'input'", "'fed'")


def test_sink_used_as_input(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK + """
        [nodes.copy]
        use = "file-sink"
        input = "keep"
        path = "copy.wav"
    """)
    assert_names(line, g, "node 'copy'", "field 'input'", "'keep'", "no output")


@pytest.mark.parametrize("field, value, expect", [
    ("seconds", '"long"', "number"),
    ("channels", '"two"', "integer"),
    ("channels", "0", "greater than or equal to 1"),
    ("scene", '"thunder"', "'tone', 'noise' or 'drift'"),
    ("seed", "1.5", "integer"),
    ("bits", "12", "16 or 24"),
])
def test_wrong_type_or_value(tmp_path, field, value, expect):
    g, line = one_problem(tmp_path, f"""
        [nodes.feed]
        use = "test-signal"
        {field} = {value}
    """ + SINK)
    assert_names(line, g, "node 'feed'", f"field '{field}'", expect)


def test_wrong_type_in_a_list(tmp_path):
    g, line = one_problem(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        channels = [1, "two"]
    """)
    assert_names(line, g, "node 'src'", "field 'channels.1'")


def test_channel_numbers_start_at_one(tmp_path):
    g, line = one_problem(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        channels = [0]
    """)
    assert_names(line, g, "node 'src'", "field 'channels'", "numbered from 1")


def test_bad_node_id(tmp_path):
    g, line = one_problem(tmp_path, FEED + """
        [nodes."2nd sink"]
        use = "file-sink"
        input = "feed"
        path = "out.wav"
    """)
    assert_names(line, g, "node '2nd sink'", "bad node id")


def test_bad_graph_header(tmp_path):
    g, lines = problems(tmp_path, """
        [graph]
        sample_rate = -8000
        blok = 64
    """ + FEED + SINK)
    assert len(lines) == 2
    assert_names(lines[0], g, "[graph]", "field 'sample_rate'")
    assert_names(lines[1], g, "[graph]", "field 'blok'")


def test_unknown_top_level_table(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK + "[links]\na = 1\n")
    assert_names(line, g, "'links'")


def test_no_nodes(tmp_path):
    g, line = one_problem(tmp_path, "[graph]\nname = 'empty'\n")
    assert_names(line, g, "no nodes")


# -- cycles (need a kind with an input and an output: the test-only 'test-gain') -------

def test_two_node_cycle(tmp_path, gain_kind):
    g, line = one_problem(tmp_path, """
        [nodes.a]
        use = "test-gain"
        input = "b"
        [nodes.b]
        use = "test-gain"
        input = "a"
    """)
    assert_names(line, g, "field 'input'", "cycle", "'a'", "'b'")
    assert "node 'a'" in line or "node 'b'" in line


def test_self_loop(tmp_path, gain_kind):
    g, line = one_problem(tmp_path, FEED + """
        [nodes.loop]
        use = "test-gain"
        input = "loop"
    """)
    assert_names(line, g, "node 'loop'", "field 'input'", "cycle", "'loop' -> 'loop'")


def test_cycle_behind_a_good_chain(tmp_path, gain_kind):
    # feed -> a is fine; b <-> c is a cycle that also feeds the sink.
    g, line = one_problem(tmp_path, FEED + """
        [nodes.a]
        use = "test-gain"
        input = "feed"
        [nodes.b]
        use = "test-gain"
        input = "c"
        [nodes.c]
        use = "test-gain"
        input = "b"
        [nodes.keep]
        use = "file-sink"
        input = "c"
        path = "out.wav"
    """)
    assert_names(line, g, "cycle", "'b'", "'c'")
    assert "'keep'" not in line and "'a'" not in line


def test_sink_self_loop_reports_both_problems(tmp_path):
    g, lines = problems(tmp_path, FEED + """
        [nodes.keep]
        use = "file-sink"
        input = "keep"
        path = "out.wav"
    """)
    assert len(lines) == 2
    assert_names(lines[0], g, "node 'keep'", "field 'input'", "no output")
    assert_names(lines[1], g, "node 'keep'", "field 'input'", "cycle")


# -- durations ----------------------------------------------------------------------

@pytest.mark.parametrize("raw, rate, samples", [
    (4800, 48_000, 4800),
    ("4800", 48_000, 4800),
    ("4800 samples", 48_000, 4800),
    ("1 sample", 48_000, 1),
    ("100 ms", 48_000, 4800),
    ("100ms", 44_100, 4410),
    ("0.5 s", 44_100, 22_050),
    ("2 s", 8000, 16_000),
    ("1e3 ms", 8000, 8000),
    ("0.03125 ms", 48_000, 2),  # 1.5 samples, rounded to nearest
    (0, 48_000, 0),
])
def test_duration_parse(raw, rate, samples):
    assert Duration.parse(raw).samples(rate) == samples


def test_duration_round_trip_text():
    assert repr(Duration.parse("100 ms")) == "100 ms"
    assert repr(Duration.parse("0.5 s")) == "0.5 s"
    assert repr(Duration.parse(4800)) == "4800"
    assert Duration.parse("4800 samples") == Duration.parse(4800)


@pytest.mark.parametrize("raw", [
    "ten ms", "100 min", "1.5 samples", "-5 ms", "", "ms", "5 ms 3", -1, 1.5, True, None, [100],
])
def test_bad_duration(raw):
    with pytest.raises(ValueError) as info:
        Duration.parse(raw)
    msg = str(info.value)
    assert "\n" not in msg and msg


@pytest.mark.parametrize("value, expect", [
    ('"ten ms"', "bad duration 'ten ms'"),
    ('"1.5 samples"', "not a whole number of samples"),
    ("-3", "must not be negative"),
    ("0.25", "bad duration"),
])
def test_bad_duration_in_a_graph(tmp_path, gain_kind, value, expect):
    g, line = one_problem(tmp_path, FEED + f"""
        [nodes.amp]
        use = "test-gain"
        input = "feed"
        hold = {value}
    """)
    assert_names(line, g, "node 'amp'", "field 'hold'", expect)


@pytest.mark.parametrize("table, field, expect", [
    ('use = "pdf-estimator"\ninput = "feed"\nwindow = "ten ms"', "window", "bad duration 'ten ms'"),
    ('use = "file-source"\npath = "x.wav"\nchannels = [0]', "channels", "channels are numbered"),
    ('use = "encoder"\ninput = "feed"\nbits = 4\nlevels = 16', "levels", "give bits or levels"),
])
def test_messages_carry_no_pydantic_prefix(tmp_path, table, field, expect):
    # What a validator raises is the whole message: pydantic's "Value error, " in
    # front of it says nothing to the user (field checks and cross-field checks alike).
    g, line = one_problem(tmp_path, FEED + "[nodes.bad]\n" + table + "\n")
    assert_names(line, g, "node 'bad'", f"field '{field}'")
    assert line.split(f"field '{field}': ", 1)[1].startswith(expect), line
    assert "Value error" not in line and "Assertion failed" not in line


def test_good_duration_in_a_graph(tmp_path, gain_kind):
    g = write_graph(tmp_path, """
        [graph]
        sample_rate = 8000
    """ + FEED + """
        [nodes.amp]
        use = "test-gain"
        input = "feed"
        hold = "25 ms"
    """)
    graph = load_graph(g)
    assert graph.nodes["amp"].config.hold == Duration(25, "ms")
    build(graph, tmp_path / "o")
    assert graph.nodes["amp"].hold_samples == 200


# -- problems found when opening the nodes --------------------------------------------

def test_sample_rate_mismatch(tmp_path):
    make_audio(tmp_path / "take.wav", frames=1000, channels=1, rate=44_100)
    g, lines = build_problems(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.src]
        use = "file-source"
        path = "take.wav"
    """)
    assert len(lines) == 1
    assert_names(lines[0], g, "node 'src'", "field 'path'", "take.wav", "44100 Hz", "48000 Hz")


def test_rate_taken_from_the_file_when_not_given(tmp_path):
    make_audio(tmp_path / "take.wav", frames=1000, channels=1, rate=22_050)
    g = write_graph(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        [nodes.keep]
        use = "file-sink"
        input = "src"
        path = "out.wav"
    """)
    result = run_file(g, tmp_path / "o")
    assert result.report["sample_rate"] == 22_050
    assert sf.info(str(tmp_path / "o" / "out.wav")).samplerate == 22_050


def test_two_files_at_different_rates(tmp_path):
    make_audio(tmp_path / "a.wav", frames=1000, channels=1, rate=44_100)
    make_audio(tmp_path / "b.wav", frames=1000, channels=1, rate=48_000)
    g, lines = build_problems(tmp_path, """
        [nodes.a]
        use = "file-source"
        path = "a.wav"
        [nodes.b]
        use = "file-source"
        path = "b.wav"
    """)
    assert len(lines) == 1
    assert_names(lines[0], g, "node 'b'", "field 'path'", "b.wav", "48000 Hz", "44100 Hz")


def test_missing_input_file(tmp_path):
    g, lines = build_problems(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.src]
        use = "file-source"
        path = "nowhere/take.wav"
    """)
    assert len(lines) == 1
    assert_names(lines[0], g, "node 'src'", "field 'path'", str(tmp_path / "nowhere" / "take.wav"),
                 "no such file")


@pytest.mark.parametrize("content, expect", [
    (b"", "empty"),
    (b"this is not audio at all, just text" * 10, "not a readable audio file"),
])
def test_unreadable_input_file(tmp_path, content, expect):
    (tmp_path / "take.wav").write_bytes(content)
    g, lines = build_problems(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.src]
        use = "file-source"
        path = "take.wav"
    """)
    assert len(lines) == 1
    assert_names(lines[0], g, "node 'src'", "field 'path'", "take.wav", expect)


def test_picking_a_channel_the_file_lacks(tmp_path):
    make_audio(tmp_path / "take.wav", frames=1000, channels=2, rate=48_000)
    g, lines = build_problems(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
        channels = [3]
    """)
    assert len(lines) == 1
    assert_names(lines[0], g, "node 'src'", "field 'channels'", "2 channel(s)", "channel 3")


def test_nonfinite_sample_is_refused_with_its_position(tmp_path):
    x = np.zeros((5000, 1))
    x[4321, 0] = np.nan
    sf.write(str(tmp_path / "take.wav"), x, 48_000, subtype="FLOAT")
    g = write_graph(tmp_path, """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
    """)
    with pytest.raises(StreamqError) as info:
        run_file(g, tmp_path / "o", block=1000)
    assert_names(str(info.value), "node 'src'", "field 'path'", "take.wav", "sample 4321")


def test_several_build_problems_at_once(tmp_path):
    make_audio(tmp_path / "a.wav", frames=1000, channels=1, rate=44_100)
    g, lines = build_problems(tmp_path, """
        [graph]
        sample_rate = 48000
        [nodes.a]
        use = "file-source"
        path = "a.wav"
        [nodes.b]
        use = "file-source"
        path = "b.wav"
        [nodes.tone]
        use = "test-signal"
        scene = "tone"
        frequency = 30000
    """)
    assert len(lines) == 3
    assert_names(lines[0], g, "node 'a'", "field 'path'", "44100 Hz")
    assert_names(lines[1], g, "node 'b'", "field 'path'", "no such file")
    assert_names(lines[2], g, "node 'tone'", "field 'frequency'", "half the sample rate")


def test_precheck_lists_source_problems_with_validation_problems(tmp_path):
    # No graph.sample_rate: the rate comes from the first file (44.1 kHz), as in a
    # build. The unknown field is a validation problem; the second file's rate and
    # the tone above half the rate are seen by the nodes' prechecks, in file order.
    make_audio(tmp_path / "a.wav", frames=1000, channels=1, rate=44_100)
    make_audio(tmp_path / "b.wav", frames=1000, channels=1, rate=48_000)
    g = write_graph(tmp_path, """
        [nodes.a]
        use = "file-source"
        path = "a.wav"
        [nodes.b]
        use = "file-source"
        path = "b.wav"
        [nodes.tone]
        use = "test-signal"
        scene = "tone"
        frequency = 30000
        [nodes.keep]
        use = "file-sink"
        input = "a"
        path = "out.wav"
        loudness = 3
    """)
    with pytest.raises(GraphError) as info:
        load_graph(g, precheck=True)
    lines = str(info.value).splitlines()
    assert len(lines) == 3, lines
    assert_names(lines[0], str(g), "node 'keep'", "field 'loudness'")
    assert_names(lines[1], str(g), "node 'b'", "field 'path'", "48000 Hz", "44100 Hz")
    assert_names(lines[2], str(g), "node 'tone'", "field 'frequency'", "half the sample rate")
    # Without precheck (the library default) validation stops at what it sees itself.
    with pytest.raises(GraphError) as info:
        load_graph(g)
    assert len(str(info.value).splitlines()) == 1


# -- TOML syntax ----------------------------------------------------------------------

def test_toml_syntax_error_has_line_and_column(tmp_path):
    g, line = one_problem(tmp_path, """
        [nodes.feed]
        use = "test-signal"
        seconds = = 3
    """)
    assert_names(line, g, "TOML syntax error", "line 3", "column 11")


def test_toml_syntax_error_without_a_file():
    with pytest.raises(GraphError) as info:
        parse_graph("[nodes.feed\n")
    assert_names(str(info.value), "<graph>", "TOML syntax error", "line 1")


def test_missing_graph_file(tmp_path):
    with pytest.raises(StreamqError) as info:
        load_graph(tmp_path / "nope.toml")
    assert_names(str(info.value), str(tmp_path / "nope.toml"), "no such graph file")


# -- --set overrides ------------------------------------------------------------------

def test_set_overrides_with_their_value_types(tmp_path):
    make_audio(tmp_path / "take.wav", frames=1000, channels=2, rate=48_000)
    g = write_graph(tmp_path, FEED + SINK + """
        [nodes.src]
        use = "file-source"
        path = "take.wav"
    """)
    graph = load_graph(g, [
        "feed.seconds=2",             # integer text, number field
        "feed.channels=3",            # integer
        "feed.scene=tone",            # bare text becomes a string
        'feed.pdf="laplacian"',       # quoted TOML string
        "feed.level=-6.5",            # float
        "keep.path=elsewhere.flac",   # bare text with a dot
        "src.channels=[2, 1]",        # TOML list
        "src.nonfinite = zero",       # spaces around '='
        "graph.sample_rate=44100",    # the header
        "graph.name=my take",         # text with a space
    ])
    feed, keep, src = graph.nodes["feed"].config, graph.nodes["keep"].config, graph.nodes["src"].config
    assert feed.seconds == 2.0 and isinstance(feed.seconds, float)
    assert feed.channels == 3 and feed.scene == "tone" and feed.pdf == "laplacian"
    assert feed.level == -6.5
    assert keep.path == "elsewhere.flac"
    assert src.channels == [2, 1] and src.nonfinite == "zero"
    assert graph.header.sample_rate == 44_100 and graph.name == "my take"


def test_set_can_add_a_missing_field(tmp_path):
    g = write_graph(tmp_path, FEED + """
        [nodes.keep]
        use = "file-sink"
        input = "feed"
    """)
    graph = load_graph(g, ["keep.path=late.wav"])
    assert graph.nodes["keep"].config.path == "late.wav"


def test_set_unknown_node(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK, ["enc.bits=6"])
    assert_names(line, g, "--set", "enc.bits=6", "no node 'enc'")


def test_set_unknown_field(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK, ["feed.bitz=6"])
    assert_names(line, g, "node 'feed'", "field 'bitz'", "unknown field")


def test_set_wrong_type(tmp_path):
    g, line = one_problem(tmp_path, FEED + SINK, ["feed.channels=two"])
    assert_names(line, g, "node 'feed'", "field 'channels'", "integer")


@pytest.mark.parametrize("item", ["feed.seconds", "seconds=3", "feed.x.y=3", ".seconds=3"])
def test_set_bad_syntax(tmp_path, item):
    g, line = one_problem(tmp_path, FEED + SINK, [item])
    assert_names(line, g, "--set", item, "NODE.FIELD=VALUE")


@pytest.mark.parametrize("text, item, expect", [
    ("[nodes]\nfeed = 3\n", "feed.seconds=2", "node 'feed' is not a table"),
    ("graph = 3\n[nodes.feed]\nuse = 'test-signal'\n", "graph.name=x", "'graph' is not a table"),
])
def test_set_into_something_that_is_not_a_table(tmp_path, text, item, expect):
    g, lines = problems(tmp_path, text, [item])
    assert_names(lines[0], g, "--set", item, expect)


# -- many problems at once ------------------------------------------------------------

def test_several_problems_reported_at_once(tmp_path):
    g, lines = problems(tmp_path, """
        [graph]
        sample_rate = "fast"

        [nodes.feed]
        use = "test-signal"
        seconds = -1
        colour = "red"

        [nodes.keep]
        use = "file-sink"
        input = "nobody"
        path = "out.wav"

        [nodes.odd]
        use = "no-such-kind"
    """, ["ghost.bits=3"])
    assert len(lines) == 6, lines
    expected = [
        ("--set", "no node 'ghost'"),
        ("[graph]", "field 'sample_rate'"),
        ("node 'feed'", "field 'seconds'", "greater than 0"),
        ("node 'feed'", "field 'colour'", "unknown field"),
        ("node 'odd'", "field 'use'", "'no-such-kind'"),
        ("node 'keep'", "field 'input'", "'nobody'"),
    ]
    for parts in expected:
        assert any(all(p in line for p in parts) for line in lines), (parts, lines)
    for line in lines:
        assert line.startswith(f"{g}: ")


@pytest.mark.parametrize("adapt, size, bad", [
    ("trailing", "bits = 13", True),
    ("trailing", "levels = 4097", True),
    ("trailing", "bits = 12", False),
    ("fixed", "bits = 13", False),      # a fixed design on a model PDF has no DP limit
])
def test_optimal_on_histograms_has_a_level_limit(tmp_path, adapt, size, bad):
    text = FEED + f"""
        [nodes.stats]
        use = "pdf-estimator"
        input = "feed"

        [nodes.enc]
        use = "encoder"
        input = "feed"
        pdf = "stats"
        method = "optimal"
        adapt = "{adapt}"
        {size}
    """
    if bad:
        g, line = one_problem(tmp_path, text)
        field = size.split()[0]
        assert_names(line, g, "node 'enc'", f"field '{field}'", "at most 4096 levels")
    else:
        load_graph(write_graph(tmp_path, text))


def test_wiring_checked_together_with_field_problems(tmp_path):
    """One check lists everything: an unknown kind in one node, and in another a field
    problem and an input naming no node (the dangling input used to go unsaid until the
    fields passed)."""
    text = """
[graph]
name = "many"
[nodes.feed]
use = "tone-maker"
[nodes.m]
use = "error-meter"
reference = "feed"
input = "ghost"
frame = "bad"
"""
    with pytest.raises(GraphError) as err:
        parse_graph(text, tmp_path / "g.toml")
    problems = err.value.problems
    assert any("node 'feed', field 'use': unknown node kind" in p for p in problems)
    assert any("node 'm', field 'frame'" in p for p in problems)
    assert any("node 'm', field 'input': no node named 'ghost'" in p for p in problems)
    assert len(problems) == 3
