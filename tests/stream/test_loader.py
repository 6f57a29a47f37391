"""Tests for pipeline files (stream/loader.py and the checks of stream/graph.py).

One test per class of error a pipeline file can hold. Each checks the whole location of the
message, ``FILE: key.path: message`` (the form given in DESIGN.md), and the words that say what
is wrong. TOML syntax is that of TOML v1.0.0 (toml.io), read by the standard ``tomllib``.
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from stream.errors import ConfigError, PipelineError
from stream.graph import Pipeline
from stream.loader import load_pipeline, parse_override, pipeline_from_dict
from tests.stream import kinds

HEAD = """\
[pipeline]
name = "bench-check"
sample_rate = 48_000
"""
BLOCKS = """
[blocks.src]
kind = "tone"
samples = 4_800

[blocks.amp]
kind = "gain"
gain_db = -3

[blocks.sink]
kind = "discard"
"""
GOOD = HEAD + 'links = ["src -> amp -> sink"]\n' + BLOCKS


def _file(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "bench-check.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _with_links(*chains: str, blocks: str = BLOCKS, head: str = HEAD) -> str:
    listed = ", ".join(f'"{c}"' for c in chains)
    return f"{head}links = [{listed}]\n{blocks}"


def _fails(tmp_path: Path, text: str, key: str, words: str,
           overrides: tuple[str, ...] = ()) -> PipelineError:
    """Load ``text``; assert it fails as ``FILE: key: ...words...``; return the error."""
    path = _file(tmp_path, text)
    with pytest.raises(PipelineError) as info:
        load_pipeline(path, overrides)
    err = info.value
    assert str(err).startswith(f"{path}: {key}: "), str(err)
    assert (err.file, err.key) == (str(path), key)
    assert words in err.message, err.message
    assert isinstance(err, ConfigError)
    return err


# -- a good file ------------------------------------------------------------------------------

def test_good_file_loads_validated_with_pipeline_defaults(tmp_path):
    pipe = load_pipeline(_file(tmp_path, GOOD))
    assert isinstance(pipe, Pipeline) and pipe.validated
    assert pipe.name == "bench-check"
    assert list(pipe.blocks) == ["src", "amp", "sink"]
    assert pipe.blocks["src"].p.sample_rate == 48_000      # inherited from [pipeline]
    assert pipe.blocks["amp"].p.gain_db == -3.0
    assert [e.label() for e in pipe.edges] == ["src.out -> amp.in", "amp.out -> sink.in"]
    assert all(e.spec is not None and e.spec.rate == 48_000 for e in pipe.edges)


def test_queue_depth_reaches_the_pipeline(tmp_path):
    text = GOOD.replace("sample_rate = 48_000", "sample_rate = 48_000\nqueue_depth = 3")
    assert load_pipeline(_file(tmp_path, text)).queue_depth == 3
    assert load_pipeline(_file(tmp_path, GOOD)).queue_depth == 8     # the documented default


def test_tap_arrow_makes_a_tap(tmp_path):
    text = _with_links("src -> amp -> sink", "src ~> eye",
                       blocks=BLOCKS + '\n[blocks.eye]\nkind = "discard"\n')
    pipe = load_pipeline(_file(tmp_path, text))
    assert [(e.label(), e.tap) for e in pipe.edges][-1] == ("src.out ~> eye.in", True)


def test_the_blocks_behind_taps_are_those_every_path_reaches_through_a_tap(tmp_path):
    # "join" takes one lossless and one tapped input: it is on the receive path
    blocks = BLOCKS + """
[blocks.eye]
kind = "gain"
[blocks.shown]
kind = "discard"
[blocks.join]
kind = "test_join"
[blocks.end]
kind = "discard"
"""
    text = _with_links("src -> amp -> sink", "src ~> eye -> shown", "src -> join.a",
                       "amp ~> join.b", "join -> end", blocks=blocks)
    pipe = load_pipeline(_file(tmp_path, text))
    assert pipe.behind_taps() == {"eye", "shown"}
    assert pipe.observers == "background"                           # the documented default
    text = text.replace("sample_rate = 48_000", 'sample_rate = 48_000\nobservers = "equal"')
    assert load_pipeline(_file(tmp_path, text)).observers == "equal"


def test_bad_observers_setting(tmp_path):
    text = GOOD.replace("sample_rate = 48_000", 'sample_rate = 48_000\nobservers = "idle"')
    _fails(tmp_path, text, "pipeline.observers", "background")


# -- the file itself --------------------------------------------------------------------------

def test_not_valid_toml(tmp_path):
    path = _file(tmp_path, HEAD + "links = [\"src -> amp\"\n[blocks.src\n")
    with pytest.raises(PipelineError) as info:
        load_pipeline(path)
    assert str(info.value).startswith(f"{path}: not valid TOML: ")
    assert "line" in str(info.value)                      # tomllib says where


def test_integer_too_long_for_python_is_reported_not_raised(tmp_path):
    path = _file(tmp_path, GOOD.replace("gain_db = -3", "gain_db = 1" + "0" * 5000))
    with pytest.raises(PipelineError) as info:
        load_pipeline(path)
    assert str(info.value).startswith(f"{path}: not valid TOML: ")


def test_missing_file(tmp_path):
    path = tmp_path / "absent.toml"
    with pytest.raises(PipelineError) as info:
        load_pipeline(path)
    assert str(info.value) == f"{path}: no such pipeline file"


# -- tables and keys --------------------------------------------------------------------------

def test_unknown_top_level_table(tmp_path):
    _fails(tmp_path, GOOD + "\n[monitor]\nport = 9000\n", "monitor", "unknown table")


def test_unknown_pipeline_key(tmp_path):
    err = _fails(tmp_path, GOOD.replace('name = "bench-check"', 'colour = "red"'),
                 "pipeline.colour", "unknown key")
    assert "sample_rate" in err.message                   # the known keys are listed


@pytest.mark.parametrize("value", ["0", "-2", '"deep"', "2.5"])
def test_bad_queue_depth(tmp_path, value):
    _fails(tmp_path, GOOD.replace("sample_rate = 48_000", f"sample_rate = 48_000\n"
                                  f"queue_depth = {value}"), "pipeline.queue_depth", "must be")


def test_bad_pipeline_sample_rate(tmp_path):
    _fails(tmp_path, GOOD.replace("sample_rate = 48_000", "sample_rate = 0"),
           "pipeline.sample_rate", "must be a number > 0 (got 0)")


def test_no_blocks(tmp_path):
    _fails(tmp_path, HEAD + 'links = ["src -> sink"]\n', "blocks", "no blocks defined")


def test_no_links(tmp_path):
    _fails(tmp_path, HEAD + BLOCKS, "pipeline.links", "non-empty list")


def test_no_source(tmp_path):
    text = _with_links("amp -> sink", blocks=BLOCKS.replace('kind = "tone"\nsamples = 4_800',
                                                            'kind = "gain"'))
    _fails(tmp_path, text, "blocks", "no source block")


# -- blocks and parameters --------------------------------------------------------------------

def test_block_without_kind(tmp_path):
    _fails(tmp_path, GOOD.replace('kind = "gain"\n', ""), "blocks.amp.kind", "is required")


def test_block_that_is_not_a_table(tmp_path):
    text = HEAD + 'links = ["src -> sink"]\n' + "[blocks]\nsrc = 5\n"
    _fails(tmp_path, text, "blocks.src", "must be a table")


def test_bad_block_id(tmp_path):
    text = GOOD + '\n[blocks."9lives"]\nkind = "discard"\n'
    _fails(tmp_path, text, "blocks.9lives", "block ids are letters")


def test_unknown_kind(tmp_path):
    err = _fails(tmp_path, GOOD.replace('kind = "gain"', 'kind = "gane"'), "blocks.amp.kind",
                 "unknown kind 'gane'")
    assert "gain" in err.message                          # the known kinds are listed


def test_unknown_parameter(tmp_path):
    err = _fails(tmp_path, GOOD.replace("gain_db = -3", "gain_dB = -3"), "blocks.amp.gain_dB",
                 "unknown parameter")
    assert "known: gain_db" in err.message


def test_missing_required_parameter(tmp_path):
    text = _with_links("src -> rec", blocks=BLOCKS + '\n[blocks.rec]\nkind = "record"\n')
    _fails(tmp_path, text, "blocks.rec.path", "is required")


@pytest.mark.parametrize(("line", "key", "words"), [
    ('gain_db = "loud"', "blocks.amp.gain_db", "must be a number (got 'loud')"),
    ("gain_db = true", "blocks.amp.gain_db", "must be a number (got True)"),
    ("gain_db = [3]", "blocks.amp.gain_db", "must be a number (got [3])"),
])
def test_wrong_type(tmp_path, line, key, words):
    _fails(tmp_path, GOOD.replace("gain_db = -3", line), key, words)


def test_wrong_type_integer(tmp_path):
    _fails(tmp_path, GOOD.replace("samples = 4_800", "samples = 4800.5"), "blocks.src.samples",
           "must be an integer (got 4800.5)")


def test_out_of_range(tmp_path):
    text = GOOD.replace("samples = 4_800", "samples = 4_800\nsample_rate = -5")
    err = _fails(tmp_path, text, "blocks.src.sample_rate", "must be > 0 (got -5")
    # the value is shown as it was written (DESIGN.md's example reads "(got -5)")
    assert err.message == "must be > 0 (got -5)"


@pytest.mark.parametrize("value", ["nan", "+nan", "-nan"])
def test_nan(tmp_path, value):
    _fails(tmp_path, GOOD.replace("gain_db = -3", f"gain_db = {value}"), "blocks.amp.gain_db",
           "must be a finite number (got nan)")


def test_infinity(tmp_path):
    _fails(tmp_path, GOOD.replace("gain_db = -3", "gain_db = inf"), "blocks.amp.gain_db",
           "must be a finite number (got inf)")


def test_integer_too_large_for_a_float_parameter(tmp_path):
    _fails(tmp_path, GOOD.replace("gain_db = -3", "gain_db = 1" + "0" * 400),
           "blocks.amp.gain_db", "must be a finite number")


def test_problem_found_by_a_block_setup_is_located(tmp_path):
    text = GOOD.replace("samples = 4_800", "samples = 4_800\nfrequency_hz = 30_000")
    _fails(tmp_path, text, "blocks.src.frequency_hz", "below half the sample rate")


def test_sample_rate_missing_everywhere(tmp_path):
    text = GOOD.replace("sample_rate = 48_000\n", "")
    _fails(tmp_path, text, "blocks.src.sample_rate", "is required")


# -- links ------------------------------------------------------------------------------------

@pytest.mark.parametrize(("chain", "words"), [
    ("src => amp => sink", "expected 'a -> b [-> c ...]' (got 'src => amp => sink')"),
    ("src -> -> sink", "expected 'a -> b"),
    ("src ->", "expected 'a -> b"),
    ("src", "expected 'a -> b"),
    ("src -> amp.2x -> sink", "bad endpoint 'amp.2x' (write id or id.port)"),
    ("src -> a b -> sink", "bad endpoint 'a b'"),
])
def test_bad_link_syntax(tmp_path, chain, words):
    _fails(tmp_path, _with_links(chain), "pipeline.links[0]", words)


def test_link_that_is_not_a_string(tmp_path):
    _fails(tmp_path, HEAD + "links = [5]\n" + BLOCKS, "pipeline.links[0]", "must be a string")


def test_link_to_unknown_block(tmp_path):
    err = _fails(tmp_path, _with_links("src -> amp", "amp -> snk"), "pipeline.links[1]",
                 "unknown block 'snk'")
    assert "src, amp, sink" in err.message


def test_unknown_port(tmp_path):
    err = _fails(tmp_path, _with_links("src.iq -> amp -> sink"), "pipeline.links[0]",
                 "has no output port 'iq'")
    assert "outputs: out" in err.message


def test_ambiguous_port(tmp_path):
    blocks = BLOCKS + f'\n[blocks.pair]\nkind = "{kinds.Split.kind}"\n'
    _fails(tmp_path, _with_links("src -> amp -> sink", "pair -> rest", blocks=blocks
                                 + '\n[blocks.rest]\nkind = "discard"\n'),
           "pipeline.links[1]", "output ports i, q: name one")


def test_input_fed_twice(tmp_path):
    blocks = BLOCKS + '\n[blocks.src2]\nkind = "tone"\n'
    _fails(tmp_path, _with_links("src -> amp -> sink", "src2 -> amp", blocks=blocks),
           "pipeline.links[1]", "input amp.in is fed twice")


def test_input_not_connected(tmp_path):
    blocks = BLOCKS + '\n[blocks.spare]\nkind = "gain"\n'
    _fails(tmp_path, _with_links("src -> amp -> sink", "spare -> sink2",
                                 blocks=blocks + '\n[blocks.sink2]\nkind = "discard"\n'),
           "blocks.spare", "input port spare.in is not connected")


def test_output_not_connected(tmp_path):
    blocks = BLOCKS.replace('\n[blocks.sink]\nkind = "discard"\n', "")
    _fails(tmp_path, _with_links("src -> amp", blocks=blocks), "blocks.amp",
           "output port amp.out is not connected")


def test_dtype_mismatch(tmp_path):
    blocks = BLOCKS.replace('kind = "tone"\nsamples = 4_800', f'kind = "{kinds.Bits.kind}"')
    _fails(tmp_path, _with_links("src -> amp -> sink", blocks=blocks), "pipeline.links[0]",
           "dtype mismatch on src.out -> amp.in: src.out gives uint8, "
           "amp.in takes complex64 | float32")


def test_rate_mismatch_between_two_inputs(tmp_path):
    blocks = BLOCKS + (f'\n[blocks.join]\nkind = "{kinds.Join.kind}"\n'
                       '\n[blocks.slow]\nkind = "tone"\nsample_rate = 32_000\n')
    _fails(tmp_path, _with_links("src -> amp -> join.a", "slow -> join.b", "join -> sink",
                                 blocks=blocks),
           "blocks.join", "rate mismatch between inputs: a at 48000, b at 32000 samples/s")


def test_cycle(tmp_path):
    blocks = BLOCKS + f'\n[blocks.join]\nkind = "{kinds.Join.kind}"\n'
    # join.out -> amp -> join.b closes a loop; sink is fed by nothing else, so drop it
    blocks = blocks.replace('\n[blocks.sink]\nkind = "discard"\n', "")
    _fails(tmp_path, _with_links("src -> join.a", "join -> amp -> join.b", blocks=blocks),
           "pipeline.links", "links form a cycle through amp, join")


# -- --set overrides --------------------------------------------------------------------------

def test_overrides_are_applied(tmp_path):
    pipe = load_pipeline(_file(tmp_path, GOOD), ["amp.gain_db=6", "src.samples=100",
                                                 "pipeline.name=renamed", "src.dtype=float32"])
    assert pipe.blocks["amp"].p.gain_db == 6.0
    assert pipe.blocks["src"].p.samples == 100
    assert pipe.blocks["src"].p.dtype == "float32"          # a bare word is a string
    assert pipe.name == "renamed"
    assert pipe.edges[0].spec.dtype == "float32"            # applied before validation


def test_override_does_not_change_the_parsed_document():
    doc = {"pipeline": {"sample_rate": 48_000, "links": ["src -> sink"]},
           "blocks": {"src": {"kind": "tone"}, "sink": {"kind": "discard"}}}
    pipeline_from_dict(doc, ["src.samples=7", "pipeline.name=other"])
    assert doc["blocks"]["src"] == {"kind": "tone"}
    assert "name" not in doc["pipeline"]


def test_override_with_a_bad_value_names_its_key_path(tmp_path):
    _fails(tmp_path, GOOD, "blocks.amp.gain_db", "must be a number (got 'loud')",
           ("amp.gain_db=loud",))


def test_override_out_of_range(tmp_path):
    _fails(tmp_path, GOOD, "blocks.src.sample_rate", "must be > 0 (got -5)",
           ("src.sample_rate=-5",))


def test_override_of_an_unknown_parameter(tmp_path):
    _fails(tmp_path, GOOD, "blocks.amp.gian_db", "unknown parameter", ("amp.gian_db=1",))


def test_override_of_an_unknown_block(tmp_path):
    err = _fails(tmp_path, GOOD, "--set amq.gain_db", "unknown block 'amq'", ("amq.gain_db=1",))
    assert "src, amp, sink" in err.message


def test_override_of_an_unknown_pipeline_key(tmp_path):
    _fails(tmp_path, GOOD, "pipeline.colour", "unknown key", ("pipeline.colour=red",))


def test_override_on_a_block_that_is_not_a_table(tmp_path):
    text = HEAD + 'links = ["src -> sink"]\n' + "[blocks]\nsrc = 5\n"
    _fails(tmp_path, text, "blocks.src", "must be a table", ("src.samples=1",))


@pytest.mark.parametrize("text", ["amp", "amp=1", "amp.=1", ".gain_db=1", "=1", "amp.gain_db"])
def test_malformed_override(tmp_path, text):
    _fails(tmp_path, GOOD, "--set", "expected id.param=value", (text,))


# -- parse_override ---------------------------------------------------------------------------

@pytest.mark.parametrize(("text", "value"), [
    ("src.samples=100", 100),
    ("src.samples=1_000", 1000),                 # TOML integer with separators
    ("src.samples=0x10", 16),                    # TOML hexadecimal integer
    ("amp.gain_db=-3.5", -3.5),
    ("src.sample_rate=1e6", 1e6),
    ("src.realtime=true", True),
    ("src.realtime=false", False),
    ("src.realtime=True", "True"),               # TOML booleans are lower case: a bare word
    ("src.modulation=ook", "ook"),               # bare word
    ("src.modulation=2fsk", "2fsk"),             # not a number: a bare word
    ('rec.path="out file.raw"', "out file.raw"),  # basic string
    (r"rec.path='C:\data'", r"C:\data"),        # literal string: no escapes
    ("rec.path=a=b", "a=b"),                     # only the first '=' separates
    ("det.taps=[1, 2.5, -3]", [1, 2.5, -3]),
    ('det.names=["a", "b"]', ["a", "b"]),
    ("det.taps=[]", []),
])
def test_parse_override_values(text, value):
    block_id, param, parsed = parse_override(text)
    assert (block_id, param) == (text.split(".", 1)[0], text.split(".", 1)[1].split("=")[0])
    assert parsed == value and type(parsed) is type(value)


def test_parse_override_trims_spaces_and_reads_nan():
    assert parse_override("  src.samples = 7 ") == ("src", "samples", 7)
    block_id, param, value = parse_override("amp.gain_db=nan")
    assert (block_id, param) == ("amp", "gain_db") and math.isnan(value)


def test_parse_override_of_the_pipeline_table():
    assert parse_override("pipeline.name=night-run") == ("pipeline", "name", "night-run")
