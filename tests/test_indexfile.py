"""Index-stream files: round trips, block-size invariance, every reader/writer
check, the two node kinds, and a fuzz of the reader.

Files for the error cases are put together here byte by byte from the layout
in docs/index-file.md (not with IndexWriter), so these tests also pin the
documented format.

The fuzz runs 4000 examples by default; set STREAMQ_FUZZ_EXAMPLES for a
longer run, e.g. ``STREAMQ_FUZZ_EXAMPLES=100000 pytest tests/test_indexfile.py -k fuzz``.
"""

from __future__ import annotations

import atexit
import json
import os
import re
import shutil
import struct
import tempfile
import zlib
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from kernel_reference import index_versions
from streamq.engine.blocks import (CodebookUpdate, IndexBlock, Packet, PdfSnapshot, SignalBlock,
                                   StreamSpec, index_dtype)
from streamq.engine.indexio import IndexReader, IndexWriter, read_spec
from streamq.engine.node import RunContext
from streamq.errors import StreamqError

RATE = 48_000

# ----------------------------------------------------------------------------- helpers


def make_spec(channels=2, n_levels=16, frames=None, **coding) -> StreamSpec:
    extra = {"coding": {"mode": "trailing", "method": "lloyd-max", **coding},
             "n_levels": n_levels, "index_dtype": index_dtype(n_levels).name}
    return StreamSpec("index", RATE, channels, 0, None, frames, extra)


def codebook(version, at, ch, L, rng=None, bits=None, method="lloyd-max") -> CodebookUpdate:
    rng = rng or np.random.default_rng(version * 7919 + at)
    lev = np.sort(rng.normal(size=L))
    thr = (lev[1:] + lev[:-1]) / 2 if L > 1 else np.empty(0)
    if L > 2 and not np.all(np.diff(thr) > 0):  # ties are vanishingly rare; avoid them
        lev = np.linspace(-1, 1, L)
        thr = (lev[1:] + lev[:-1]) / 2
    return CodebookUpdate(version, at, ch, thr, lev, 32 * L if bits is None else bits, method)


def random_stream(rng, total, channels, L, n_events):
    """Indices and sample-ordered codebook updates (one per channel at sample 0)."""
    data = rng.integers(0, L, size=(total, channels), dtype=np.uint64).astype(index_dtype(L))
    ats = sorted(rng.integers(0, max(total, 1), size=n_events).tolist())
    version = [0] * channels
    events = [codebook(0, 0, c, L, rng) for c in range(channels)] if total else []
    for at in ats if total else []:
        c = int(rng.integers(channels))
        version[c] += 1
        events.append(codebook(version[c], at, c, L, rng))
    return data, events


def packets(data, events, sizes):
    """Cut a stream into packets of the given sizes (cycled), events with their packet."""
    out, s, k = [], 0, 0
    total, channels = data.shape
    while s < total:
        n = min(sizes[k % len(sizes)], total - s)
        k += 1
        e = s + n
        evs = tuple(ev for ev in events if s <= ev.at_sample < e)
        block = IndexBlock(data[s:e], s, RATE, index_versions(events, channels, s, e))
        out.append(Packet(block, evs))
        s = e
    return out


def write_file(path, spec, data, events, sizes=(256,), complete=True, **kw):
    with IndexWriter(path, spec, **kw) as w:
        for p in packets(data, events, sizes):
            w.write(p)
        w.close(complete)
    return w


def same_event(a: CodebookUpdate, b: CodebookUpdate) -> bool:
    return (a.version, a.at_sample, a.channel, a.side_info_bits, a.method) == \
           (b.version, b.at_sample, b.channel, b.side_info_bits, b.method) \
        and np.array_equal(a.thresholds, b.thresholds) and np.array_equal(a.levels, b.levels)


def read_all(path, sizes):
    """Read a file in the given step sizes (cycled): (data, events, packets)."""
    pieces, events, pk = [], [], []
    with IndexReader(path) as r:
        k = 0
        while True:
            p = r.read(sizes[k % len(sizes)])
            k += 1
            if p is None:
                break
            pk.append(p)
            pieces.append(p.block.data)
            events.extend(p.events)
    data = np.concatenate(pieces) if pieces else None
    return data, events, pk


# -- the documented layout, byte by byte (independent of IndexWriter) -----------------

def crc(b: bytes) -> int:
    return zlib.crc32(b) & 0xFFFFFFFF


def header_dict(channels=2, n_levels=4, frames=None, **over):
    h = {"kind": "index", "rate": RATE, "channels": channels, "latency": 0, "int_bits": None,
         "frames": frames, "extra": {"coding": {"mode": "fixed"}, "n_levels": n_levels,
                                     "index_dtype": index_dtype(n_levels).name}}
    h.update(over)
    return h


def preamble(header, version=1, magic=b"SQ-INDEX"):
    payload = json.dumps(header).encode() if isinstance(header, dict) else header
    vl = struct.pack("<II", version, len(payload))
    return magic + vl + payload + struct.pack("<I", crc(vl + payload))


def record(rtype, body):
    head = struct.pack("<II", rtype, len(body))
    return head + body + struct.pack("<I", crc(head + body))


def rec_codebook(at, ch, thr, lev, version=0, bits=0, method=b"m", L=None):
    thr = np.asarray(thr, "<f8")
    lev = np.asarray(lev, "<f8")
    L = len(lev) if L is None else L
    head = struct.pack("<qqqIIHH", at, version, bits, ch, L, len(method), 0)
    return record(1, head + method + thr.tobytes() + lev.tobytes())


def rec_chunk(start, data, itemsize=None, channels=None):
    data = np.asarray(data)
    itemsize = itemsize or data.dtype.itemsize
    channels = channels or data.shape[1]
    head = struct.pack("<QIHBB", start, data.shape[0], channels, itemsize, 0)
    return record(2, head + data.astype(data.dtype.newbyteorder("<")).tobytes())


def rec_end(total, n_codebooks, complete=1):
    return record(3, struct.pack("<QQB7x", total, n_codebooks, complete))


LEV4 = [-1.5, -0.5, 0.5, 1.5]
THR4 = [-1.0, 0.0, 1.0]


def good_records(channels=2):
    """A small valid body: codebooks for every channel at 0, two chunks, one update."""
    d0 = np.array([[0, 1], [2, 3], [3, 0]], np.uint8)[:, :channels]
    d1 = np.array([[1, 1], [0, 2]], np.uint8)[:, :channels]
    recs = [rec_codebook(0, c, THR4, LEV4) for c in range(channels)]
    recs += [rec_chunk(0, d0), rec_codebook(4, 0, THR4, [-2, -1, 1, 2], version=1),
             rec_chunk(3, d1), rec_end(5, channels + 1)]
    return recs


def blob(*parts) -> bytes:
    return b"".join(parts)


def put(tmp_path, content: bytes, name="x.sqi") -> Path:
    p = tmp_path / name
    p.write_bytes(content)
    return p


def read_through(path):
    with IndexReader(path) as r:
        return list(r)


def expect_error(path, *needles):
    with pytest.raises(StreamqError) as ei:
        read_through(path)
    msg = str(ei.value)
    assert str(path) in msg
    assert "\n" not in msg
    for n in needles:
        assert n in msg, msg
    return msg


# ----------------------------------------------------------------------------- round trips


def test_small_round_trip(tmp_path):
    spec = make_spec(2, 16, frames=1000)
    rng = np.random.default_rng(1)
    data, events = random_stream(rng, 1000, 2, 16, 5)
    w = write_file(tmp_path / "a.sqi", spec, data, events, sizes=(300,), chunk_frames=100)
    assert w.frames == 1000 and w.codebook_updates == 7 and w.complete
    assert w.bytes == (tmp_path / "a.sqi").stat().st_size
    assert not (tmp_path / ".a.sqi.part").exists()
    got, evs, _ = read_all(tmp_path / "a.sqi", [77])
    assert got.dtype == np.uint8 and np.array_equal(got, data)
    assert len(evs) == len(events) and all(map(same_event, evs, events))
    s, total, complete = read_spec(tmp_path / "a.sqi")
    assert s == spec and total == 1000 and complete


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), channels=st.integers(1, 3),
       L=st.sampled_from([1, 2, 3, 16, 255, 256, 257, 3000, 70_000]),
       total=st.integers(0, 2500), n_events=st.integers(0, 12),
       wsizes=st.lists(st.integers(1, 900), min_size=1, max_size=5),
       rsizes=st.lists(st.integers(1, 900), min_size=1, max_size=5),
       chunk=st.one_of(st.none(), st.integers(1, 700)))
def test_round_trip_any_block_sizes(seed, channels, L, total, n_events, wsizes, rsizes, chunk):
    if L == 70_000:
        total, n_events = min(total, 300), min(n_events, 2)  # big codebooks: keep it quick
    rng = np.random.default_rng(seed)
    data, events = random_stream(rng, total, channels, L, n_events)
    spec = make_spec(channels, L, frames=total)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "s.sqi"
        write_file(path, spec, data, events, sizes=wsizes, chunk_frames=chunk)
        got, evs, pk = read_all(path, rsizes)
        with IndexReader(path) as r:
            assert r.spec == spec and r.total_frames == total and r.complete
            stored = list(r)
    if total == 0:
        assert got is None and evs == [] and stored == []
        return
    assert got.dtype == data.dtype and np.array_equal(got, data)
    assert len(evs) == len(events) and all(map(same_event, evs, events))
    for stream in (pk, stored):
        pos = 0
        for p in stream:
            assert p.start == pos and p.block.rate == RATE
            assert all(p.start <= e.at_sample < p.block.stop for e in p.events)
            assert p.block.versions == index_versions(events, channels, p.start, p.block.stop)
            pos = p.block.stop
        assert pos == total
    # the asked sizes are honoured exactly (the last one may be short)
    sizes = [p.frames for p in pk]
    want = [rsizes[k % len(rsizes)] for k in range(len(sizes))]
    assert sizes[:-1] == want[:-1] and 0 < sizes[-1] <= want[-1]


def test_file_bytes_do_not_depend_on_writer_block_size(tmp_path):
    """Rule 1 (block-size invariance) down to the bytes of the file."""
    rng = np.random.default_rng(7)
    data, events = random_stream(rng, 70_000, 2, 256, 20)
    spec = make_spec(2, 256, frames=70_000)
    blobs = []
    for i, sizes in enumerate([(1_000_000,), (65_536,), (256,), (7, 1, 300)]):
        write_file(tmp_path / f"{i}.sqi", spec, data, events, sizes=sizes)
        blobs.append((tmp_path / f"{i}.sqi").read_bytes())
    assert all(b == blobs[0] for b in blobs[1:])
    ref = None
    for sizes in ([1, 7], [256], [65_536], [100_000]):
        if sizes == [1, 7]:
            got, evs, _ = read_all(tmp_path / "0.sqi", [4093, 7, 1])  # odd steps, not per sample
        else:
            got, evs, _ = read_all(tmp_path / "0.sqi", sizes)
        assert np.array_equal(got, data)
        if ref is None:
            ref = evs
        assert all(map(same_event, evs, ref)) and len(evs) == len(ref) == len(events)


def test_stored_packets_and_read_can_be_mixed(tmp_path):
    rng = np.random.default_rng(3)
    data, events = random_stream(rng, 500, 1, 4, 6)
    write_file(tmp_path / "m.sqi", make_spec(1, 4), data, events, chunk_frames=128)
    with IndexReader(tmp_path / "m.sqi") as r:
        a = r.read(50)
        it = iter(r)
        b = next(it)   # rest of the first stored chunk
        c = r.read(200)
        rest = list(it)
    assert (a.start, a.frames, b.start, b.frames, c.start, c.frames) == (0, 50, 50, 78, 128, 200)
    got = np.concatenate([p.block.data for p in [a, b, c] + rest])
    assert np.array_equal(got, data)


def test_empty_stream(tmp_path):
    w = write_file(tmp_path / "e.sqi", make_spec(), np.zeros((0, 2), np.uint8), [])
    assert w.frames == 0
    with IndexReader(tmp_path / "e.sqi") as r:
        assert r.total_frames == 0 and r.read(10) is None and list(r) == []


def test_interrupted_run_closes_with_complete_false(tmp_path):
    rng = np.random.default_rng(5)
    data, events = random_stream(rng, 1000, 2, 16, 3)
    with IndexWriter(tmp_path / "i.sqi", make_spec(frames=5000)) as w:
        for p in packets(data, events, [100])[:4]:
            w.write(p)
        w.close(complete=False)
    with IndexReader(tmp_path / "i.sqi") as r:
        assert not r.complete and r.total_frames == 400 and r.spec.frames == 5000
        assert np.array_equal(np.concatenate([p.block.data for p in r]), data[:400])


def test_context_manager_marks_an_exception_as_incomplete(tmp_path):
    rng = np.random.default_rng(6)
    data, events = random_stream(rng, 300, 1, 8, 0)
    with pytest.raises(KeyboardInterrupt):
        with IndexWriter(tmp_path / "k.sqi", make_spec(1, 8)) as w:
            w.write(packets(data, events, [300])[0])
            raise KeyboardInterrupt
    _, total, complete = read_spec(tmp_path / "k.sqi")
    assert total == 300 and not complete


def test_final_name_appears_only_on_close(tmp_path):
    rng = np.random.default_rng(2)
    data, events = random_stream(rng, 200, 1, 4, 0)
    w = IndexWriter(tmp_path / "sub" / "f.sqi", make_spec(1, 4))
    w.write(packets(data, events, [200])[0])
    assert (tmp_path / "sub" / ".f.sqi.part").exists()
    assert not (tmp_path / "sub" / "f.sqi").exists()
    w.close()
    assert (tmp_path / "sub" / "f.sqi").exists()
    assert not (tmp_path / "sub" / ".f.sqi.part").exists()


def test_write_failure_leaves_nothing(tmp_path):
    rng = np.random.default_rng(2)
    data, events = random_stream(rng, 200_000, 1, 4, 0)
    w = IndexWriter(tmp_path / "w.sqi", make_spec(1, 4))

    class Full:
        def __init__(self, f):
            self.f = f

        def write(self, b):
            raise OSError(28, "No space left on device")

        def close(self):
            self.f.close()

    w._f = Full(w._f)
    with pytest.raises(StreamqError, match=r"write failed .*No space left.*nothing was left"):
        for p in packets(data, events, [65_536]):
            w.write(p)
    w.close()  # after a failure: nothing to do
    assert list(tmp_path.iterdir()) == []


def test_numpy_scalars_and_float32_codebooks_are_accepted(tmp_path):
    spec = StreamSpec("index", RATE, 1, np.int64(0).item(), None, None,
                      {"coding": {"bits": np.int64(2), "step": np.float32(0.5)},
                       "n_levels": np.int64(4), "index_dtype": "uint8"})
    cb = CodebookUpdate(np.int64(3), np.int64(0), np.int64(0), np.float32(THR4),
                        np.float32(LEV4), np.int64(64), "uniform")
    with IndexWriter(tmp_path / "n.sqi", spec) as w:
        w.write(Packet(IndexBlock(np.zeros((4, 1), np.uint8), np.int64(0), RATE), (cb,)))
    with IndexReader(tmp_path / "n.sqi") as r:
        assert r.spec == spec
        (p,) = list(r)
    assert p.events[0].version == 3 and p.events[0].levels.dtype == np.float64


def test_pdf_snapshots_are_not_stored(tmp_path):
    snap = PdfSnapshot(2, 0, 0, np.zeros(3), np.ones(3))
    with IndexWriter(tmp_path / "p.sqi", make_spec(1, 4)) as w:
        w.write(Packet(IndexBlock(np.zeros((4, 1), np.uint8), 0, RATE),
                       (codebook(0, 0, 0, 4), snap)))
    assert w.skipped_events == 1 and w.codebook_updates == 1


# ----------------------------------------------------------------------------- writer checks


def _writer(tmp_path, channels=2, L=16):
    return IndexWriter(tmp_path / "v.sqi", make_spec(channels, L))


def _ib(data, start=0):
    return IndexBlock(np.asarray(data, np.uint8), start, RATE)


@pytest.mark.parametrize("packet_fn, needle", [
    (lambda: Packet(SignalBlock(np.zeros((4, 2)), 0, RATE)), "holds a signal block"),
    (lambda: Packet(_ib(np.zeros((4, 3)))), "has shape (4, 3)"),
    (lambda: Packet(_ib(np.zeros((4, 2)), start=5)), "packets must be contiguous"),
    (lambda: Packet(_ib([[0, 0], [16, 0]]), (codebook(0, 0, 0, 16), codebook(0, 0, 1, 16))),
     "index out of range at sample 1, channel 0"),
    (lambda: Packet(_ib(np.zeros((4, 2))), (codebook(0, 0, 0, 16),)),
     "indices before any codebook for channel 1 at sample 0"),
    (lambda: Packet(_ib(np.zeros((4, 2))), (codebook(0, 0, 0, 16), codebook(0, 4, 1, 16))),
     "must fall inside it"),
    (lambda: Packet(_ib(np.zeros((4, 2))), (codebook(0, 2, 0, 16), codebook(0, 0, 1, 16))),
     "events must be in sample order"),
    (lambda: Packet(_ib(np.zeros((4, 2))), (codebook(0, 0, 2, 16),)),
     "codebook for channel 2 but the stream has 2 channel(s)"),
    (lambda: Packet(_ib(np.zeros((4, 2))), (codebook(0, 0, 0, 8),)),
     "L=8 levels but the stream has n_levels=16"),
    (lambda: Packet(_ib(np.zeros((4, 2))), (CodebookUpdate(0, 0, 0, np.array(THR4[::-1]),
                                                           np.array(LEV4), 0),)),
     "L=4 levels"),
])
def test_writer_refuses_bad_packets(tmp_path, packet_fn, needle):
    w = _writer(tmp_path)
    with pytest.raises(StreamqError) as ei:
        w.write(packet_fn())
    assert needle in str(ei.value) and str(w.path) in str(ei.value)
    w.discard()


def test_writer_refuses_bad_codebooks(tmp_path):
    w = _writer(tmp_path, 1, 4)
    blk = _ib(np.zeros((4, 1)))
    for thr, lev, needle in [(THR4[::-1], LEV4, "thresholds are not increasing"),
                             ([-1, 0, 0], LEV4, "(threshold 2 = 0.0 after 0.0)"),
                             ([-1, np.nan, 1], LEV4, "non-finite"),
                             (THR4, [-1, 0, np.inf, 2], "non-finite"),
                             (THR4 + [2.0], LEV4, "4 thresholds for L=4 levels (expected 3)")]:
        cb = CodebookUpdate(0, 0, 0, np.array(thr, float), np.array(lev, float), 0)
        with pytest.raises(StreamqError, match=re.escape(needle)):
            w.write(Packet(blk, (cb,)))
    assert w.frames == 0  # nothing of a refused packet was taken
    w.write(Packet(blk, (codebook(0, 0, 0, 4),)))
    w.close()
    assert read_spec(w.path)[1] == 4


@pytest.mark.parametrize("spec, needle", [
    (StreamSpec("signal", RATE, 1), "kind is 'signal'"),
    (StreamSpec("index", RATE, 1, extra={"n_levels": 4, "index_dtype": "uint8"}),
     "extra.coding is missing"),
    (StreamSpec("index", RATE, 1, extra={"coding": {}, "n_levels": 300, "index_dtype": "uint8"}),
     "cannot hold indices up to 299"),
    (StreamSpec("index", RATE, 1, extra={"coding": {"f": float("nan")}, "n_levels": 4,
                                         "index_dtype": "uint8"}), "not JSON-able"),
    (StreamSpec("index", RATE, 1, extra={"coding": {"f": object()}, "n_levels": 4,
                                         "index_dtype": "uint8"}), "not JSON-able"),
])
def test_writer_refuses_bad_specs(tmp_path, spec, needle):
    with pytest.raises(StreamqError, match=needle):
        IndexWriter(tmp_path / "s.sqi", spec)
    assert list(tmp_path.iterdir()) == []


# ----------------------------------------------------------------------------- reader checks


def test_documented_layout_reads(tmp_path):
    """A file put together from docs/index-file.md reads as expected."""
    p = put(tmp_path, blob(preamble(header_dict()), *good_records()))
    with IndexReader(p) as r:
        assert r.total_frames == 5 and r.complete
        pk = list(r)
    assert [(q.start, q.frames) for q in pk] == [(0, 3), (3, 2)]
    assert [(e.at_sample, e.channel, e.version) for e in pk[1].events] == [(4, 0, 1)]
    assert pk[1].block.versions == (((0, 0), (4, 1)), ((0, 0),))
    assert pk[1].block.data.tolist() == [[1, 1], [0, 2]]


def test_writer_output_matches_documented_layout(tmp_path):
    """IndexWriter's bytes for a small stream equal the hand-built ones (apart from the
    writer's own 'written_by' header entry)."""
    spec = make_spec(1, 4, frames=None)
    data = np.array([[0], [1], [2], [3], [1]], np.uint8)
    cb0 = CodebookUpdate(0, 0, 0, np.array(THR4), np.array(LEV4), 0, "m")
    cb1 = CodebookUpdate(1, 4, 0, np.array(THR4), np.array([-2., -1, 1, 2]), 0, "m")
    with IndexWriter(tmp_path / "w.sqi", spec, chunk_frames=3) as w:
        w.write(Packet(IndexBlock(data[:2], 0, RATE), (cb0,)))
        w.write(Packet(IndexBlock(data[2:], 2, RATE), (cb1,)))
    raw = (tmp_path / "w.sqi").read_bytes()
    (hlen,) = struct.unpack_from("<I", raw, 12)
    header = json.loads(raw[16:16 + hlen])
    assert header.pop("written_by").startswith("streamq ")
    assert header == {"kind": "index", "rate": RATE, "channels": 1, "latency": 0,
                      "int_bits": None, "frames": None, "extra": spec.extra}
    want = blob(rec_codebook(0, 0, THR4, LEV4, method=b"m"), rec_chunk(0, data[:3]),
                rec_codebook(4, 0, THR4, [-2, -1, 1, 2], version=1, method=b"m"),
                rec_chunk(3, data[3:]), rec_end(5, 2))
    assert raw[20 + hlen:] == want


def test_bad_magic(tmp_path):
    p = put(tmp_path, blob(preamble(header_dict(), magic=b"RIFFWAVE"), *good_records()))
    with pytest.raises(StreamqError, match=r"not a streamq index file \(bad magic at byte 0\)"):
        IndexReader(p)
    with pytest.raises(StreamqError, match="bad magic"):
        IndexReader(put(tmp_path, b"hello", "short.sqi"))
    with pytest.raises(StreamqError, match="empty"):
        IndexReader(put(tmp_path, b"", "empty.sqi"))


def test_unsupported_version(tmp_path):
    p = put(tmp_path, blob(preamble(header_dict(), version=2), *good_records()))
    with pytest.raises(StreamqError, match="unsupported index file format version 2 at byte 8"):
        IndexReader(p)


def test_header_crc_mismatch(tmp_path):
    raw = bytearray(blob(preamble(header_dict()), *good_records()))
    i = raw.index(b'"rate": 48000') + 9
    raw[i] = ord("9")  # 98000 Hz: plausible, but the CRC catches it
    with pytest.raises(StreamqError, match=r"header CRC mismatch at byte \d+"):
        IndexReader(put(tmp_path, bytes(raw)))


@pytest.mark.parametrize("header, needle", [
    (b"{not json", "not valid JSON"),
    (b'{"a": NaN}', "not valid JSON"),
    (b"\xff\xfe", "not valid JSON"),
    (b"[1, 2]", "not a JSON object"),
    (json.dumps(header_dict(kind="signal")).encode(), "kind is 'signal'"),
    (json.dumps(header_dict(channels=0)).encode(), "channels 0"),
    (json.dumps(header_dict(rate=True)).encode(), "rate True"),
    (json.dumps({k: v for k, v in header_dict().items() if k != "extra"}).encode(),
     "field 'extra' is missing"),
    (json.dumps(header_dict(extra={"coding": {}, "n_levels": 4, "index_dtype": "int8"})).encode(),
     "index_dtype 'int8'"),
])
def test_bad_header_content(tmp_path, header, needle):
    p = put(tmp_path, blob(preamble(header), *good_records()))
    with pytest.raises(StreamqError, match="bad header at byte 16") as ei:
        IndexReader(p)
    assert needle in str(ei.value)


def test_truncated_files(tmp_path):
    full = blob(preamble(header_dict()), *good_records())
    head_len = len(preamble(header_dict()))
    for cut, needle in [(10, "preamble at byte 0 is cut short"),
                        (head_len - 3, "header at byte 16 is cut short"),
                        (head_len, "no end record after the header"),
                        (len(full) - 1, "no end record at byte"),
                        (len(full) - 36, "no end record at byte")]:
        with pytest.raises(StreamqError, match="truncated file") as ei:
            IndexReader(put(tmp_path, full[:cut], f"cut{cut}.sqi"))
        assert needle in str(ei.value)


def test_partial_record(tmp_path):
    recs = good_records()
    # the middle of the file lost bytes: the record cut short runs into the end record
    cut = blob(preamble(header_dict()), recs[0], recs[1][:20], recs[-1])
    expect_error(put(tmp_path, cut, "a.sqi"), "truncated file", "claims")
    # a few stray bytes knock the records out of step
    p = put(tmp_path, blob(preamble(header_dict()), *recs[:-1], b"\x02\x00\x00", recs[-1]), "b.sqi")
    expect_error(p, "unknown record type", "damaged file?")


def test_record_crc_mismatch(tmp_path):
    recs = good_records()
    bad = bytearray(recs[2])  # the first chunk
    bad[20] ^= 0x01
    p = put(tmp_path, blob(preamble(header_dict()), *recs[:2], bytes(bad), *recs[3:]))
    expect_error(p, "record CRC mismatch at byte", "index chunk record")
    bad_end = bytearray(recs[-1])
    bad_end[10] ^= 0x01
    p = put(tmp_path, blob(preamble(header_dict()), *recs[:-1], bytes(bad_end)), "e.sqi")
    with pytest.raises(StreamqError, match=r"record CRC mismatch at byte \d+ \(end record\)"):
        IndexReader(p)


def _with(tmp_path, *recs, channels=2, n_levels=4, name="c.sqi"):
    return put(tmp_path, blob(preamble(header_dict(channels, n_levels)), *recs), name)


def test_codebook_checks(tmp_path):
    d = np.zeros((2, 1), np.uint8)
    one = dict(channels=1)
    cases = [
        (rec_codebook(0, 0, [0.0, -1.0, 1.0], LEV4), "not increasing (threshold 1 = -1.0 after 0.0)"),
        (rec_codebook(0, 0, [-1.0, 0.0, 0.0], LEV4), "not increasing (threshold 2 = 0.0 after 0.0)"),
        (rec_codebook(0, 0, [-1.0, np.inf, 1.0], LEV4), "non-finite"),
        (rec_codebook(0, 0, THR4, [-1.5, np.nan, 0.5, 1.5]), "non-finite"),
        (rec_codebook(0, 0, [0.0], [-1.0, 1.0]), "L=2 levels but the stream has n_levels=4"),
        (rec_codebook(0, 1, THR4, LEV4), "codebook for channel 1 but the stream has 1 channel"),
        (rec_codebook(0, 0, THR4, LEV4, L=5), "L=5 levels"),
        (rec_codebook(0, 0, THR4[:2], LEV4, L=4), "expected"),
        (rec_codebook(0, 0, THR4, LEV4, bits=-1), "side_info_bits -1"),
        (rec_codebook(0, 0, THR4, LEV4, method=b"\xff"), "method name is not UTF-8"),
        (record(1, b"\x00" * 10), "too short"),
    ]
    for i, (rec, needle) in enumerate(cases):
        p = _with(tmp_path, rec, rec_chunk(0, d), rec_end(2, 1), name=f"c{i}.sqi", **one)
        expect_error(p, "bad codebook record at byte", needle)


def test_codebook_order_checks(tmp_path):
    d = np.zeros((4, 1), np.uint8)
    cb = lambda at, v=0: rec_codebook(at, 0, THR4, LEV4, version=v)  # noqa: E731
    expect_error(_with(tmp_path, cb(0), cb(2, 1), cb(1, 2), rec_chunk(0, d), rec_end(4, 3),
                       channels=1, name="a.sqi"), "must be in sample order")
    expect_error(_with(tmp_path, cb(0), rec_chunk(0, d[:2]), cb(1, 1), rec_chunk(2, d[2:]),
                       rec_end(4, 2), channels=1, name="b.sqi"), "frames already stored")
    expect_error(_with(tmp_path, cb(0), cb(3, 1), rec_chunk(0, d[:2]), rec_chunk(2, d[2:]),
                       rec_end(4, 2), channels=1, name="c.sqi"),
                 "update at sample 3 is not inside the chunk [0, 2)")
    expect_error(_with(tmp_path, cb(0), cb(4, 1), rec_chunk(0, d), rec_end(4, 2),
                       channels=1, name="d.sqi"), "past the last frame")


def test_chunk_not_contiguous(tmp_path):
    d = np.zeros((2, 1), np.uint8)
    p = _with(tmp_path, rec_codebook(0, 0, THR4, LEV4), rec_chunk(0, d), rec_chunk(3, d),
              rec_end(5, 1), channels=1)
    expect_error(p, "index chunk at byte", "starts at sample 3, not contiguous",
                 "ends at sample 2")
    p = _with(tmp_path, rec_codebook(0, 0, THR4, LEV4), rec_chunk(1, d), rec_end(3, 1),
              channels=1, name="late.sqi")
    expect_error(p, "starts at sample 1, not contiguous")


def test_chunk_shape_checks(tmp_path):
    cb = rec_codebook(0, 0, THR4, LEV4)
    d1 = np.zeros((2, 1), np.uint8)
    for i, (chunk, needle) in enumerate([
            (rec_chunk(0, d1.astype(np.uint16)), "2-byte indices, the stream's index_dtype is uint8"),
            (rec_chunk(0, np.zeros((2, 2), np.uint8)), "2 channel(s), the stream has 1"),
            (rec_chunk(0, np.zeros((0, 1), np.uint8)), "holds no frames"),
            (rec_chunk(0, np.zeros((3, 1), np.uint8)), "past the 2 frames"),
            (record(2, struct.pack("<QIHBB", 0, 2, 1, 1, 0) + b"\x00"), "expected 18"),
            (record(2, b"\x00" * 4), "too short")]):
        p = _with(tmp_path, cb, chunk, rec_end(2, 1), channels=1, name=f"s{i}.sqi")
        expect_error(p, "bad index chunk at byte", needle)


def test_index_out_of_range(tmp_path):
    data = np.zeros((6, 2), np.uint8)
    data[4, 1] = 4  # L = 4: valid indices are 0..3
    recs = [rec_codebook(0, c, THR4, LEV4) for c in range(2)]
    p = _with(tmp_path, *recs, rec_chunk(0, data[:3]), rec_chunk(3, data[3:]), rec_end(6, 2))
    expect_error(p, "index out of range at sample 4, channel 1")
    # an index that fits the dtype of a wider stream but not its level count
    d16 = np.zeros((3, 1), np.uint16)
    d16[2, 0] = 300
    lev = np.linspace(-1, 1, 300)
    p = put(tmp_path, blob(preamble(header_dict(1, 300)),
                           rec_codebook(0, 0, (lev[1:] + lev[:-1]) / 2, lev),
                           rec_chunk(0, d16), rec_end(3, 1)), "w.sqi")
    expect_error(p, "index out of range at sample 2, channel 0")


def test_indices_before_any_codebook(tmp_path):
    d = np.zeros((4, 2), np.uint8)
    p = _with(tmp_path, rec_codebook(0, 0, THR4, LEV4), rec_chunk(0, d), rec_end(4, 1))
    expect_error(p, "indices before any codebook for channel 1 at sample 0")
    p = _with(tmp_path, rec_codebook(0, 0, THR4, LEV4), rec_codebook(2, 1, THR4, LEV4),
              rec_chunk(0, d), rec_end(4, 2), name="late.sqi")
    expect_error(p, "indices before any codebook for channel 1 at sample 0")
    p = _with(tmp_path, rec_codebook(0, 0, THR4, LEV4), rec_chunk(0, d[:2, :1]),
              rec_codebook(2, 0, THR4, LEV4), rec_chunk(2, d[2:, :1]), rec_end(4, 2),
              channels=1, name="fine.sqi")
    assert len(read_through(p)) == 2


def test_end_record_checks(tmp_path):
    recs = good_records()
    hd = preamble(header_dict())
    expect_error(put(tmp_path, blob(hd, *recs[:3], rec_end(5, 2)), "a.sqi"),
                 "index chunks hold 3 frames but the end record", "declares 5")
    expect_error(put(tmp_path, blob(hd, *recs[:-1], rec_end(5, 9)), "b.sqi"),
                 "holds 3 codebook records", "declares 9")
    expect_error(put(tmp_path, blob(hd, *recs, rec_end(5, 3)), "c.sqi"),
                 "but the file goes on")
    expect_error(put(tmp_path, blob(hd, *recs[:-1], record(4, b"xx"), recs[-1]), "d.sqi"),
                 "unknown record type 4 at byte")
    with pytest.raises(StreamqError, match="complete flag 7"):
        IndexReader(put(tmp_path, blob(hd, *recs[:-1], rec_end(5, 3, complete=7)), "e.sqi"))
    expect_error(put(tmp_path, blob(hd, *recs[:4], rec_codebook(5, 0, THR4, LEV4, version=2),
                                    rec_end(5, 4)), "f.sqi"), "past the last frame")


def test_oversized_record_length(tmp_path):
    recs = good_records()
    big = bytearray(recs[2])
    big[4:8] = struct.pack("<I", 0xFFFFFFF0)
    expect_error(put(tmp_path, blob(preamble(header_dict()), *recs[:2], bytes(big), *recs[3:])),
                 "claims 4294967280 bytes")


def test_reader_path_errors(tmp_path):
    with pytest.raises(StreamqError, match="no such file"):
        IndexReader(tmp_path / "missing.sqi")
    with pytest.raises(StreamqError, match="is a folder"):
        IndexReader(tmp_path)


# ----------------------------------------------------------------------------- nodes


def _ctx(tmp_path, **options):
    return RunContext(graph_file=tmp_path / "g.toml", out_dir=tmp_path / "out", sample_rate=RATE,
                      options=options)


def test_nodes_round_trip(tmp_path):
    from streamq.engine.registry import registry
    Sink, Source = registry.get("index-sink"), registry.get("index-source")
    assert Sink.role == "sink" and Source.role == "source"
    rng = np.random.default_rng(11)
    data, events = random_stream(rng, 5000, 2, 32, 8)
    spec = make_spec(2, 32, frames=5000)
    sink = Sink("keep", Sink.Config(use="index-sink", input="enc", path="codes.sqi"))
    ctx = _ctx(tmp_path)
    assert sink.open({"input": spec}, ctx) is None
    for p in packets(data, events, [333]):
        sink.step(p.frames, {"input": p})
    sink.finish()
    sink.close(True)
    rep = sink.report()
    out = tmp_path / "out" / "codes.sqi"
    assert rep == {"path": str(out), "frames": 5000, "bytes": out.stat().st_size,
                   "codebook_updates": 10, "complete": True, "latency_frames": 0,
                   "events_not_stored": 0}
    src = Source("play", Source.Config(use="index-source", path="out/codes.sqi"))
    ospec = src.open({}, ctx)
    assert ospec == spec and src.length == 5000
    got, evs = [], []
    for n in [1, 7, 256, 4736]:
        p = src.step(n, {})
        got.append(p.block.data)
        evs.extend(p.events)
    src.close(True)
    assert np.array_equal(np.concatenate(got), data)
    assert all(map(same_event, evs, events)) and len(evs) == len(events)
    assert src.report()["frames_read"] == 5000 and src.report()["file_complete"]


def test_index_sink_refuses_a_signal(tmp_path):
    from streamq.nodes.indexfile import IndexSink
    sink = IndexSink("keep", IndexSink.Config(use="index-sink", input="dec", path="x.sqi"))
    with pytest.raises(StreamqError, match=r"node 'keep', field 'input': node 'dec' gives a "
                                           r"signal, not quantizer indices"):
        sink.open({"input": StreamSpec("signal", RATE, 1)}, _ctx(tmp_path))


def test_index_sink_leaves_no_file_in_check_mode_or_unstarted_runs(tmp_path):
    from streamq.nodes.indexfile import IndexSink
    cfg = IndexSink.Config(use="index-sink", input="enc", path="x.sqi")
    sink = IndexSink("keep", cfg)
    sink.open({"input": make_spec()}, _ctx(tmp_path, check_only=True))
    sink.close(False)
    sink = IndexSink("keep", cfg)
    sink.open({"input": make_spec()}, _ctx(tmp_path))
    sink.close(False)  # another node failed to open: the run never started
    assert not (tmp_path / "out" / "x.sqi").exists()
    assert not any((tmp_path / "out").iterdir())


def test_index_sink_bad_packet_names_node(tmp_path):
    from streamq.nodes.indexfile import IndexSink
    sink = IndexSink("keep", IndexSink.Config(use="index-sink", input="enc", path="x.sqi"))
    sink.open({"input": make_spec(1, 4)}, _ctx(tmp_path))
    with pytest.raises(StreamqError, match="node 'keep', field 'input': .*indices before any"):
        sink.step(4, {"input": Packet(_ib(np.zeros((4, 1))))})
    sink.close(False)
    _, total, complete = read_spec(tmp_path / "out" / "x.sqi")
    assert total == 0 and not complete


def test_index_source_checks_at_open(tmp_path):
    from streamq.nodes.indexfile import IndexSource
    raw = bytearray(blob(preamble(header_dict()), *good_records()))
    raw[20] ^= 0xFF
    put(tmp_path, bytes(raw), "bad.sqi")
    src = IndexSource("play", IndexSource.Config(use="index-source", path="bad.sqi"))
    with pytest.raises(StreamqError, match=r"node 'play', field 'path': .*bad.sqi: header CRC"):
        src.open({}, _ctx(tmp_path))
    put(tmp_path, blob(preamble(header_dict(rate=44_100)), *good_records()), "r.sqi")
    src = IndexSource("play", IndexSource.Config(use="index-source", path="r.sqi"))
    with pytest.raises(StreamqError, match="44100 Hz stream but the graph runs at 48000 Hz"):
        src.open({}, _ctx(tmp_path))


def test_index_source_errors_while_running_and_state(tmp_path):
    from streamq.nodes.indexfile import IndexSource
    recs = good_records()
    bad = bytearray(recs[4])
    bad[-6] ^= 1  # second chunk's data
    put(tmp_path, blob(preamble(header_dict()), *recs[:4], bytes(bad), recs[5]), "b.sqi")
    src = IndexSource("play", IndexSource.Config(use="index-source", path="b.sqi"))
    src.open({}, _ctx(tmp_path))
    assert src.step(3, {}).frames == 3
    with pytest.raises(StreamqError, match="node 'play', field 'path': .*record CRC mismatch"):
        src.step(2, {})
    src.close(False)
    put(tmp_path, blob(preamble(header_dict()), *recs), "g.sqi")
    src = IndexSource("play", IndexSource.Config(use="index-source", path="g.sqi"))
    src.open({}, _ctx(tmp_path))
    src.step(4, {})
    state = src.get_state()
    src.set_state({"position": 1})
    assert src.step(2, {}).block.data.tolist() == [[2, 3], [3, 0]]
    src.set_state(state)
    assert src.step(1, {}).block.data.tolist() == [[0, 2]]
    with pytest.raises(StreamqError, match="holds 5 frames"):
        src.step(1, {})


# ----------------------------------------------------------------------------- fuzz


def valid_file_bytes() -> bytes:
    """A small valid file with several chunks, codebook updates on both channels."""
    rng = np.random.default_rng(2024)
    data, events = random_stream(rng, 600, 2, 5, 6)
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "seed.sqi"
        write_file(p, make_spec(2, 5, frames=600), data, events, sizes=[97], chunk_frames=128)
        return p.read_bytes()


def fix_crcs(raw: bytes) -> bytes:
    """Recompute every CRC that can be located, so that a mutation reaches the checks
    behind the CRCs (structure-aware fuzzing)."""
    b = bytearray(raw)
    if len(b) < 16:
        return bytes(b)
    (hlen,) = struct.unpack_from("<I", b, 12)
    pos = 16 + hlen
    if pos + 4 > len(b):
        return bytes(b)
    struct.pack_into("<I", b, pos, crc(bytes(b[8:pos])))
    pos += 4
    while pos + 8 <= len(b):
        (length,) = struct.unpack_from("<I", b, pos + 4)
        end = pos + 8 + length
        if end + 4 > len(b):
            break
        struct.pack_into("<I", b, end, crc(bytes(b[pos:end])))
        pos = end + 4
    if len(b) >= 36 + 20:  # the tail, where the reader looks for the end record
        t = len(b) - 36
        struct.pack_into("<I", b, len(b) - 4, crc(bytes(b[t:len(b) - 4])))
    return bytes(b)


SEED = valid_file_bytes()

_mutation = st.one_of(
    st.tuples(st.just("flip"), st.integers(0, 10**6), st.integers(1, 255)),
    st.tuples(st.just("cut"), st.integers(0, 10**6), st.just(0)),
    st.tuples(st.just("insert"), st.integers(0, 10**6), st.binary(min_size=1, max_size=40)),
    st.tuples(st.just("delete"), st.integers(0, 10**6), st.integers(1, 64)),
    st.tuples(st.just("u32"), st.integers(0, 10**6),
              st.sampled_from([0, 1, 2, 3, 4, 5, 127, 128, 255, 256, 600, 65_535, 2**31 - 1,
                               2**31, 2**32 - 1])),
    st.tuples(st.just("u64"), st.integers(0, 10**6),
              st.sampled_from([0, 1, 599, 600, 601, 2**63 - 1, 2**63, 2**64 - 1])),
    st.tuples(st.just("f64"), st.integers(0, 10**6),
              st.sampled_from([0.0, -0.0, 1e308, -1e308, float("inf"), float("nan"), 5e-324])),
)


def mutate(raw: bytes, ops, fix: bool) -> bytes:
    b = bytearray(raw)
    for kind, at, arg in ops:
        n = len(b)
        i = at % (n + 1)
        if kind == "flip" and n:
            b[at % n] ^= arg
        elif kind == "cut":
            del b[i:]
        elif kind == "insert":
            b[i:i] = arg
        elif kind == "delete":
            del b[i:i + arg]
        elif kind == "u32" and n >= 4:
            struct.pack_into("<I", b, at % (n - 3), arg)
        elif kind == "u64" and n >= 8:
            struct.pack_into("<Q", b, at % (n - 7), arg)
        elif kind == "f64" and n >= 8:
            struct.pack_into("<d", b, at % (n - 7), arg)
    return fix_crcs(bytes(b)) if fix else bytes(b)


def exercise(path: Path, sizes) -> None:
    """Open and read a file to the end two ways; only StreamqError may come out."""
    try:
        with IndexReader(path) as r:
            total = 0
            k = 0
            while (p := r.read(sizes[k % len(sizes)])) is not None:
                k += 1
                total += p.frames
                assert p.block.data.shape == (p.frames, r.channels)
                assert int(p.block.data.max(initial=0)) < r.n_levels
                assert all(p.start <= e.at_sample < p.block.stop for e in p.events)
            assert total == r.total_frames
    except StreamqError as exc:
        assert "\n" not in str(exc) and str(path) in str(exc)
    try:
        with IndexReader(path) as r:
            for _ in r:
                pass
    except StreamqError:
        pass


FUZZ_EXAMPLES = int(os.environ.get("STREAMQ_FUZZ_EXAMPLES", "4000"))
_FUZZ_DIR = tempfile.mkdtemp(prefix="streamq-fuzz-")
atexit.register(shutil.rmtree, _FUZZ_DIR, True)


def test_seed_file_is_valid():
    p = Path(_FUZZ_DIR) / "seed.sqi"
    p.write_bytes(SEED)
    exercise(p, [50])
    assert sum(q.frames for q in read_through(p)) == 600
    assert fix_crcs(SEED) == SEED


@settings(max_examples=FUZZ_EXAMPLES, deadline=timedelta(seconds=10), database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(ops=st.lists(_mutation, min_size=1, max_size=4), fix=st.booleans(),
       sizes=st.lists(st.integers(1, 700), min_size=1, max_size=3))
def test_fuzz_reader_only_raises_streamq_errors(ops, fix, sizes):
    p = Path(_FUZZ_DIR) / "fuzz.sqi"
    p.write_bytes(mutate(SEED, ops, fix))
    exercise(p, sizes)


# ----------------------------------------------------------------------------- graphs


def _graph(tmp_path, text, name="g.toml"):
    from streamq.engine.graph import load_graph
    g = tmp_path / name
    g.write_text(text)
    return load_graph(g)


@pytest.mark.parametrize("block", [1, 7, 256, 65_536])
def test_graph_copies_an_index_file_bit_exactly(tmp_path, block):
    """index-source -> index-sink through the scheduler, at any step size."""
    from streamq.engine.scheduler import build, run_offline
    rng = np.random.default_rng(21)
    total = 3000 if block == 1 else 20_000
    data, events = random_stream(rng, total, 2, 64, 15)
    write_file(tmp_path / "in.sqi", make_spec(2, 64, frames=total), data, events, sizes=[999])
    graph = _graph(tmp_path, '[graph]\nname = "copy"\n'
                             '[nodes.play]\nuse = "index-source"\npath = "in.sqi"\n'
                             '[nodes.keep]\nuse = "index-sink"\ninput = "play"\npath = "out.sqi"\n')
    built = build(graph, tmp_path / "run")
    assert built.ctx.sample_rate == RATE and built.length == total
    result = run_offline(built, block=block, handle_signals=False)
    assert result.complete
    out = result.report["outputs"]["keep"]
    assert out["frames"] == total and out["codebook_updates"] == len(events) and out["complete"]
    assert (tmp_path / "run" / "out.sqi").read_bytes() == (tmp_path / "in.sqi").read_bytes()
    assert result.report["nodes"]["play"]["frames_read"] == total


def test_graph_refuses_a_signal_into_index_sink(tmp_path):
    from streamq.engine.graph import GraphError
    from streamq.engine.scheduler import build
    graph = _graph(tmp_path, '[graph]\nsample_rate = 48000\n'
                             '[nodes.feed]\nuse = "test-signal"\nseconds = 0.1\n'
                             '[nodes.keep]\nuse = "index-sink"\ninput = "feed"\npath = "x.sqi"\n')
    with pytest.raises(GraphError, match=r"node 'keep', field 'input': node 'feed' gives a signal"):
        build(graph, tmp_path / "run")
    assert not (tmp_path / "run" / "x.sqi").exists()
