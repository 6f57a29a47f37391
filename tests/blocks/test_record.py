"""The ``record`` sink: recordings it makes are checked with the reference ``sigmf`` library
(sigmf-python: ``sigmf.sigmffile.fromfile(...).validate()``, the JSON-schema validator of the
SigMF specification) and played back by the ``recording`` source."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import sigmf

import blocks.recording  # noqa: F401  (the package registers record, this recording)
from stream.block import StreamSpec
from stream.chunk import Annotation, Chunk
from stream.errors import ParamError
from tests.chunking import make_block, run_block

RATE = 200_000.0
FREQUENCY = 433.92e6


def signal(n: int = 5000, amplitude: float = 0.7, seed: int = 11) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = amplitude * np.exp(2j * np.pi * rng.random(n)) * rng.random(n)
    return x.astype(np.complex64)


def feed(block, chunks: list[Chunk], rate: float = RATE, finish: bool = True):
    """Deliver hand-made chunks (starts and annotations as given) to a record sink."""
    block.configure({"in": StreamSpec(chunks[0].samples.dtype.name, rate)})
    for chunk in chunks:
        block.deliver(chunk)
    if finish:
        block.finish()
    return block


def validated(meta: str):
    """Open a recording with the sigmf library and validate it against the SigMF schema."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")          # undeclared extensions warn in sigmf 1.14
        handle = sigmf.sigmffile.fromfile(meta)
        handle.validate()
    return handle


def play(meta: str, chunk_size: int = 1000):
    block = make_block("recording", path=meta, chunk_size=chunk_size)
    block.configure({})
    parts, notes = [], []
    while block.produce():
        for _, chunk in block.take_output():
            parts.append(chunk.samples)
            notes.extend(chunk.annotations)
    return np.concatenate(parts), notes, block


def test_sigmf_recording_validates_and_carries_the_global_fields(tmp_path):
    x = signal()
    sink = make_block("record", path=str(tmp_path / "gate"), frequency_hz=FREQUENCY,
                      description="garage gate remote, bench capture")
    run_block(sink, [x[:1234], x[1234:]], RATE)
    handle = validated(str(tmp_path / "gate.sigmf-meta"))
    assert handle.get_global_field(sigmf.DATATYPE_KEY) == "cf32_le"
    assert handle.get_global_field(sigmf.SAMPLE_RATE_KEY) == RATE
    assert handle.get_global_field(sigmf.RECORDER_KEY) == "phasefree"
    written = json.loads((tmp_path / "gate.sigmf-meta").read_text())["global"]
    assert written["core:version"] == "1.2.0"        # (the library reports its own on load)
    assert written["core:description"] == "garage gate remote, bench capture"
    assert handle.get_captures() == [{sigmf.SAMPLE_START_KEY: 0, sigmf.GLOBAL_INDEX_KEY: 0,
                                      sigmf.FREQUENCY_KEY: FREQUENCY}]
    np.testing.assert_array_equal(handle.read_samples(), x)      # cf32 is stored exactly
    assert sink.readings()["samples_written"] == x.shape[0]


@pytest.mark.parametrize("datatype, step", [
    ("cf32_le", 0.0), ("ci16_le", 1 / 32768), ("ci8", 1 / 128), ("cu8", 1 / 127.5)])
def test_round_trip_record_then_play(tmp_path, datatype, step):
    x = signal(amplitude=0.9)
    sink = make_block("record", path=str(tmp_path / "trip.sigmf-meta"), datatype=datatype,
                      frequency_hz=FREQUENCY)
    run_block(sink, [x[:700], x[700:3001], x[3001:]], RATE)
    handle = validated(str(tmp_path / "trip.sigmf-meta"))
    y, _, source = play(str(tmp_path / "trip.sigmf-meta"))
    assert source.output_specs["out"].rate == RATE
    assert source.readings()["center_frequency_hz"] == FREQUENCY
    if step == 0.0:
        np.testing.assert_array_equal(y, x)
    else:
        # rounding to the nearest code: within half a quantisation step per component
        err = np.maximum(np.abs(y.real - x.real), np.abs(y.imag - x.imag))
        assert err.max() <= step / 2 * (1 + 1e-5)
        assert err.max() > step / 8                  # it really was quantised
    if datatype in ("ci16_le", "ci8"):
        # the sigmf library's autoscaled reading of signed types equals ours
        np.testing.assert_allclose(handle.read_samples(), y, rtol=1e-6, atol=0)
    assert sink.readings()["clipped"] == 0


def test_clipping_is_counted_per_sample(tmp_path):
    x = np.array([0.5, 1.5 + 0j, -0.2 - 1.2j, 2 + 2j, 0.99], np.complex64)
    sink = make_block("record", path=str(tmp_path / "loud"), datatype="ci8")
    run_block(sink, [x], RATE)
    assert sink.readings()["clipped"] == 3
    stored = np.fromfile(tmp_path / "loud.sigmf-data", np.int8).reshape(-1, 2)
    assert stored[1].tolist() == [127, 0] and stored[2].tolist() == [-26, -128]


def test_nan_into_an_integer_recording_is_counted_and_stored_as_zero(tmp_path):
    x = np.array([0.25, np.nan, 0.5j], np.complex64)
    sink = make_block("record", path=str(tmp_path / "holes"), datatype="ci16_le")
    run_block(sink, [x], RATE)
    assert sink.readings()["nonfinite"] == 1
    stored = np.fromfile(tmp_path / "holes.sigmf-data", "<i2").reshape(-1, 2)
    assert stored.tolist() == [[8192, 0], [0, 0], [0, 16384]]


def test_annotations_are_written_sorted_with_count_and_label(tmp_path):
    x = signal(3000)
    notes = [Annotation(2200, "sync-lost", {"window_errors": 14}),
             Annotation(400, "packet", {"packet": 1, "crc_ok": True, "sample_count": 96}),
             Annotation(1200, "packet", {"packet": 2, "crc_ok": False})]
    sink = make_block("record", path=str(tmp_path / "notes"))
    run_block(sink, [x[:1000], x[1000:]], RATE, annotations=notes)
    handle = validated(str(tmp_path / "notes.sigmf-meta"))
    written = handle.get_annotations()
    # SigMF specification: annotations MUST be sorted by core:sample_start
    assert [(a[sigmf.SAMPLE_START_KEY], a[sigmf.SAMPLE_COUNT_KEY], a[sigmf.LABEL_KEY])
            for a in written] == [(400, 96, "packet"), (1200, 1, "packet"), (2200, 1, "sync-lost")]
    _, played, _ = play(str(tmp_path / "notes.sigmf-meta"), chunk_size=333)
    assert [(n.index, n.label, n.data) for n in played] == \
        [(400, "packet", notes[1].data), (1200, "packet", notes[2].data),
         (2200, "sync-lost", notes[0].data)]


def test_input_gaps_start_captures_with_the_stream_index(tmp_path):
    x = signal(3000)
    a, b, c = x[:1000], x[1000:2000], x[2000:]
    chunks = [Chunk(a, 0, RATE), Chunk(b, 1500, RATE),         # 500 samples lost upstream
              Chunk(c, 2500, RATE, (Annotation(2800, "gap", {"reason": "loop"}),))]
    feed(make_block("record", path=str(tmp_path / "gappy"), frequency_hz=FREQUENCY), chunks)
    handle = validated(str(tmp_path / "gappy.sigmf-meta"))
    assert [(k[sigmf.SAMPLE_START_KEY], k[sigmf.GLOBAL_INDEX_KEY], k[sigmf.FREQUENCY_KEY])
            for k in handle.get_captures()] == \
        [(0, 0, FREQUENCY), (1000, 1500, FREQUENCY), (2300, 2800, FREQUENCY)]
    y, played, _ = play(str(tmp_path / "gappy.sigmf-meta"), chunk_size=256)
    np.testing.assert_array_equal(y, x)
    gaps = [n for n in played if n.label == "gap"]
    assert [(g.index, g.data["samples_missing"]) for g in gaps] == [(1000, 500), (2300, 0)]


def test_killed_run_leaves_a_consistent_pair(tmp_path):
    # no finish(): the last periodic rewrite describes only data already flushed
    x = signal(5000)
    notes = [Annotation(i, "packet", {"packet": i}) for i in range(150, 5000, 400)]
    sink = make_block("record", path=str(tmp_path / "killed"), metadata_every_s=0.005)
    chunks = [Chunk(x[i:i + 600], i, RATE, tuple(n for n in notes if i <= n.index < i + 600))
              for i in range(0, 5000, 600)]
    feed(sink, chunks, finish=False)
    assert not (tmp_path / "killed.sigmf-meta.partial").exists()
    handle = validated(str(tmp_path / "killed.sigmf-meta"))
    on_disk = (tmp_path / "killed.sigmf-data").stat().st_size // 8
    starts = [a[sigmf.SAMPLE_START_KEY] for a in handle.get_annotations()]
    assert starts and max(starts) < on_disk
    assert len(starts) < len(notes)                     # the tail was not yet described
    np.testing.assert_array_equal(handle.read_samples()[:on_disk], x[:on_disk])


def test_old_metadata_never_describes_new_data(tmp_path):
    meta = tmp_path / "reuse.sigmf-meta"
    run_block(make_block("record", path=str(meta), datatype="cu8"), [signal(4000)], RATE)
    sink = make_block("record", path=str(meta))
    sink.configure({"in": StreamSpec("complex64", RATE)})
    sink.deliver(Chunk(signal(10), 0, RATE))           # first data, before any rewrite
    assert not meta.exists() or json.loads(meta.read_text())["global"]["core:datatype"] == \
        "cf32_le"
    sink.finish()
    assert validated(str(meta)).get_global_field(sigmf.DATATYPE_KEY) == "cf32_le"


def test_empty_recording_is_a_valid_pair(tmp_path):
    sink = make_block("record", path=str(tmp_path / "quiet"))
    sink.configure({"in": StreamSpec("complex64", RATE)})
    sink.finish()
    # the library's schema validator (its file reader cannot map an empty data file)
    sigmf.validate.validate(json.loads((tmp_path / "quiet.sigmf-meta").read_text()))
    assert (tmp_path / "quiet.sigmf-data").stat().st_size == 0


def test_raw_format_writes_float32_input_as_before(tmp_path):
    x = np.linspace(-1, 1, 999, dtype=np.float32)
    sink = make_block("record", path=str(tmp_path / "envelope.f32"), format="raw")
    run_block(sink, [x[:500], x[500:]], RATE)
    assert (tmp_path / "envelope.f32").read_bytes() == x.astype("<f4").tobytes()
    assert not list(tmp_path.glob("*.sigmf-meta"))


def test_raw_ci8_file_plays_back_as_a_bare_file(tmp_path):
    x = signal(2000, amplitude=0.95)
    sink = make_block("record", path=str(tmp_path / "dongle.ci8"), format="raw", datatype="ci8")
    run_block(sink, [x], RATE)
    source = make_block("recording", path=str(tmp_path / "dongle.ci8"), datatype="ci8",
                        sample_rate=RATE)
    source.configure({})
    source.produce()
    y = np.concatenate([c.samples for _, c in source.take_output()])
    assert np.abs(y - x).max() <= np.sqrt(2) / 256 * (1 + 1e-5)


def test_real_input_records_as_a_real_sigmf_datatype(tmp_path):
    x = (0.9 * np.cos(np.arange(800) * 0.3)).astype(np.float32)
    run_block(make_block("record", path=str(tmp_path / "am"), datatype="ri16_le"), [x], RATE)
    handle = validated(str(tmp_path / "am.sigmf-meta"))
    np.testing.assert_allclose(handle.read_samples(), x, atol=1 / 65536)


@pytest.mark.parametrize("params, message", [
    ({"datatype": "rf32_le"}, "datatype: a complex64 input needs a complex"),
    ({"datatype": "ci12"}, "datatype: datatype must be a SigMF datatype"),
    ({"overwrite": False}, "path: .*exists and overwrite is false"),
])
def test_bad_parameters_are_refused(tmp_path, params, message):
    (tmp_path / "taken.sigmf-data").write_bytes(b"")
    sink = make_block("record", path=str(tmp_path / "taken"), **params)
    with pytest.raises(ParamError, match=message):
        sink.configure({"in": StreamSpec("complex64", RATE)})


def test_missing_folder_is_refused(tmp_path):
    sink = make_block("record", path=str(tmp_path / "nowhere" / "rec"))
    with pytest.raises(ParamError, match="folder does not exist"):
        sink.configure({"in": StreamSpec("complex64", RATE)})


def test_pipeline_plays_a_bare_cu8_file_into_a_sigmf_recording_bit_exactly(tmp_path):
    # the pipeline's sample_rate reaches a bare file; cu8 -> float -> cu8 returns every code
    from stream.loader import pipeline_from_dict
    from stream.runner import Runner

    codes = np.random.default_rng(2).integers(0, 256, 30_000).astype(np.uint8)
    codes.tofile(tmp_path / "dongle.cu8")
    doc = {"pipeline": {"sample_rate": RATE, "links": ["src -> rec"]},
           "blocks": {"src": {"kind": "recording", "path": str(tmp_path / "dongle.cu8"),
                              "datatype": "cu8", "chunk_size": 4096},
                      "rec": {"kind": "record", "path": str(tmp_path / "copy"),
                              "datatype": "cu8", "frequency_hz": FREQUENCY}}}
    summary = Runner(pipeline_from_dict(doc)).run(seconds=60)
    assert summary["reason"] == "end-of-stream"
    handle = validated(str(tmp_path / "copy.sigmf-meta"))
    assert handle.get_global_field(sigmf.SAMPLE_RATE_KEY) == RATE
    np.testing.assert_array_equal(np.fromfile(tmp_path / "copy.sigmf-data", np.uint8), codes)
