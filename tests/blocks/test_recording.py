"""The ``recording`` source and the sample-format kernels, checked against the SigMF
specification and the reference ``sigmf`` library (sigmf-python, ``sigmf.sigmffile``)."""

from __future__ import annotations

import json
import logging
from pathlib import Path

import numpy as np
import pytest
import sigmf
from hypothesis import given, settings
from hypothesis import strategies as st
from sigmf.sigmffile import SigMFFile

import blocks.recording  # noqa: F401  (registers the kind)
from blocks._sampleformat import decode_samples, encode_samples, parse_datatype
from blocks._sigmf import Capture, layout
from stream.errors import ParamError
from tests.chunking import make_block

RATE = 250_000.0
FREQUENCY = 868.3e6
DATATYPES = ("cf32_le", "ci16_le", "ci8", "cu8")


def play(chunks: int | None = None, **params) -> tuple[np.ndarray, list, object]:
    """Configure a recording source, run it to the end (or ``chunks`` produces), collect."""
    block = make_block("recording", **params)
    block.configure({})
    parts, notes = [], []
    done = 0
    while (chunks is None or done < chunks) and block.produce():
        done += 1
        for _, chunk in block.take_output():
            parts.append(chunk.samples)
            notes.extend(chunk.annotations)
    dtype = block.output_specs["out"].dtype
    return (np.concatenate(parts) if parts else np.zeros(0, dtype)), notes, block


def stored_values(datatype: str, n: int, seed: int = 3) -> np.ndarray:
    """Random stored components (I, Q interleaved) covering a format's full code range."""
    fmt = parse_datatype(datatype)
    rng = np.random.default_rng(seed)
    if fmt.kind == "f":
        return (0.5 * rng.standard_normal(2 * n)).astype(fmt.component)
    info = np.iinfo(fmt.component)
    values = rng.integers(info.min, info.max, size=2 * n, endpoint=True)
    values[:4] = [info.min, info.max, info.min, info.max]
    return values.astype(fmt.component)


def library_recording(base, datatype: str, stored: np.ndarray, captures=((0, {}),),
                      annotations=(), rate: float | None = RATE) -> str:
    """Write a recording with the sigmf library alone (SigMFFile + tofile); return the meta."""
    data_path = f"{base}.sigmf-data"
    stored.tofile(data_path)
    info = {sigmf.DATATYPE_KEY: datatype, sigmf.VERSION_KEY: sigmf.__specification__}
    if rate is not None:
        info[sigmf.SAMPLE_RATE_KEY] = rate
    meta = SigMFFile(data_file=data_path, global_info=info)
    for start, fields in captures:
        meta.add_capture(start, metadata=dict(fields))
    for start, length, fields in annotations:
        meta.add_annotation(start, length, metadata=dict(fields))
    meta.tofile(base)
    return f"{base}.sigmf-meta"


def rule(stored: np.ndarray, datatype: str) -> np.ndarray:
    """The documented mapping, written out per type for the test (common practice)."""
    v = stored.astype(np.float64)
    if datatype == "cu8":
        v = (v - 127.5) / 127.5
    elif datatype == "ci8":
        v = v / 128
    elif datatype == "ci16_le":
        v = v / 32768
    return (v[0::2] + 1j * v[1::2]).astype(np.complex64)


# -- the kernels -------------------------------------------------------------------------------
@pytest.mark.parametrize("name, complex_, kind, bits, size", [
    ("cf32_le", True, "f", 32, 8), ("ci16_le", True, "i", 16, 4), ("ci8", True, "i", 8, 2),
    ("cu8", True, "u", 8, 2), ("rf64_be", False, "f", 64, 8), ("cu16_be", True, "u", 16, 4)])
def test_datatype_names_follow_the_sigmf_grammar(name, complex_, kind, bits, size):
    # SigMF specification, Dataset Format: (r|c)(f32|f64|i32|i16|u32|u16|i8|u8)(_le|_be)?
    fmt = parse_datatype(name)
    assert (fmt.is_complex, fmt.kind, fmt.bits, fmt.sample_bytes) == (complex_, kind, bits, size)
    assert fmt.sample_bytes == sigmf.sigmffile.dtype_info(name)["sample_size"]   # the library


@pytest.mark.parametrize("bad", ["cf16_le", "ci16", "cx8", "CF32_LE", "cf32_me", ""])
def test_datatype_outside_the_grammar_is_refused(bad):
    with pytest.raises(ValueError, match="datatype"):
        parse_datatype(bad)


@pytest.mark.parametrize("datatype", ["ci8", "ci16_le", "ci16_be", "ci32_le", "rf64_le"])
def test_signed_and_float_types_decode_like_the_sigmf_library(tmp_path, datatype):
    # sigmf library reading with autoscale: signed fixed point scaled by 2**-(N-1)
    stored = stored_values(datatype, 500)
    meta = library_recording(tmp_path / "ref", datatype, stored)
    reference = sigmf.sigmffile.fromfile(meta).read_samples()
    ours = decode_samples(stored, parse_datatype(datatype))
    assert ours.dtype == reference.dtype
    np.testing.assert_allclose(ours, reference, rtol=1e-7, atol=0)


@pytest.mark.parametrize("datatype", DATATYPES)
def test_integer_codes_survive_decode_then_encode_exactly(datatype):
    # the rule is invertible on every code: decode then encode gives the stored codes back
    stored = stored_values(datatype, 2000)
    fmt = parse_datatype(datatype)
    again, clipped, nonfinite = encode_samples(decode_samples(stored, fmt), fmt)
    np.testing.assert_array_equal(again, stored)
    assert (clipped, nonfinite) == (0, 0)


def test_cu8_maps_the_code_range_onto_minus_one_to_one():
    # documented rule for unsigned 8-bit: (v - 127.5) / 127.5 (common practice)
    fmt = parse_datatype("cu8")
    x = decode_samples(np.array([0, 255, 127, 128], np.uint8), fmt)
    np.testing.assert_allclose(x, [-1 + 1j, (-0.5 + 0.5j) / 127.5], rtol=1e-7)


def test_encoding_counts_clipped_and_nonfinite_samples():
    fmt = parse_datatype("ci8")
    x = np.array([0.5, 1.0, -1.0, 2 - 3j, np.nan, np.inf], np.complex64)
    stored, clipped, nonfinite = encode_samples(x, fmt)
    # +1.0 is one LSB above the ci8 range (127/128), -1.0 is exactly the lowest code
    assert clipped == 3 and nonfinite == 2
    assert stored.reshape(-1, 2)[4].tolist() == [0, 0]         # NaN stored as the code of 0.0
    assert stored.reshape(-1, 2)[1].tolist() == [127, 0]
    unsigned, _, _ = encode_samples(np.array([np.nan, -1 + 1j], np.complex64),
                                    parse_datatype("cu8"))
    assert unsigned.tolist() == [128, 128, 0, 255]     # 0.0 is code 127.5, rounded to even


# -- reading recordings the sigmf library made --------------------------------------------------
@pytest.mark.parametrize("datatype", DATATYPES)
def test_library_recording_plays_with_its_rate_frequency_and_samples(tmp_path, datatype):
    stored = stored_values(datatype, 3000)
    meta = library_recording(tmp_path / "rec", datatype, stored,
                             captures=((0, {sigmf.FREQUENCY_KEY: FREQUENCY}),),
                             annotations=((120, 40, {sigmf.LABEL_KEY: "burst"}),))
    x, notes, block = play(path=meta, chunk_size=700)
    assert block.output_specs["out"].rate == RATE
    assert block.readings()["center_frequency_hz"] == FREQUENCY
    assert block.readings()["datatype"] == datatype
    np.testing.assert_allclose(x, rule(stored, datatype), rtol=1e-6, atol=0)
    if datatype != "cu8":
        # the library's own autoscaled reading agrees (it scales cu8 by (v - 128) / 128)
        reference = sigmf.sigmffile.fromfile(meta).read_samples()
        np.testing.assert_allclose(x, reference, rtol=1e-6, atol=0)
    assert [(n.index, n.label, n.data.get("sample_count")) for n in notes] == \
        [(120, "burst", 40)]


def test_real_datatype_plays_as_float32(tmp_path):
    stored = (np.arange(-500, 500) * 37).astype("<i2")
    meta = library_recording(tmp_path / "real", "ri16_le", stored)
    x, _, _ = play(path=meta)
    assert x.dtype == np.float32
    np.testing.assert_allclose(x, sigmf.sigmffile.fromfile(meta).read_samples(), rtol=1e-7)


@pytest.mark.parametrize("datatype", ["cu8", "ci8", "ci16_le"])
def test_bare_file_plays_the_same_samples_as_the_sigmf_path(tmp_path, datatype):
    stored = stored_values(datatype, 2500)
    meta = library_recording(tmp_path / "rec", datatype, stored)
    bare = tmp_path / f"capture.{datatype}"
    stored.tofile(bare)
    via_sigmf, _, _ = play(path=meta)
    via_bare, _, block = play(path=str(bare), datatype=datatype, sample_rate=RATE,
                              frequency_hz=FREQUENCY)
    np.testing.assert_array_equal(via_bare, via_sigmf)
    assert block.readings()["center_frequency_hz"] == FREQUENCY


def test_data_file_named_instead_of_meta_reads_the_metadata(tmp_path):
    stored = stored_values("ci16_le", 100)
    library_recording(tmp_path / "rec", "ci16_le", stored)
    x, _, block = play(path=str(tmp_path / "rec.sigmf-data"))
    assert block.output_specs["out"].rate == RATE and x.shape == (100,)


# -- truncation, gaps, offset, loop ------------------------------------------------------------
def test_truncated_file_is_read_to_its_last_whole_sample(tmp_path, caplog):
    stored = stored_values("ci16_le", 1000)
    meta = library_recording(tmp_path / "cut", "ci16_le", stored)
    data = tmp_path / "cut.sigmf-data"
    data.write_bytes(data.read_bytes()[:-3])          # the last sample keeps 1 of its 4 bytes
    with caplog.at_level(logging.WARNING):
        x, _, block = play(path=meta)
    np.testing.assert_array_equal(x, rule(stored, "ci16_le")[:999])
    r = block.readings()
    assert (r["partial_bytes"], r["shortfall_bytes"], r["samples_read"]) == (1, 3, 999)
    assert "truncated" in caplog.text and "cut.sigmf-data" in caplog.text


def test_capture_after_the_first_becomes_a_gap_annotation(tmp_path):
    # SigMF specification, core:global_index: sample_start 500 with global_index 1000 means
    # 500 samples were lost before they could be recorded.
    stored = stored_values("cf32_le", 900)
    meta = library_recording(tmp_path / "lost", "cf32_le", stored, captures=(
        (0, {sigmf.GLOBAL_INDEX_KEY: 0, sigmf.FREQUENCY_KEY: FREQUENCY}),
        (500, {sigmf.GLOBAL_INDEX_KEY: 1000, sigmf.FREQUENCY_KEY: FREQUENCY + 25e3})))
    x, notes, block = play(path=meta, chunk_size=128)
    gaps = [n for n in notes if n.label == "gap"]
    assert [g.index for g in gaps] == [500]
    assert gaps[0].data["samples_missing"] == 500 and gaps[0].data["global_index"] == 1000
    assert x.shape == (900,)
    assert block.readings()["center_frequency_hz"] == FREQUENCY + 25e3   # the current capture
    _, shifted, _ = play(path=meta, offset=120)
    assert [n.index for n in shifted if n.label == "gap"] == [380]


def test_header_bytes_of_a_non_conforming_dataset_are_skipped(tmp_path):
    # SigMF specification, core:header_bytes example: cu8 data, two segments with 4-byte
    # headers; the second segment's samples start at byte 500 * 2 + 2 * 4 = 1008.
    rng = np.random.default_rng(5)
    first, second = (rng.integers(0, 256, 1000, dtype=np.uint8),
                     rng.integers(0, 256, 600, dtype=np.uint8))
    header = np.array([0xDE, 0xAD, 0xBE, 0xEF], np.uint8)
    np.concatenate([header, first, header, second]).tofile(tmp_path / "ncd.dat")
    (tmp_path / "ncd.sigmf-meta").write_text(json.dumps({
        "global": {"core:datatype": "cu8", "core:version": "1.2.0", "core:sample_rate": RATE,
                   "core:dataset": "ncd.dat"},
        "captures": [{"core:sample_start": 0, "core:header_bytes": 4},
                     {"core:sample_start": 500, "core:header_bytes": 4}],
        "annotations": []}))
    x, notes, _ = play(path=str(tmp_path / "ncd.sigmf-meta"))
    np.testing.assert_allclose(x, rule(np.concatenate([first, second]), "cu8"), rtol=1e-6)
    assert [n.index for n in notes if n.label == "gap"] == [500]


def test_offset_skips_samples_and_loop_replays_from_the_offset(tmp_path):
    stored = stored_values("ci8", 1000)
    bare = tmp_path / "beacon.ci8"
    stored.tofile(bare)
    whole = rule(stored, "ci8")
    x, notes, block = play(chunks=6, path=str(bare), datatype="ci8", sample_rate=RATE,
                           offset=250, loop=True, chunk_size=400)
    assert x.shape == (2400,)
    np.testing.assert_array_equal(x, np.tile(whole[250:], 4)[:2400])
    assert [n.index for n in notes if n.label == "gap"] == [750, 1500, 2250]
    assert block.readings()["loops"] == 3


def test_offset_beyond_the_recording_is_an_error(tmp_path):
    stored_values("ci8", 100).tofile(tmp_path / "short.ci8")
    with pytest.raises(ParamError, match=r"offset.*100 samples"):
        play(path=str(tmp_path / "short.ci8"), datatype="ci8", sample_rate=RATE, offset=100)


@settings(max_examples=25, deadline=None)
@given(chunk_size=st.integers(min_value=1, max_value=2000))
def test_samples_and_annotations_do_not_depend_on_chunk_size(tmp_path_factory, chunk_size):
    base = tmp_path_factory.getbasetemp() / "invariance"
    meta = f"{base}.sigmf-meta"
    if not Path(meta).exists():
        library_recording(base, "ci16_le", stored_values("ci16_le", 1500), captures=(
            (0, {}), (700, {sigmf.GLOBAL_INDEX_KEY: 900})),
            annotations=((0, 10, {sigmf.LABEL_KEY: "first"}), (699, 5, {}),
                         (700, 5, {sigmf.LABEL_KEY: "at-gap"})))
    whole, whole_notes, _ = play(path=meta, chunk_size=1 << 16)
    parts, part_notes, _ = play(path=meta, chunk_size=chunk_size)
    np.testing.assert_array_equal(parts, whole)
    assert [(n.index, n.label) for n in part_notes] == [(n.index, n.label) for n in whole_notes]
    assert [(n.index, n.label) for n in whole_notes] == \
        [(0, "first"), (699, "sigmf"), (700, "gap"), (700, "at-gap")]


# -- errors ------------------------------------------------------------------------------------
def test_missing_sample_rate_is_an_error_unless_given(tmp_path):
    stored = stored_values("cf32_le", 64)
    meta = library_recording(tmp_path / "norate", "cf32_le", stored, rate=None)
    with pytest.raises(ParamError, match=r"sample_rate.*norate.sigmf-meta has no core:sample_rate"):
        play(path=meta)
    x, _, block = play(path=meta, sample_rate=48_000.0)          # e.g. pipeline.sample_rate
    assert block.output_specs["out"].rate == 48_000.0 and x.shape == (64,)
    stored.tofile(tmp_path / "bare.cf32")
    with pytest.raises(ParamError, match=r"sample_rate.*bare file"):
        play(path=str(tmp_path / "bare.cf32"), datatype="cf32_le")


def test_bare_file_without_datatype_is_an_error(tmp_path):
    stored_values("cu8", 10).tofile(tmp_path / "dongle.bin")
    with pytest.raises(ParamError, match="datatype: is required for a bare file"):
        play(path=str(tmp_path / "dongle.bin"), sample_rate=RATE)


def test_nan_sample_is_an_error_naming_its_index(tmp_path):
    stored = stored_values("cf32_le", 300)
    stored[2 * 211 + 1] = np.nan
    meta = library_recording(tmp_path / "bad", "cf32_le", stored)
    with pytest.raises(ValueError, match=r"bad.sigmf-data: sample 211 is NaN"):
        play(path=meta, chunk_size=100)


@pytest.mark.parametrize("change, key", [
    (lambda d: d["global"].pop("core:datatype"), "global.core:datatype: is required"),
    (lambda d: d["global"].update({"core:datatype": "cf33"}), "global.core:datatype"),
    (lambda d: d["global"].update({"core:sample_rate": -1}), "global.core:sample_rate"),
    (lambda d: d["global"].update({"core:num_channels": 2}), "global.core:num_channels"),
    (lambda d: d["captures"].append({"core:sample_start": "ten"}),
     r"captures\[1\].core:sample_start"),
    (lambda d: d["captures"].insert(0, {"core:sample_start": 50}),
     r"captures\[1\].core:sample_start: captures must be sorted"),
    (lambda d: d["annotations"].append({"core:label": "x"}),
     r"annotations\[0\].core:sample_start: is required"),
    (lambda d: d.update({"captures": {}}), "captures: must be a list"),
])
def test_malformed_metadata_names_the_file_and_the_key(tmp_path, change, key):
    meta = library_recording(tmp_path / "broken", "cf32_le", stored_values("cf32_le", 64))
    doc = json.loads(Path(meta).read_text())
    change(doc)
    with open(meta, "w") as out:
        json.dump(doc, out)
    with pytest.raises(ParamError, match=f"path: .*broken.sigmf-meta: {key}"):
        play(path=meta)


def test_metadata_that_is_not_json_is_an_error(tmp_path):
    meta = tmp_path / "junk.sigmf-meta"
    meta.write_text('{"global": {"core:sample_rate": NaN}}')
    (tmp_path / "junk.sigmf-data").write_bytes(b"")
    with pytest.raises(ParamError, match=r"junk.sigmf-meta: not valid JSON"):
        play(path=str(meta))


def test_layout_cuts_at_the_end_of_the_data():
    # a file that ends inside the first of two captures keeps only whole samples of the first
    segments, partial = layout([Capture(0), Capture(100)], 4, 4 * 60 + 2)
    assert [(s.first, s.count, s.capture) for s in segments] == [(0, 60, 0)]
    assert partial == 2
